// Bellman backups over a compiled Model: the hot loops every method shares.
// Stateless functions over caller-owned arrays; thread-safe as long as callers do not share
// output arrays. Terminal states always back up to 0.
#ifndef MDP_SOLVER_INTERNAL_BELLMAN_H_
#define MDP_SOLVER_INTERNAL_BELLMAN_H_

#include <cmath>
#include <limits>

#include "solver/internal/row_dot.h"
#include "solver/model.h"
#include "solver/options.h"

namespace mdp::internal {

// Q value of row `r` against values `v`: r(s, a) + g * sum_s' p(s' | s, a) v(s').
// The portable kernels' KernelRowQ, bit for bit.
inline double RowQ(const Model& m, RowId r, const double* v) {
  return m.row_reward_data()[r] + m.discount() * RowSum(m, r, v);
}

// True iff `a` is strictly better than `b` under the objective.
template <bool kMaximize>
inline bool Better(double a, double b) {
  return kMaximize ? a > b : a < b;
}

// Best Q at state s (0 for terminal states); sets *best_row to its first best row (or -1).
template <bool kMaximize>
inline double BackupState(const Model& m, StateId s, const double* v, RowId* best_row) {
  const RowId* rb = m.state_row_begin_data();
  RowId best = -1;
  double best_q = 0.0;
  for (RowId r = rb[s], end = rb[s + 1]; r < end; ++r) {
    const double q = RowQ(m, r, v);
    if (best < 0 || Better<kMaximize>(q, best_q)) {
      best = r;
      best_q = q;
    }
  }
  if (best_row != nullptr) *best_row = best;
  return best_q;
}

// The sweeps below come in two compiled copies that agree to rounding: a portable one, and
// one for CPUs with AVX2 and FMA that reads each row's next-state values with gather
// instructions (used where a caller names it: tests, benchmarks). The solver itself uses the
// portable copy (ChooseKernels). An earlier rule chose the gather copy for large models with
// scattered next states; on a Zen 4 host, 1,000,000 random states x 4 x 8, value iteration
// to a bound of 1 (411 sweeps, 2 threads, 4 alternating runs each) took 42-60 ms per sweep
// with it (mean 51) and 42-45 ms (mean 44) without, and their best single sweeps were equal
// (31-33 ms), so the rule is gone until a host shows a steady gain.
enum class KernelSet { kPortable, kGather };
KernelSet ChooseKernels(const Model& m);

// out[s] = (T in)(s) for all s; returns sup |out - in|. `threads` as in SolveOptions.
double SyncSweep(const Model& m, const double* in, double* out, int threads);

// A bound on the rounding of one computed backup out = T in (SyncSweep) of m, in absolute
// terms: a row's sum of k products plus its reward, in double precision, is within (k + 4)
// units of roundoff of the largest |in|, |out| or reward. Bounds derived from a residual
// |T v - v| add it (solution.cc, verify.cc): the residual is a difference of nearly equal
// values where they are large, and 1 / (1 - g) amplifies its rounding. O(states + rows).
double BackupRoundingAllowance(const Model& m, const double* in, const double* out);
// out[s] = best over the rows of s of r + discount * sum p next(s'), 0 at terminal states: one
// stage of backward induction, with the finite horizon's discount instead of the model's.
void StageSweep(const Model& m, const double* next, double discount, double* out, int threads);
// In-place Gauss-Seidel sweep over states in index order; returns sup of the changes.
double GaussSeidelSweep(const Model& m, double* v);
// Gauss-Seidel in chunks of kGaussSeidelChunkStates contiguous states, handed to `threads`
// threads on demand: each chunk is swept in index order in `out`, reading its own states' new
// values from `out` and every other state's from `in` (out starts as a copy of in). The
// result depends on neither the thread count nor timing (one chunk: the plain sweep). Like
// the plain sweep, this map is a g-contraction with fixed point V*: each new value is one
// backup of values that are each old or already updated (common practice).
// Returns sup |out - in|.
inline constexpr StateId kGaussSeidelChunkStates = 65536;
double BlockGaussSeidelSweep(const Model& m, const double* in, double* out, int threads);
// out[s] = Q(s, rows[s], in) (0 where rows[s] < 0); returns sup |out - in|.
double PolicySweep(const Model& m, const RowId* rows, const double* in, double* out, int threads);
struct Improvement {
  int64_t changed = 0;    // States whose row changed.
  double residual = 0.0;  // sup |(T v)(s) - v(s)|.
};
// rows[s] = a best row of s against v (-1 for terminal). A state keeps its current row
// unless another row is better by more than keep_slack * max(1, |best Q|), so that rounding
// noise cannot make policy iteration cycle.
Improvement ImprovePolicy(const Model& m, const double* v, double keep_slack, RowId* rows,
                          int threads);
// out = T in and rows = the first best row of each state; returns sup |out - in|.
double GreedySweep(const Model& m, const double* in, double* out, RowId* rows, int threads);

// y[s] = base[s] + sign * sum_e p[e] x[next[e]] over the entries [begin[s], begin[s + 1]) of
// a CSR matrix of n rows (a policy's rows copied out: internal/policy_matrix.h); returns
// sup |y - x|. y must not alias x.
double CsrCombine(const int64_t* begin, const StateId* next, const double* p, StateId n,
                  const double* base, double sign, const double* x, double* y, int threads,
                  KernelSet k);

// The same sweeps with the copy named (kGather falls back to kPortable on a CPU without
// AVX2 and FMA): for tests and benchmarks.
double SyncSweep(const Model& m, const double* in, double* out, int threads, KernelSet k);
double GaussSeidelSweep(const Model& m, double* v, KernelSet k);
double BlockGaussSeidelSweep(const Model& m, const double* in, double* out, int threads,
                             KernelSet k, StateId chunk_states = kGaussSeidelChunkStates);

// Resolved thread count: 0 means every usable CPU (UsableCpuCount, options.h).
int ThreadCount(int threads);

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_BELLMAN_H_
