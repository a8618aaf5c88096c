// The solver core's front door: include this to build, validate, solve, evaluate and verify
// finite MDPs. No I/O, no global state; every function is safe to call from any thread on
// models it does not mutate (Models are immutable).
#ifndef MDP_SOLVER_SOLVER_H_
#define MDP_SOLVER_SOLVER_H_

#include "solver/average_reward.h"
#include "solver/compare.h"
#include "solver/criterion_eval.h"
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
#include "solver/total_reward.h"
#include "solver/validate.h"
#include "solver/verify.h"

namespace mdp {

// Solves `m`. A non-OK status means the solve could not run (bad
// options, out of memory). Stopping early (limits, cancel, stall) is a successful call whose
// Solution::outcome says why; its values and bounds are still valid for what was reached.
// `progress` (may be null) is called once per iteration from this thread; `cancel` (may be
// null) is polled once per iteration.
// The model's criterion decides what is solved (see Solution::criterion for how the fields
// read); options.method must be one of the criterion's methods (options.h), kAuto picks its
// default, and the Solution's method and options.method name the method used. Returns
// kInvalidArgument for a method that does not apply, and passes on the criterion solvers'
// errors (average_reward.h, total_reward.h: kFailedPrecondition for models they reject).
Result<Solution> Solve(const Model& m, const SolveOptions& options,
                       const ProgressFn* progress = nullptr, const CancelToken* cancel = nullptr);

// OK iff `method` (after kAuto is resolved) is one of the criterion's methods; else
// kInvalidArgument naming the methods that apply. Solve() calls it first.
Status CheckMethod(CriterionKind criterion, Method method);

// Finite horizon: the decision at `stage` (0 <= stage < solution.horizon; stage t has
// horizon - t periods to go) in state `s`, from a Solution that Solve() made for `m`.
StageDecision DecideAtStage(const Model& m, const Solution& solution, int64_t stage, StateId s);

// Finite horizon: a copy of `solution` whose per-state fields (values, q, optimal sets, picks,
// gaps) describe `stage` instead of stage 0; stage_values is left empty.
// REQUIRES: 0 <= stage < solution.horizon.
Solution SolutionAtStage(const Model& m, const Solution& solution, int64_t stage);

}  // namespace mdp

#endif  // MDP_SOLVER_SOLVER_H_
