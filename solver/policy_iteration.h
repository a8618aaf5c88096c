// Policy iteration (exact evaluation) and modified policy iteration. Called through Solve()
// in solver.h; these entry points exist for tests and benchmarks. Thread-safe on immutable
// models. Return kCancelled/kInternal statuses only when evaluation itself fails.
#ifndef MDP_SOLVER_POLICY_ITERATION_H_
#define MDP_SOLVER_POLICY_ITERATION_H_

#include "solver/model.h"
#include "solver/options.h"
#include "solver/progress.h"
#include "solver/solution.h"
#include "solver/status.h"

namespace mdp {

// Howard's policy iteration, then Finalize(). Up to 3000 states (or with linear_solver
// kDirect or kSweeps) each policy is evaluated exactly (options.linear_solver) and the loop
// stops when no state changes its action. Above that (or with kBiCgStab) evaluation is
// inexact: each policy's values are solved, warm started, only until their residual is a
// small share of the Bellman residual that chose the policy (BiCGSTAB on the policy's own
// rows, internal/policy_matrix.h), and the loop stops on the Bellman residual like value
// iteration. Solution::sweeps counts the evaluation's work in passes over the policy's rows.
Result<Solution> PolicyIteration(const Model& m, const SolveOptions& options,
                                 const ProgressFn* progress, const CancelToken* cancel);

// Modified policy iteration (Puterman 1994, sec. 6.5): each iteration does one improvement
// backup u = T v (whose change gives the stopping residual) followed by
// options.evaluation_sweeps - 1 sweeps of the greedy policy's operator.
Solution ModifiedPolicyIteration(const Model& m, const SolveOptions& options,
                                 const ProgressFn* progress, const CancelToken* cancel);

}  // namespace mdp

#endif  // MDP_SOLVER_POLICY_ITERATION_H_
