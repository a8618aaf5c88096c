#include "solver/policy_iteration.h"

#include <algorithm>
#include <cmath>
#include <vector>

#include "solver/evaluate.h"
#include "solver/internal/bellman.h"
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

}  // namespace

Result<Solution> PolicyIteration(const Model& m, const SolveOptions& options,
                                 const ProgressFn* progress, const CancelToken* cancel) {
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
    for (int64_t k = 1; k < options.evaluation_sweeps; ++k) {
      internal::PolicySweep(m, rows.data(), v.data(), u.data(), threads);
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
