#include "solver/compare.h"

#include <algorithm>
#include <cmath>

namespace mdp {
namespace {

std::vector<std::string> OptimalNames(const Model& m, const Solution& s, StateId state) {
  std::vector<std::string> names;
  for (RowId r = m.row_begin(state); r < m.row_end(state); ++r) {
    if (s.optimal_row[r]) names.push_back(m.row_action_name(r));
  }
  return names;
}

std::vector<std::string> AvailableNames(const Model& m, StateId state) {
  std::vector<std::string> names;
  for (RowId r = m.row_begin(state); r < m.row_end(state); ++r) {
    names.push_back(m.row_action_name(r));
  }
  std::sort(names.begin(), names.end());
  return names;
}

StateComparison Describe(const Model& a, const Solution& sa, StateId in_a, const Model& b,
                         const Solution& sb, StateId in_b) {
  StateComparison c;
  c.state = a.state_name(in_a);
  c.value_a = sa.values[in_a];
  c.value_b = sb.values[in_b];
  c.optimal_a = OptimalNames(a, sa, in_a);
  c.optimal_b = OptimalNames(b, sb, in_b);
  if (sa.best_row[in_a] >= 0) c.pick_a = a.row_action_name(sa.best_row[in_a]);
  if (sb.best_row[in_b] >= 0) c.pick_b = b.row_action_name(sb.best_row[in_b]);
  return c;
}

bool SameSet(std::vector<std::string> x, std::vector<std::string> y) {
  std::sort(x.begin(), x.end());
  std::sort(y.begin(), y.end());
  return x == y;
}

double AbsDifference(const StateComparison& c) { return std::fabs(c.value_b - c.value_a); }

// Sort key: NaN (a value undefined on a side) sorts after every number.
double SortKey(const StateComparison& c) {
  const double d = AbsDifference(c);
  return std::isnan(d) ? -1.0 : d;
}

}  // namespace

ComparisonReport CompareSolutions(const Model& a, const Solution& sa, const Model& b,
                                  const Solution& sb, const CompareOptions& options) {
  ComparisonReport r;
  r.same_objective = a.objective() == b.objective();
  r.same_discount = a.discount() == b.discount();
  r.states_a = a.num_states();
  r.states_b = b.num_states();
  const Criterion& ca = a.criterion();
  const Criterion& cb = b.criterion();
  r.criterion_a = ca.kind;
  r.criterion_b = cb.kind;
  r.same_criterion = ca.kind == cb.kind && ca.horizon == cb.horizon &&
                     (ca.kind == CriterionKind::kAverage || ca.kind == CriterionKind::kTotal ||
                      ca.discount == cb.discount);
  r.value_margin = sa.value_error_bound + sb.value_error_bound + options.value_tolerance;
  r.values_comparable = ca.kind == cb.kind && ca.kind != CriterionKind::kAverage &&
                        std::isfinite(r.value_margin);
  std::vector<StateComparison> all_changes;
  double sum_abs = 0.0;
  int64_t defined = 0;  // Common states with a value on both sides.
  for (StateId s = 0; s < a.num_states(); ++s) {
    std::optional<StateId> t = b.FindState(a.state_name(s));
    if (!t) {
      if (r.only_in_a_count++ < options.max_listed) r.only_in_a.push_back(a.state_name(s));
      continue;
    }
    ++r.common_states;
    StateComparison c = Describe(a, sa, s, b, sb, *t);
    const double diff = AbsDifference(c);
    const bool undefined_a = std::isnan(c.value_a), undefined_b = std::isnan(c.value_b);
    if (!std::isnan(diff)) {
      sum_abs += diff;
      ++defined;
      r.max_abs_value_difference = std::max(r.max_abs_value_difference, diff);
    }
    if (r.values_comparable && (undefined_a != undefined_b || diff > r.value_margin)) {
      ++r.value_changed_count;
    }
    if (AvailableNames(a, s) != AvailableNames(b, *t)) ++r.actions_changed_count;
    if (c.pick_a != c.pick_b) ++r.pick_changed_count;
    const bool set_changed = !SameSet(c.optimal_a, c.optimal_b);
    if (set_changed) ++r.optimal_set_changed_count;
    if (set_changed) r.optimal_set_changes.push_back(c);
    all_changes.push_back(std::move(c));
  }
  for (StateId t = 0; t < b.num_states(); ++t) {
    if (a.FindState(b.state_name(t))) continue;
    if (r.only_in_b_count++ < options.max_listed) r.only_in_b.push_back(b.state_name(t));
  }
  if (defined > 0) r.mean_abs_value_difference = sum_abs / double(defined);
  auto larger = [](const StateComparison& x, const StateComparison& y) {
    return SortKey(x) > SortKey(y);
  };
  std::stable_sort(r.optimal_set_changes.begin(), r.optimal_set_changes.end(), larger);
  if (static_cast<int64_t>(r.optimal_set_changes.size()) > options.max_listed) {
    r.optimal_set_changes.resize(options.max_listed);
  }
  const size_t keep = std::min(all_changes.size(), static_cast<size_t>(std::max(options.top_k, 0)));
  std::partial_sort(all_changes.begin(), all_changes.begin() + keep, all_changes.end(), larger);
  all_changes.resize(keep);
  r.largest_value_changes = std::move(all_changes);
  return r;
}

}  // namespace mdp
