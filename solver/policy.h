// Policy: a (possibly stochastic) stationary policy over a Model, stored as the probability
// of each row (state action). A deterministic policy puts probability 1 on one row of each
// non-terminal state. Plain value; the caller owns it.
#ifndef MDP_SOLVER_POLICY_H_
#define MDP_SOLVER_POLICY_H_

#include <span>
#include <vector>

#include "solver/model.h"
#include "solver/solution.h"
#include "solver/status.h"

namespace mdp {

struct Policy {
  std::vector<double> row_probability;  // Size model.num_rows().
};

// Tolerance on |sum of a state's row probabilities - 1|.
inline constexpr double kPolicySumTolerance = 1e-6;

// One chosen row per state (-1 for terminal states). REQUIRES: rows[s] within state s.
Policy DeterministicPolicy(const Model& m, std::span<const RowId> rows);
// The solution's deterministic picks (best_row).
Policy GreedyPolicy(const Model& m, const Solution& solution);
// Uniform over each state's optimal set.
Policy UniformOptimalPolicy(const Model& m, const Solution& solution);

// OK iff the policy has one entry per row, probabilities are finite and in [0, 1], and each
// non-terminal state's probabilities sum to 1 within kPolicySumTolerance; otherwise
// kInvalidArgument naming the state.
Status CheckPolicy(const Model& m, const Policy& policy);

}  // namespace mdp

#endif  // MDP_SOLVER_POLICY_H_
