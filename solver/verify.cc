#include "solver/verify.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <string>

#include "solver/criterion_eval.h"
#include "solver/internal/bellman.h"

namespace mdp {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
constexpr double kInf = std::numeric_limits<double>::infinity();

template <typename T, typename Key>
std::vector<T> Worst(std::vector<T> items, int k, Key key) {
  const size_t keep = std::min(items.size(), static_cast<size_t>(std::max(k, 0)));
  std::partial_sort(items.begin(), items.begin() + keep, items.end(),
                    [&](const T& a, const T& b) { return key(a) > key(b); });
  items.resize(keep);
  return items;
}

// Fills residuals and worst from per-state (residual, backup); NaN residuals are not listed.
void ListResiduals(std::span<const double> candidate, const std::vector<double>& residual,
                   const std::vector<double>& backup, const VerifyOptions& options,
                   ValuesReport& report) {
  std::vector<StateResidual> all;
  for (size_t s = 0; s < residual.size(); ++s) {
    if (std::isnan(residual[s])) continue;
    all.push_back(StateResidual{static_cast<StateId>(s), residual[s], candidate[s], backup[s]});
  }
  report.residuals = residual;
  report.worst = Worst(std::move(all), options.worst_k,
                       [](const StateResidual& r) { return r.residual; });
}

bool Better(const Model& m, double a, double b) {
  return m.objective() == Objective::kMaximize ? a > b : a < b;
}

ValuesReport DiscountedValues(const Model& m, std::span<const double> candidate,
                              const VerifyOptions& options) {
  const double g = m.discount();
  ValuesReport report;
  report.tolerance = options.tolerance;
  std::vector<double> backup(m.num_states());
  report.max_residual = internal::SyncSweep(m, candidate.data(), backup.data(), 1);
  std::vector<double> residual(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) residual[s] = std::fabs(backup[s] - candidate[s]);
  // The residual as computed, widened by the rounding of the backup (bellman.h), so that
  // the bounds hold for the computed numbers.
  const double e = report.max_residual +
                   2.0 * internal::BackupRoundingAllowance(m, candidate.data(), backup.data());
  report.value_error_bound = e / (1.0 - g);
  report.greedy_policy_loss_bound =
      std::min(2.0 * e / (1.0 - g), 2.0 * g * e / ((1.0 - g) * (1.0 - g)));
  report.pass = report.value_error_bound <= options.tolerance;
  ListResiduals(candidate, residual, backup, options, report);
  return report;
}

// Finite horizon: the candidate against the exact stage-0 values `optimal`.
ValuesReport StageZeroValues(const Model& m, std::span<const double> candidate,
                             const std::vector<double>& optimal, double reference_bound,
                             const VerifyOptions& options) {
  ValuesReport report;
  report.criterion = CriterionKind::kFiniteHorizon;
  report.tolerance = options.tolerance;
  std::vector<double> residual(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) {
    residual[s] = std::fabs(candidate[s] - optimal[s]);
    report.max_residual = std::max(report.max_residual, residual[s]);
  }
  report.reference_distance = report.max_residual;
  report.reference_error_bound = reference_bound;
  report.value_error_bound = report.reference_distance + reference_bound;
  report.greedy_policy_loss_bound = kNaN;
  report.pass = report.value_error_bound <= options.tolerance;
  ListResiduals(candidate, residual, optimal, options, report);
  return report;
}

// V*_0 by backward induction with two value vectors (finite_horizon.h; m.discount() is the
// criterion's discount, which RowQ uses). Terminal states back up to 0.
std::vector<double> BackwardInductionStageZero(const Model& m) {
  const Criterion& c = m.criterion();
  std::vector<double> v(m.num_states(), 0.0), next(m.num_states());
  if (c.terminal_values.size() == v.size()) v = c.terminal_values;
  const bool maximize = m.objective() == Objective::kMaximize;
  for (int64_t t = c.horizon - 1; t >= 0; --t) {
    for (StateId s = 0; s < m.num_states(); ++s) {
      next[s] = maximize ? internal::BackupState<true>(m, s, v.data(), nullptr)
                         : internal::BackupState<false>(m, s, v.data(), nullptr);
    }
    v.swap(next);
  }
  return v;
}

ValuesReport AverageValues(const Model& m, std::span<const double> h,
                           const VerifyOptions& options) {
  ValuesReport report;
  report.criterion = CriterionKind::kAverage;
  report.tolerance = options.tolerance;
  const StateId n = m.num_states();
  std::vector<double> backup(n), d(n, 0.0);
  report.gain_lower = kInf;
  report.gain_upper = -kInf;
  for (StateId s = 0; s < n; ++s) {
    backup[s] = h[s];  // A terminal state's self-loop with reward 0: d = 0.
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      const double q = m.row_reward(r) + internal::RowSum(m, r, h.data());
      if (r == m.row_begin(s) || Better(m, q, backup[s])) backup[s] = q;
    }
    d[s] = backup[s] - h[s];
    report.gain_lower = std::min(report.gain_lower, d[s]);
    report.gain_upper = std::max(report.gain_upper, d[s]);
  }
  if (n == 0) report.gain_lower = report.gain_upper = 0.0;
  const double mid = 0.5 * (report.gain_lower + report.gain_upper);
  std::vector<double> residual(n);
  for (StateId s = 0; s < n; ++s) residual[s] = std::fabs(d[s] - mid);
  const double width = report.gain_upper - report.gain_lower;
  report.max_residual = 0.5 * width;
  report.value_error_bound = kNaN;
  report.greedy_policy_loss_bound = width;
  report.pass = width <= options.tolerance;
  ListResiduals(h, residual, backup, options, report);
  return report;
}

// The states from which some policy reaches a goal w.p. 1: the largest set A in which every
// state can reach a goal through rows whose next states all lie in A (common practice:
// remove the states that cannot, recompute the rows that stay, repeat until stable).
std::vector<uint8_t> GoalReachingStates(const Model& m) {
  const StateId n = m.num_states();
  std::vector<std::vector<RowId>> into(n);  // Rows with an entry for each state.
  for (StateId s = 0; s < n; ++s) {
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        if (m.entry_probability(e) > 0.0) into[m.entry_next(e)].push_back(r);
      }
    }
  }
  std::vector<StateId> row_state(m.num_rows());
  for (StateId s = 0; s < n; ++s) {
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) row_state[r] = s;
  }
  std::vector<uint8_t> in(n, 1);
  for (bool changed = true; changed;) {
    std::vector<uint8_t> reached(n, 0);
    std::vector<StateId> queue;
    for (StateId s = 0; s < n; ++s) {
      if (m.terminal(s)) reached[s] = 1, queue.push_back(s);
    }
    for (size_t i = 0; i < queue.size(); ++i) {
      for (RowId r : into[queue[i]]) {
        const StateId s = row_state[r];
        if (reached[s] || !in[s]) continue;
        bool stays = true;
        for (int64_t e = m.entry_begin(r); e < m.entry_end(r) && stays; ++e) {
          stays = m.entry_probability(e) <= 0.0 || in[m.entry_next(e)];
        }
        if (stays) reached[s] = 1, queue.push_back(s);
      }
    }
    changed = reached != in;
    in = std::move(reached);
  }
  return in;
}

// Total criterion: residuals over `reaches` with safe rows; compared with `reference` if given.
constexpr double kInfinity = std::numeric_limits<double>::infinity();

ValuesReport TotalValues(const Model& m, std::span<const double> v,
                         const std::vector<uint8_t>& reaches, const Solution* reference,
                         const VerifyOptions& options) {
  ValuesReport report;
  report.criterion = CriterionKind::kTotal;
  report.tolerance = options.tolerance;
  const StateId n = m.num_states();
  std::vector<double> backup(n, kNaN), residual(n, kNaN);
  double distance = 0.0;
  for (StateId s = 0; s < n; ++s) {
    if (!reaches[s]) {
      ++report.states_not_reaching_goal;
      continue;
    }
    if (m.terminal(s)) backup[s] = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      bool safe = true;
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r) && safe; ++e) {
        safe = m.entry_probability(e) <= 0.0 || reaches[m.entry_next(e)];
      }
      if (!safe) continue;
      const double q = m.row_reward(r) + internal::RowSum(m, r, v.data());
      if (std::isnan(backup[s]) || Better(m, q, backup[s])) backup[s] = q;
    }
    if (std::isnan(v[s])) {
      // No value (null) where a goal is reachable: as far from V* as can be. std::max would
      // drop a NaN, so the state is counted as infinitely wrong explicitly.
      residual[s] = kInfinity;
      report.max_residual = kInfinity;
      distance = kInfinity;
      continue;
    }
    residual[s] = std::fabs(backup[s] - v[s]);
    report.max_residual = std::max(report.max_residual, residual[s]);
    if (reference != nullptr) distance = std::max(distance, std::fabs(v[s] - reference->values[s]));
  }
  report.greedy_policy_loss_bound = kNaN;
  report.value_error_bound = kNaN;
  if (reference != nullptr) {
    report.reference_distance = distance;
    report.reference_error_bound = reference->value_error_bound;
    report.value_error_bound = distance + reference->value_error_bound;
  }
  report.pass = report.value_error_bound <= options.tolerance;
  ListResiduals(v, residual, backup, options, report);
  return report;
}

// OK iff `reference` is a Solution of the model's criterion with one value per state.
Status CheckReference(const Model& m, const Solution& reference) {
  if (reference.criterion != m.criterion().kind) {
    return InvalidArgumentError("the reference solution answers the " +
                                std::string(CriterionKindName(reference.criterion)) +
                                " criterion, the model asks for " +
                                std::string(CriterionKindName(m.criterion().kind)));
  }
  if (reference.values.size() != static_cast<size_t>(m.num_states())) {
    return InvalidArgumentError("the reference solution does not match the model's states");
  }
  return Status::Ok();
}

// Finite horizon: the reference's stage-0 values (exact).
Result<std::vector<double>> ReferenceStageZero(const Model& m, const Solution& reference) {
  const size_t n = static_cast<size_t>(m.num_states());
  if (reference.stage_values.size() >= n &&
      reference.stage_values.size() == static_cast<size_t>(reference.horizon + 1) * n) {
    return std::vector<double>(reference.stage_values.begin(), reference.stage_values.begin() + n);
  }
  if (reference.stage == 0) return reference.values;
  return InvalidArgumentError("the reference solution holds stage " +
                              std::to_string(reference.stage) + " only, not stage 0");
}

// Per state 1 iff the reference reaches a goal w.p. 1 there.
std::vector<uint8_t> ReferenceReaches(const Model& m, const Solution& reference) {
  if (reference.total.reaches_goal.size() == static_cast<size_t>(m.num_states())) {
    return reference.total.reaches_goal;
  }
  std::vector<uint8_t> reaches(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) reaches[s] = std::isfinite(reference.values[s]);
  return reaches;
}

// Average: the reference's optimal gain per state (0 at terminal states, where every policy
// earns 0) and the bound on its error (header comment).
double ReferenceGains(const Model& m, const Solution& reference, std::vector<double>& gains) {
  const Solution::AverageReport& a = reference.average;
  const bool per_state = a.state_gain.size() == static_cast<size_t>(m.num_states());
  bool one_gain = true;
  gains.assign(m.num_states(), a.gain);
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (m.terminal(s)) {
      gains[s] = 0.0;
      continue;
    }
    if (per_state) gains[s] = a.state_gain[s];
    one_gain = one_gain && gains[s] == a.gain;
  }
  if (one_gain) return 0.5 * (a.gain_upper - a.gain_lower);
  return reference.outcome == SolveOutcome::kConverged ? reference.options.tolerance : kNaN;
}

// The reference's optimum per state in `best` (values; kFiniteHorizon: stage 0; kAverage: the
// optimal gains) and its error bound.
Result<double> ReferenceOptimum(const Model& m, const Solution& reference,
                                std::vector<double>& best) {
  switch (m.criterion().kind) {
    case CriterionKind::kFiniteHorizon: {
      Result<std::vector<double>> stage_zero = ReferenceStageZero(m, reference);
      if (!stage_zero.ok()) return stage_zero.status();
      best = std::move(*stage_zero);
      return reference.value_error_bound;
    }
    case CriterionKind::kAverage: return ReferenceGains(m, reference, best);
    default:
      best = reference.values;
      return reference.value_error_bound;
  }
}

// Adds state s to report.suboptimal if the policy gives weight to rows outside its optimal set.
void ListSuboptimal(const Model& m, const Policy& policy, const Solution& optimal, StateId s,
                    const VerifyOptions& options, PolicyReport& report) {
  SuboptimalChoice choice{s, {}, {}};
  for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
    if (optimal.optimal_row[r]) choice.optimal.push_back(r);
    if (policy.row_probability[r] > 0.0 && !optimal.optimal_row[r]) choice.chosen.push_back(r);
  }
  if (choice.chosen.empty()) return;
  ++report.suboptimal_count;
  if (static_cast<int64_t>(report.suboptimal.size()) < options.max_listed) {
    report.suboptimal.push_back(std::move(choice));
  }
}

}  // namespace

ValuesReport VerifyValues(const Model& m, std::span<const double> candidate,
                          const VerifyOptions& options) {
  switch (m.criterion().kind) {
    case CriterionKind::kDiscounted: return DiscountedValues(m, candidate, options);
    case CriterionKind::kAverage: return AverageValues(m, candidate, options);
    case CriterionKind::kFiniteHorizon:
      return StageZeroValues(m, candidate, BackwardInductionStageZero(m), 0.0, options);
    case CriterionKind::kTotal:
      return TotalValues(m, candidate, GoalReachingStates(m), nullptr, options);
  }
  return DiscountedValues(m, candidate, options);
}

Result<ValuesReport> VerifyValues(const Model& m, std::span<const double> candidate,
                                  const Solution& reference, const VerifyOptions& options) {
  if (candidate.size() != static_cast<size_t>(m.num_states())) {
    return InvalidArgumentError("the candidate values do not match the model's states");
  }
  MDP_RETURN_IF_ERROR(CheckReference(m, reference));
  switch (m.criterion().kind) {
    case CriterionKind::kFiniteHorizon: {
      Result<std::vector<double>> optimal = ReferenceStageZero(m, reference);
      if (!optimal.ok()) return optimal.status();
      return StageZeroValues(m, candidate, *optimal, reference.value_error_bound, options);
    }
    case CriterionKind::kTotal:
      return TotalValues(m, candidate, ReferenceReaches(m, reference), &reference, options);
    default: return VerifyValues(m, candidate, options);
  }
}

Result<PolicyReport> VerifyPolicy(const Model& m, const Policy& policy, const Solution& optimal,
                                  const VerifyOptions& options, const EvaluateOptions& evaluate) {
  MDP_RETURN_IF_ERROR(CheckReference(m, optimal));
  if (optimal.optimal_row.size() != static_cast<size_t>(m.num_rows())) {
    return InvalidArgumentError("the reference solution does not match the model's actions");
  }
  const CriterionKind kind = m.criterion().kind;
  PolicyReport report;
  report.criterion = kind;
  report.tolerance = options.tolerance;
  std::vector<double> best;  // V* per state (kAverage: g*).
  Result<double> bound = ReferenceOptimum(m, optimal, best);
  if (!bound.ok()) return bound.status();
  report.optimal_value_error_bound = *bound;
  Result<CriterionValues> evaluated = EvaluateUnderCriterion(m, policy, evaluate);
  if (!evaluated.ok()) return evaluated.status();
  CriterionValues& ev = *evaluated;
  report.solver_used = ev.solver_used;
  report.evaluation_error_bound =
      kind == CriterionKind::kAverage ? ev.gain_error_bound : ev.value_error_bound;
  report.values = kind == CriterionKind::kAverage ? std::move(ev.gains) : std::move(ev.values);
  const std::vector<uint8_t> reaches =
      kind == CriterionKind::kTotal ? ReferenceReaches(m, optimal) : std::vector<uint8_t>();
  const bool maximize = m.objective() == Objective::kMaximize;
  report.losses.resize(m.num_states());
  std::vector<StateLoss> all(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) {
    const bool counted = kind != CriterionKind::kTotal || reaches[s];
    double loss = 0.0;
    if (counted && kind == CriterionKind::kTotal && !ev.proper[s]) {
      loss = kInf;
      if (static_cast<int64_t>(report.improper_states.size()) < options.max_listed) {
        report.improper_states.push_back(s);
      }
      ++report.improper_count;
    } else if (counted) {
      loss = maximize ? best[s] - report.values[s] : report.values[s] - best[s];
    }
    report.losses[s] = loss;
    all[s] = StateLoss{s, loss, report.values[s], best[s]};
    report.max_loss = std::max(report.max_loss, loss);
    if (counted) ListSuboptimal(m, policy, optimal, s, options, report);
  }
  report.pass = report.max_loss + report.evaluation_error_bound +
                    report.optimal_value_error_bound <= options.tolerance;
  report.worst = Worst(std::move(all), options.worst_k, [](const StateLoss& l) { return l.loss; });
  return report;
}

}  // namespace mdp
