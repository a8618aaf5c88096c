#include "solver/solver.h"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <limits>
#include <new>
#include <optional>
#include <string>

#include "solver/internal/bellman.h"
#include "solver/internal/renumber.h"
#include "solver/policy_iteration.h"
#include "solver/total_reward.h"
#include "solver/value_iteration.h"

namespace mdp {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

// Fills the per-state fields of a finite-horizon solution from `table` (V_t, t = 0..H) at
// s.stage.
void FillStage(const Model& m, const std::vector<double>& table, Solution& s);

Method ResolveMethod(CriterionKind kind, Method method) {
  if (method != Method::kAuto) return method;
  return kind == CriterionKind::kFiniteHorizon ? Method::kBackwardInduction
                                               : Method::kPolicyIteration;
}

bool Applies(CriterionKind kind, Method method) {
  switch (kind) {
    case CriterionKind::kDiscounted:
      return method == Method::kValueIteration || method == Method::kGaussSeidel ||
             method == Method::kPolicyIteration || method == Method::kModifiedPolicyIteration;
    case CriterionKind::kAverage:
      return method == Method::kRelativeValueIteration || method == Method::kPolicyIteration;
    case CriterionKind::kFiniteHorizon: return method == Method::kBackwardInduction;
    case CriterionKind::kTotal: return method == Method::kPolicyIteration;
  }
  return false;
}

std::string MethodsFor(CriterionKind kind) {
  switch (kind) {
    case CriterionKind::kDiscounted:
      return "value_iteration, gauss_seidel, policy_iteration or modified_policy_iteration";
    case CriterionKind::kAverage: return "relative_value_iteration or policy_iteration";
    case CriterionKind::kFiniteHorizon: return "backward_induction";
    case CriterionKind::kTotal: return "policy_iteration";
  }
  return "";
}

Result<Solution> SolveDiscounted(const Model& m, const SolveOptions& options,
                                 const ProgressFn* progress, const CancelToken* cancel) {
  switch (options.method) {
    case Method::kValueIteration: return ValueIteration(m, options, progress, cancel);
    case Method::kGaussSeidel: return GaussSeidelValueIteration(m, options, progress, cancel);
    case Method::kModifiedPolicyIteration:
      return ModifiedPolicyIteration(m, options, progress, cancel);
    default: return PolicyIteration(m, options, progress, cancel);
  }
}

// SolveDiscounted on a copy of `m` with its states renumbered for locality when
// options.renumber and the rule of internal/renumber.h say so, the answer mapped back to m's
// numbering. The copy is freed before returning. Deciding and copying count in solve_seconds
// and against the time limit. Only this criterion renumbers: the others report state lists
// (recurrent classes, reference states, notes) whose order follows the numbering.
Result<Solution> SolveDiscountedRenumbered(const Model& m, SolveOptions options,
                                           const ProgressFn* progress,
                                           const CancelToken* cancel) {
  const auto start = std::chrono::steady_clock::now();
  std::optional<internal::RenumberedModel> r;
  try {
    r = internal::RenumberForLocality(m, options.renumber, options.threads);
  } catch (const std::bad_alloc&) {
    r.reset();  // The copy is an optimisation: without memory for it, solve m as it is.
  }
  const double spent =
      std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  options.renumber = r ? Renumber::kOn : Renumber::kOff;
  SolveOptions inner = options;
  if (inner.time_limit_seconds > 0) {
    inner.time_limit_seconds = std::max(1e-9, inner.time_limit_seconds - spent);
  }
  Result<Solution> s = SolveDiscounted(r ? r->model : m, inner, progress, cancel);
  if (!s.ok()) return s;
  if (r) internal::MapSolutionBack(m, *r, *s);
  s->options = options;
  s->solve_seconds += spent;
  return s;
}

// `automatic`: the caller asked for Method::kAuto (AverageRewardAutomatic); the solution's
// method, and its options' method, then say which method answered.
Result<Solution> SolveAverage(const Model& m, const SolveOptions& options, bool automatic,
                              const ProgressFn* progress, const CancelToken* cancel) {
  AverageRewardOptions o;
  o.tolerance = options.tolerance;
  o.max_iterations = options.max_iterations;
  o.time_limit_seconds = options.time_limit_seconds;
  o.tie_tolerance = options.tie_tolerance;
  o.threads = options.threads;
  Result<AverageRewardSolution> r =
      automatic ? AverageRewardAutomatic(m, o, progress, cancel)
      : options.method == Method::kRelativeValueIteration
          ? RelativeValueIteration(m, o, progress, cancel)
          : AverageRewardPolicyIteration(m, o, progress, cancel);
  if (!r.ok()) return r.status();
  AverageRewardSolution& a = *r;
  Solution s;
  s.criterion = CriterionKind::kAverage;
  s.method = a.method == AverageRewardMethod::kRelativeValueIteration
                 ? Method::kRelativeValueIteration
                 : Method::kPolicyIteration;
  s.options = options;
  s.options.method = s.method;
  s.outcome = a.outcome;
  s.iterations = a.iterations;
  s.sweeps = a.sweeps;
  s.solve_seconds = a.solve_seconds;
  // With one gain everywhere the bracket's width measures convergence; with gains that
  // differ between states it is their spread, and the optimality residual is the measure.
  s.residual = a.multichain_gain ? a.optimality_residual : a.gain_upper - a.gain_lower;
  s.value_error_bound = kNaN;
  s.q_error_bound = kNaN;
  s.policy_loss_bound = a.policy_loss_bound;
  s.tie_tolerance = a.tie_tolerance;
  s.average.gain = a.gain;
  s.average.gain_lower = a.gain_lower;
  s.average.gain_upper = a.gain_upper;
  s.average.reference_state = a.reference_state;
  s.average.multichain = a.multichain_suspected;
  s.average.recurrent_classes = std::move(a.recurrent_classes);
  s.average.note = std::move(a.chain_structure_note);
  // Per-state gains are kept only when they differ; otherwise `gain` is every state's.
  if (a.multichain_gain) s.average.state_gain = std::move(a.state_gain);
  s.q = std::move(a.q);
  for (StateId st = 0; st < m.num_states(); ++st) {
    const double g = s.average.state_gain.empty() ? a.gain : s.average.state_gain[st];
    for (RowId row = m.row_begin(st); row < m.row_end(st); ++row) s.q[row] -= g;
  }
  s.values = std::move(a.bias);
  s.best_row = std::move(a.best_row);
  s.optimal_row = std::move(a.optimal_row);
  s.action_gap = std::move(a.action_gap);
  s.tied_states = a.tied_states;
  return s;
}

Result<Solution> SolveFiniteHorizon(const Model& m, const SolveOptions& options,
                                    const ProgressFn* progress, const CancelToken* cancel) {
  const Criterion& c = m.criterion();
  FiniteHorizonOptions o;
  o.horizon = c.horizon;
  o.discount = c.discount;
  o.terminal_values = c.terminal_values;
  o.tie_tolerance = options.tie_tolerance;
  o.threads = options.threads;
  o.max_table_entries = kMaxStageTableEntries;
  Result<FiniteHorizonSolution> r = BackwardInduction(m, o, progress, cancel);
  if (!r.ok()) return r.status();
  Solution s;
  s.criterion = CriterionKind::kFiniteHorizon;
  s.method = Method::kBackwardInduction;
  s.options = options;
  s.outcome = r->cancelled ? SolveOutcome::kCancelled : SolveOutcome::kConverged;
  s.iterations = r->horizon;
  s.sweeps = r->horizon + 1;
  s.solve_seconds = r->seconds;
  s.tie_tolerance = options.tie_tolerance;
  s.horizon = r->horizon;
  s.stage_values = std::move(r->stage_values);
  FillStage(m, s.stage_values, s);
  if (r->cancelled) {
    // Stages not reached hold 0: no bound can be claimed for them.
    s.value_error_bound = s.q_error_bound = s.policy_loss_bound = kNaN;
  }
  return s;
}

Result<Solution> SolveTotal(const Model& m, const SolveOptions& options,
                            const ProgressFn* progress, const CancelToken* cancel) {
  TotalRewardOptions o;
  o.tolerance = options.tolerance;
  o.max_iterations = options.max_iterations;
  o.time_limit_seconds = options.time_limit_seconds;
  o.tie_tolerance = options.tie_tolerance;
  o.linear_solver = options.linear_solver;
  o.threads = options.threads;
  Result<TotalRewardSolution> r = TotalRewardPolicyIteration(m, o, progress, cancel);
  if (!r.ok()) return r.status();
  TotalRewardSolution& t = *r;
  Solution s;
  s.criterion = CriterionKind::kTotal;
  s.method = Method::kPolicyIteration;
  s.options = options;
  s.outcome = t.outcome;
  s.iterations = t.iterations;
  s.sweeps = t.sweeps;
  s.solve_seconds = t.solve_seconds;
  s.residual = t.residual;
  s.value_error_bound = t.value_error_bound;
  s.q_error_bound = t.value_error_bound;
  s.policy_loss_bound = t.policy_loss_bound;
  s.tie_tolerance = t.tie_tolerance;
  s.values = std::move(t.values);
  s.q = std::move(t.q);
  s.best_row = std::move(t.best_row);
  s.optimal_row = std::move(t.optimal_row);
  s.action_gap = std::move(t.action_gap);
  s.tied_states = t.tied_states;
  s.total.reaches_goal = std::move(t.reaches_goal);
  s.total.expected_steps = std::move(t.expected_steps);
  s.total.states_not_reaching_goal = t.states_not_reaching_goal;
  s.total.max_expected_steps = t.max_expected_steps;
  return s;
}


void FillStage(const Model& m, const std::vector<double>& table, Solution& s) {
  const StateId n = m.num_states();
  const auto here = table.begin() + s.stage * n;
  s.values.assign(here, here + n);
  s.q.assign(m.num_rows(), 0.0);
  s.best_row.assign(n, -1);
  s.optimal_row.assign(m.num_rows(), 0);
  s.action_gap.assign(n, kNaN);
  s.tied_states = 0;
  const double* next = table.data() + (s.stage + 1) * n;
  const double discount = m.criterion().discount;
  for (StateId st = 0; st < n; ++st) {
    StageDecision d = DecideFromNextStage(m, next, discount, st, s.options.tie_tolerance);
    const RowId begin = m.row_begin(st);
    int64_t optimal = 0;
    for (size_t i = 0; i < d.q.size(); ++i) {
      s.q[begin + i] = d.q[i];
      s.optimal_row[begin + i] = d.optimal[i];
      optimal += d.optimal[i];
    }
    s.best_row[st] = d.pick;
    s.action_gap[st] = d.action_gap;
    if (optimal >= 2) ++s.tied_states;
  }
  s.residual = s.value_error_bound = s.q_error_bound = 0.0;
  s.policy_loss_bound = s.options.tie_tolerance *
                        static_cast<double>(std::max<int64_t>(1, s.horizon - s.stage));
}

}  // namespace

Status CheckMethod(CriterionKind kind, Method method) {
  method = ResolveMethod(kind, method);
  if (Applies(kind, method)) return Status::Ok();
  return InvalidArgumentError("method '" + std::string(MethodName(method)) +
                              "' does not apply to the " + std::string(CriterionKindName(kind)) +
                              " criterion; use " + MethodsFor(kind));
}

Solution SolutionAtStage(const Model& m, const Solution& solution, int64_t stage) {
  Solution out;
  out.criterion = solution.criterion;
  out.method = solution.method;
  out.options = solution.options;
  out.outcome = solution.outcome;
  out.iterations = solution.iterations;
  out.sweeps = solution.sweeps;
  out.solve_seconds = solution.solve_seconds;
  out.tie_tolerance = solution.tie_tolerance;
  out.horizon = solution.horizon;
  out.stage = stage;
  FillStage(m, solution.stage_values, out);
  return out;
}

StageDecision DecideAtStage(const Model& m, const Solution& s, int64_t stage, StateId st) {
  return DecideFromNextStage(m, s.stage_values.data() + (stage + 1) * m.num_states(),
                             m.criterion().discount, st, s.options.tie_tolerance);
}

Result<Solution> Solve(const Model& m, const SolveOptions& requested, const ProgressFn* progress,
                       const CancelToken* cancel) {
  MDP_RETURN_IF_ERROR(CheckSolveOptions(requested));
  const CriterionKind kind = m.criterion().kind;
  SolveOptions options = requested;
  options.method = ResolveMethod(kind, requested.method);
  if (options.threads == 0) {
    options.threads = m.num_entries() >= kAutoThreadsMinEntries ? internal::ThreadCount(0) : 1;
  }
  MDP_RETURN_IF_ERROR(CheckMethod(kind, options.method));
  if (kind != CriterionKind::kDiscounted) options.renumber = Renumber::kOff;
  // The one place where allocation failure inside the solver becomes a Status.
  try {
    switch (kind) {
      case CriterionKind::kDiscounted:
        return SolveDiscountedRenumbered(m, options, progress, cancel);
      case CriterionKind::kAverage:
        return SolveAverage(m, options, requested.method == Method::kAuto, progress, cancel);
      case CriterionKind::kFiniteHorizon:
        return SolveFiniteHorizon(m, options, progress, cancel);
      case CriterionKind::kTotal: return SolveTotal(m, options, progress, cancel);
    }
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory while solving");
  }
  return InvalidArgumentError("unknown criterion");
}

}  // namespace mdp
