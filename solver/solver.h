// The solver core's front door: include this to build, validate, solve, evaluate and verify
// finite MDPs. No I/O, no global state; every function is safe to call from any thread on
// models it does not mutate (Models are immutable).
#ifndef MDP_SOLVER_SOLVER_H_
#define MDP_SOLVER_SOLVER_H_

#include "solver/average_reward.h"
#include "solver/compare.h"
#include "solver/evaluate.h"
#include "solver/finite_horizon.h"
#include "solver/model.h"
#include "solver/model_spec.h"
#include "solver/options.h"
#include "solver/policy.h"
#include "solver/progress.h"
#include "solver/simulate.h"
#include "solver/solution.h"
#include "solver/status.h"
#include "solver/validate.h"
#include "solver/verify.h"

namespace mdp {

// Solves `m` with options.method. A non-OK status means the solve could not run (bad
// options, out of memory). Stopping early (limits, cancel, stall) is a successful call whose
// Solution::outcome says why; its values and bounds are still valid for what was reached.
// `progress` (may be null) is called once per iteration from this thread; `cancel` (may be
// null) is polled once per iteration.
Result<Solution> Solve(const Model& m, const SolveOptions& options,
                       const ProgressFn* progress = nullptr, const CancelToken* cancel = nullptr);

}  // namespace mdp

#endif  // MDP_SOLVER_SOLVER_H_
