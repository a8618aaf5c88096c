// CompareSolutions: what changed between two solutions — of two revisions of one model, or
// of one model solved two ways. States and actions are matched by name, so revisions may add
// or drop states and actions. A pure function of its inputs; thread-safe; the caller owns the
// report.
//
// A value difference counts as a change only beyond the two solutions' combined error bound
// (value_error_bound of each) plus options.value_tolerance: smaller differences may be solve
// error, not a change in the model.
//
// Two criteria of one model (say discounted against average, or two horizons) are compared
// the same way for the decisions (optimal sets, picks); their values measure different
// things, so values_comparable is false and no value change is counted (the differences are
// still reported). Values are comparable only between solutions of the same criterion kind
// with finite error bounds (not average: a bias is fixed only up to a constant). A value that
// is undefined (total reward: a state that cannot reach a goal) on one side only counts as a
// value change; states undefined on both sides are left out of the differences.
#ifndef MDP_SOLVER_COMPARE_H_
#define MDP_SOLVER_COMPARE_H_

#include <cstdint>
#include <string>
#include <vector>

#include "solver/model.h"
#include "solver/solution.h"

namespace mdp {

struct CompareOptions {
  double value_tolerance = 1e-9;  // Added to the error margin before a difference counts.
  int64_t max_listed = 1000;      // Cap on each list of states in the report.
  int top_k = 10;                 // Largest value changes listed.
};

struct StateComparison {
  std::string state;
  double value_a = 0.0;
  double value_b = 0.0;
  std::vector<std::string> optimal_a;  // Optimal action sets, document order of each model.
  std::vector<std::string> optimal_b;
  std::string pick_a;  // Deterministic picks; empty for terminal states.
  std::string pick_b;
};

struct ComparisonReport {
  bool same_objective = true;
  bool same_discount = true;
  bool same_criterion = true;     // Same kind and parameters (discount, horizon, ...).
  CriterionKind criterion_a = CriterionKind::kDiscounted;
  CriterionKind criterion_b = CriterionKind::kDiscounted;
  bool values_comparable = true;  // See the header comment.
  int64_t states_a = 0, states_b = 0, common_states = 0;
  std::vector<std::string> only_in_a;  // At most max_listed; counts below are complete.
  std::vector<std::string> only_in_b;
  int64_t only_in_a_count = 0, only_in_b_count = 0;
  int64_t actions_changed_count = 0;  // Common states whose available actions differ.
  int64_t optimal_set_changed_count = 0;
  int64_t pick_changed_count = 0;
  int64_t value_changed_count = 0;     // |difference| above the margin.
  double value_margin = 0.0;           // a.value_error_bound + b.value_error_bound + tolerance.
  double max_abs_value_difference = 0.0;
  double mean_abs_value_difference = 0.0;
  std::vector<StateComparison> optimal_set_changes;  // Largest |value difference| first.
  std::vector<StateComparison> largest_value_changes;  // top_k, largest first.
};

ComparisonReport CompareSolutions(const Model& a, const Solution& solution_a, const Model& b,
                                  const Solution& solution_b, const CompareOptions& options);

}  // namespace mdp

#endif  // MDP_SOLVER_COMPARE_H_
