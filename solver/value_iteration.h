// Value iteration, synchronous and Gauss-Seidel. Called through Solve() in solver.h; these
// entry points exist for tests and benchmarks. Thread-safe on immutable models.
#ifndef MDP_SOLVER_VALUE_ITERATION_H_
#define MDP_SOLVER_VALUE_ITERATION_H_

#include "solver/model.h"
#include "solver/options.h"
#include "solver/progress.h"
#include "solver/solution.h"

namespace mdp {

// Synchronous value iteration from V = 0: V <- T V until g e / (1 - g) <= tolerance, where e
// is the sup-norm change of the last sweep (Puterman 1994, Thm 6.3.1), then Finalize().
Solution ValueIteration(const Model& m, const SolveOptions& options, const ProgressFn* progress,
                        const CancelToken* cancel);

// In-place (Gauss-Seidel) value iteration: each sweep uses the values already updated in it.
// Its own change is not the Bellman residual, so convergence is confirmed by Finalize()'s
// exact backup and the sweeps resume if the bound is not yet met.
Solution GaussSeidelValueIteration(const Model& m, const SolveOptions& options,
                                   const ProgressFn* progress, const CancelToken* cancel);

}  // namespace mdp

#endif  // MDP_SOLVER_VALUE_ITERATION_H_
