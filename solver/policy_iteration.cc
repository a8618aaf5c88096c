#include "solver/policy_iteration.h"

#include <algorithm>
#include <cmath>
#include <functional>
#include <vector>

#include "solver/evaluate.h"
#include "solver/internal/bellman.h"
#include "solver/internal/policy_matrix.h"
#include "solver/internal/run_control.h"
#include "solver/policy.h"

namespace mdp {
namespace {

void SetOutcome(std::optional<SolveOutcome> stop, Solution& solution) {
  if (solution.value_error_bound <= solution.options.tolerance) {
    solution.outcome = SolveOutcome::kConverged;
  } else {
    solution.outcome = stop.value_or(SolveOutcome::kStalled);
  }
}

// A start v0 with T v0 >= v0 (maximize) or T v0 <= v0 (minimize), from which modified policy
// iteration converges monotonically (Puterman 1994, sec. 6.5): the worst one-step reward
// received forever, and 0 on terminal states.
std::vector<double> MonotoneStart(const Model& m) {
  const bool maximize = m.objective() == Objective::kMaximize;
  double worst = 0.0;
  for (RowId r = 0; r < m.num_rows(); ++r) {
    worst = maximize ? std::min(worst, m.row_reward(r)) : std::max(worst, m.row_reward(r));
  }
  std::vector<double> v(m.num_states(), worst / (1.0 - m.discount()));
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (m.terminal(s)) v[s] = 0.0;
  }
  return v;
}

// Tolerance of each evaluation relative to the Bellman residual of the values it starts
// from; tightened when an improvement fails to shrink the residual enough.
constexpr double kEvaluationShare = 0.02;

// Most work one evaluation may spend (passes over the policy's rows, policy_matrix.h); the
// next improvement then starts from where it got. Policies of a 200,000-state grid with slip
// changed for 30 improvements while each evaluation took up to ~200 units: capped at 100,
// the whole solve needed 2,815 units instead of 5,616, with the same improvements; local
// (also shuffled), random and inventory models spent the same work either way (solver_bench).
constexpr double kMaxEvaluationWork = 100.0;

// Policy iteration with inexact evaluation (the inexact Newton view of policy iteration,
// common practice): after each greedy improvement with Bellman residual e, the new policy's
// values are solved only until their own residual is below kEvaluationShare * e, warm
// started from T v. The iteration stops on the Bellman residual, like value iteration, and
// Finalize() restates the bound from one exact backup; no step relies on an evaluation being
// exact. Each evaluation works on the policy's own rows copied out (PolicyMatrix).
Solution InexactPolicyIteration(const Model& m, const SolveOptions& options,
                                const ProgressFn* progress, const CancelToken* cancel) {
  internal::RunControl control(options, progress, cancel);
  const int threads = internal::ThreadCount(options.threads);
  const double g = m.discount();
  const double target = internal::ResidualTarget(g, options.tolerance);
  Solution solution;
  solution.method = Method::kPolicyIteration;
  solution.options = options;
  std::vector<double> v(m.num_states(), 0.0);
  std::vector<double> u(m.num_states(), 0.0);
  std::vector<RowId> rows(m.num_states(), -1);
  internal::PolicyMatrix policy;
  const std::function<bool()> interrupted = [&] {
    return control.cancelled() || (options.time_limit_seconds > 0 &&
                                   control.elapsed_seconds() >= options.time_limit_seconds);
  };
  double share = kEvaluationShare;
  internal::EvaluationPlan plan;
  double e = internal::GreedySweep(m, v.data(), u.data(), rows.data(), threads);
  ++solution.sweeps;
  std::optional<SolveOutcome> stop;
  while (e > target) {
    ++solution.iterations;
    stop = control.After(solution.iterations, solution.sweeps, e, g * e / (1.0 - g), "improve");
    if (stop) break;
    // u = T v = T_pi v is one policy sweep ahead of v: the warm start.
    policy.Assign(m, rows.data(), threads);
    const internal::EvaluationResult r = internal::SolvePolicyValues(
        policy, std::max(0.5 * target, share * e), kMaxEvaluationWork, threads, interrupted, plan,
        u);
    solution.sweeps += static_cast<int64_t>(std::ceil(r.work));
    v.swap(u);
    const double next = internal::GreedySweep(m, v.data(), u.data(), rows.data(), threads);
    ++solution.sweeps;
    if (next > 0.5 * e) share *= 0.1;
    e = next;
    if (r.interrupted) {
      stop = control.cancelled() ? SolveOutcome::kCancelled : SolveOutcome::kTimeLimit;
      break;
    }
  }
  Finalize(m, v, options, solution);
  SetOutcome(stop, solution);
  solution.solve_seconds = control.elapsed_seconds();
  return solution;
}

}  // namespace

Result<Solution> PolicyIteration(const Model& m, const SolveOptions& options,
                                 const ProgressFn* progress, const CancelToken* cancel) {
  // Above the states where automatic evaluation turns from sparse LU to Krylov (evaluate.h).
  const bool iterative = options.linear_solver == LinearSolver::kBiCgStab ||
                         (options.linear_solver == LinearSolver::kAuto &&
                          m.num_states() > EvaluateOptions().direct_max_states);
  if (iterative) return InexactPolicyIteration(m, options, progress, cancel);
  internal::RunControl control(options, progress, cancel);
  const int threads = internal::ThreadCount(options.threads);
  const double g = m.discount();
  Solution solution;
  solution.method = Method::kPolicyIteration;
  solution.options = options;
  EvaluateOptions evaluate;
  evaluate.solver = options.linear_solver;
  evaluate.tolerance = std::max(1e-15, options.tolerance * 0.01);
  evaluate.threads = options.threads;
  std::vector<double> v(m.num_states(), 0.0);
  std::vector<RowId> rows(m.num_states(), -1);
  internal::ImprovePolicy(m, v.data(), 0.0, rows.data(), threads);
  ++solution.sweeps;
  std::optional<SolveOutcome> stop;
  for (;;) {
    Result<PolicyValues> values =
        EvaluatePolicy(m, DeterministicPolicy(m, rows), evaluate, cancel, v);
    if (!values.ok()) {
      if (values.status().code() != StatusCode::kCancelled) return values.status();
      stop = SolveOutcome::kCancelled;
      break;
    }
    v = std::move(values->values);
    const internal::Improvement step =
        internal::ImprovePolicy(m, v.data(), 1e-12, rows.data(), threads);
    ++solution.iterations;
    ++solution.sweeps;
    if (step.changed == 0) break;
    stop = control.After(solution.iterations, solution.sweeps, step.residual,
                         g * step.residual / (1.0 - g), "improve");
    if (stop) break;
  }
  Finalize(m, v, options, solution);
  SetOutcome(stop, solution);
  solution.solve_seconds = control.elapsed_seconds();
  return solution;
}

Solution ModifiedPolicyIteration(const Model& m, const SolveOptions& options,
                                 const ProgressFn* progress, const CancelToken* cancel) {
  internal::RunControl control(options, progress, cancel);
  const int threads = internal::ThreadCount(options.threads);
  const double g = m.discount();
  const double target = internal::ResidualTarget(g, options.tolerance);
  Solution solution;
  solution.method = Method::kModifiedPolicyIteration;
  solution.options = options;
  std::vector<double> v = MonotoneStart(m);
  std::vector<double> u(m.num_states(), 0.0);
  std::vector<RowId> rows(m.num_states(), -1);
  internal::PolicyMatrix policy;
  std::optional<SolveOutcome> stop;
  for (;;) {
    // u = T v: the improvement step; its change is the Bellman residual of v.
    const double e = internal::GreedySweep(m, v.data(), u.data(), rows.data(), threads);
    v.swap(u);
    ++solution.iterations;
    ++solution.sweeps;
    if (e <= target) break;
    stop = control.After(solution.iterations, solution.sweeps, e, g * e / (1.0 - g), "improve");
    if (stop) break;
    // The policy's rows copied out cost about one policy sweep and make the others cheaper.
    if (options.evaluation_sweeps > 1) policy.Assign(m, rows.data(), threads);
    for (int64_t k = 1; k < options.evaluation_sweeps; ++k) {
      policy.Apply(v.data(), u.data(), threads);
      v.swap(u);
      ++solution.sweeps;
    }
  }
  Finalize(m, v, options, solution);
  SetOutcome(stop, solution);
  solution.solve_seconds = control.elapsed_seconds();
  return solution;
}

}  // namespace mdp
