#include "solver/verify.h"

#include <algorithm>
#include <cmath>

#include "solver/internal/bellman.h"

namespace mdp {
namespace {

template <typename T, typename Key>
std::vector<T> Worst(std::vector<T> items, int k, Key key) {
  const size_t keep = std::min(items.size(), static_cast<size_t>(std::max(k, 0)));
  std::partial_sort(items.begin(), items.begin() + keep, items.end(),
                    [&](const T& a, const T& b) { return key(a) > key(b); });
  items.resize(keep);
  return items;
}

}  // namespace

ValuesReport VerifyValues(const Model& m, std::span<const double> candidate,
                          const VerifyOptions& options) {
  const double g = m.discount();
  ValuesReport report;
  report.tolerance = options.tolerance;
  std::vector<double> backup(m.num_states());
  report.max_residual = internal::SyncSweep(m, candidate.data(), backup.data(), 1);
  report.residuals.resize(m.num_states());
  std::vector<StateResidual> all(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) {
    report.residuals[s] = std::fabs(backup[s] - candidate[s]);
    all[s] = StateResidual{s, report.residuals[s], candidate[s], backup[s]};
  }
  const double e = report.max_residual;
  report.value_error_bound = e / (1.0 - g);
  report.greedy_policy_loss_bound =
      std::min(2.0 * e / (1.0 - g), 2.0 * g * e / ((1.0 - g) * (1.0 - g)));
  report.pass = report.value_error_bound <= options.tolerance;
  report.worst = Worst(std::move(all), options.worst_k,
                       [](const StateResidual& r) { return r.residual; });
  return report;
}

Result<PolicyReport> VerifyPolicy(const Model& m, const Policy& policy, const Solution& optimal,
                                  const VerifyOptions& options, const EvaluateOptions& evaluate) {
  Result<PolicyValues> evaluated = EvaluatePolicy(m, policy, evaluate);
  if (!evaluated.ok()) return evaluated.status();
  const bool maximize = m.objective() == Objective::kMaximize;
  PolicyReport report;
  report.tolerance = options.tolerance;
  report.evaluation_error_bound = evaluated->value_error_bound;
  report.optimal_value_error_bound = optimal.value_error_bound;
  report.solver_used = evaluated->solver_used;
  report.values = std::move(evaluated->values);
  report.losses.resize(m.num_states());
  std::vector<StateLoss> all(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) {
    const double diff = optimal.values[s] - report.values[s];
    report.losses[s] = maximize ? diff : -diff;
    all[s] = StateLoss{s, report.losses[s], report.values[s], optimal.values[s]};
    report.max_loss = std::max(report.max_loss, report.losses[s]);
    SuboptimalChoice choice{s, {}, {}};
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      if (optimal.optimal_row[r]) choice.optimal.push_back(r);
      if (policy.row_probability[r] > 0.0 && !optimal.optimal_row[r]) choice.chosen.push_back(r);
    }
    if (!choice.chosen.empty()) {
      ++report.suboptimal_count;
      if (static_cast<int64_t>(report.suboptimal.size()) < options.max_listed) {
        report.suboptimal.push_back(std::move(choice));
      }
    }
  }
  report.pass = report.max_loss + report.evaluation_error_bound +
                    report.optimal_value_error_bound <= options.tolerance;
  report.worst = Worst(std::move(all), options.worst_k, [](const StateLoss& l) { return l.loss; });
  return report;
}

}  // namespace mdp
