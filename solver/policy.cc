#include "solver/policy.h"

#include <cmath>
#include <string>

namespace mdp {

Policy DeterministicPolicy(const Model& m, std::span<const RowId> rows) {
  Policy policy;
  policy.row_probability.assign(m.num_rows(), 0.0);
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (rows[s] >= 0) policy.row_probability[rows[s]] = 1.0;
  }
  return policy;
}

Policy GreedyPolicy(const Model& m, const Solution& solution) {
  return DeterministicPolicy(m, solution.best_row);
}

Policy UniformOptimalPolicy(const Model& m, const Solution& solution) {
  Policy policy;
  policy.row_probability.assign(m.num_rows(), 0.0);
  for (StateId s = 0; s < m.num_states(); ++s) {
    const int64_t count = solution.OptimalCount(m, s);
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      if (solution.optimal_row[r]) policy.row_probability[r] = 1.0 / static_cast<double>(count);
    }
  }
  return policy;
}

Status CheckPolicy(const Model& m, const Policy& policy) {
  if (static_cast<RowId>(policy.row_probability.size()) != m.num_rows()) {
    return InvalidArgumentError("policy does not match the model's state actions");
  }
  for (StateId s = 0; s < m.num_states(); ++s) {
    double sum = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      const double p = policy.row_probability[r];
      if (!std::isfinite(p) || p < 0.0 || p > 1.0) {
        return InvalidArgumentError("state '" + m.state_name(s) + "': probability of action '" +
                                    m.row_action_name(r) + "' must be in [0, 1]");
      }
      sum += p;
    }
    if (!m.terminal(s) && std::fabs(sum - 1.0) > kPolicySumTolerance) {
      return InvalidArgumentError("state '" + m.state_name(s) +
                                  "': action probabilities sum to " + std::to_string(sum) +
                                  ", not 1");
    }
  }
  return Status::Ok();
}

}  // namespace mdp
