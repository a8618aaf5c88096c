// Writes benchmark models to disk so outside baselines can read the very same model:
// the compiled CSR arrays as NumPy .npy files (for scripts/bench/baseline_sweep.py) and the
// authored spec as a model document (for ingest timings). Plain functions; not synchronised.
#ifndef MDP_SCRIPTS_BENCH_BENCH_FILES_H_
#define MDP_SCRIPTS_BENCH_BENCH_FILES_H_

#include <span>
#include <string>

#include "solver/model.h"
#include "solver/model_spec.h"
#include "solver/status.h"

namespace mdp::bench {

// Writes the arrays of `m` into directory `dir` (created if missing), one .npy file each:
// state_row_begin (int64, states + 1), row_reward (float64, rows), row_entry_begin (int64,
// rows + 1), entry_next (int32, entries), entry_probability (float64, entries), and
// `check_values` (float64, states) as check_values.npy, plus meta.json with the discount
// and `check_sweeps`, the number of synchronous sweeps from V = 0 that gave check_values.
// REQUIRES: m has no terminal states (the baseline assumes every state has a row).
Status WriteModelArrays(const Model& m, std::span<const double> check_values, int check_sweeps,
                        const std::string& dir);

// How a model document spells its outcomes.
enum class DocumentEncoding {
  kObjects,  // mdpserve/model@1: one {"next", "probability"} object per outcome.
  // Hook: the compact encoding of issue 5 (indexed arrays) goes here when it exists, so
  // scripts/bench.sh can time its ingest next to kObjects.
};

// Writes `spec` as a model document at `path`. Rewards and probabilities are printed with
// 17 significant digits, so the document decodes to the same model.
// REQUIRES: no terminal states and outcome rewards all 0 (as GenerateSpec makes them).
Status WriteModelDocument(const ModelSpec& spec, DocumentEncoding encoding,
                          const std::string& path);

}  // namespace mdp::bench

#endif  // MDP_SCRIPTS_BENCH_BENCH_FILES_H_
