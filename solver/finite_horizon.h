// Finite-horizon planning by backward induction: with H periods to go and values V_H given at
// the end (terminal values, default 0), for t = H-1 down to 0
//   Q_t(s, a) = r(s, a) + g * sum_s' p(s' | s, a) V_{t+1}(s'),   V_t(s) = best_a Q_t(s, a),
// where g in [0, 1] (1: plain total reward over the horizon). The policy depends on the
// stage t (H - t periods remaining). Exact up to floating-point rounding: no iteration error.
// Absorbing (terminal) states keep value 0 at every stage. The model's own discount is not
// used; the discount here is the caller's. Pure functions; thread-safe; results owned by the
// caller. Memory: (H + 1) x states doubles.
#ifndef MDP_SOLVER_FINITE_HORIZON_H_
#define MDP_SOLVER_FINITE_HORIZON_H_

#include <cstdint>
#include <vector>

#include "solver/model.h"
#include "solver/progress.h"
#include "solver/status.h"

namespace mdp {

struct FiniteHorizonOptions {
  int64_t horizon = 1;                // H >= 1 periods.
  double discount = 1.0;              // In [0, 1].
  std::vector<double> terminal_values;  // V_H per state; empty means 0 everywhere.
  double tie_tolerance = 1e-9;        // Slack (reward units) when grouping tied actions.
  int threads = 1;                    // 0 = all cores.
  int64_t max_table_entries = int64_t{1} << 29;  // Cap on (H + 1) x states (4 GiB).
};

struct FiniteHorizonSolution {
  int64_t horizon = 0;
  double discount = 1.0;
  StateId states = 0;
  double seconds = 0.0;
  bool cancelled = false;
  std::vector<double> stage_values;  // V_t(s) at [t * states + s], t = 0..H.

  double value(int64_t stage, StateId s) const { return stage_values[stage * states + s]; }
};

// REQUIRES nothing; returns kInvalidArgument for a bad horizon, discount or terminal values,
// kResourceExhausted if the value table would exceed options.max_table_entries.
Result<FiniteHorizonSolution> BackwardInduction(const Model& m, const FiniteHorizonOptions& options,
                                                const ProgressFn* progress = nullptr,
                                                const CancelToken* cancel = nullptr);

// The decision at stage t (0 <= t < H) in state s: Q of each of the state's rows (document
// order), the optimal set (within options.tie_tolerance + 1e-12 * max(1, |V|) of the best),
// the deterministic pick (first optimal row in document order; -1 for a terminal state) and
// the action gap (NaN with fewer than two actions).
struct StageDecision {
  double value = 0.0;
  std::vector<double> q;
  std::vector<uint8_t> optimal;
  RowId pick = -1;
  double action_gap = 0.0;
};
StageDecision DecideAtStage(const Model& m, const FiniteHorizonSolution& solution, int64_t stage,
                            StateId s, double tie_tolerance);
// The same from the values of the following stage alone (V_{t+1}, one per state) and the
// criterion's discount: what a solved finite-horizon Solution keeps (Solution::stage_values).
StageDecision DecideFromNextStage(const Model& m, const double* next_stage_values,
                                  double discount, StateId s, double tie_tolerance);

}  // namespace mdp

#endif  // MDP_SOLVER_FINITE_HORIZON_H_
