// Verification: how far is a candidate value function, or a candidate policy, from optimal?
// Pure functions of their inputs; thread-safe; results are values the caller owns.
//
// Candidate values V (discount g, e = sup_s |(T V)(s) - V(s)|, common practice / the
// g-contraction of T):
//   sup |V - V*|  <= e / (1 - g)
//   the greedy policy pi of V loses at most min(2 e / (1 - g), 2 g e / (1 - g)^2):
//   |V^pi - V| <= e / (1 - g) because T_pi V = T V, and |V* - V^pi| <= 2 g |V - V*| / (1 - g).
//   Verdict: pass iff e / (1 - g) <= tolerance.
// Candidate policy pi: V^pi by exact evaluation; loss(s) = V*(s) - V^pi(s) (maximize) or
//   V^pi(s) - V*(s) (minimize), against a reference Solution. Verdict: pass iff
//   max loss + evaluation_error_bound + optimal_value_error_bound <= tolerance, i.e. the
//   policy is certainly within tolerance of optimal.
#ifndef MDP_SOLVER_VERIFY_H_
#define MDP_SOLVER_VERIFY_H_

#include <span>
#include <vector>

#include "solver/evaluate.h"
#include "solver/model.h"
#include "solver/policy.h"
#include "solver/solution.h"
#include "solver/status.h"

namespace mdp {

struct VerifyOptions {
  double tolerance = 1e-6;  // Verdict threshold in reward units.
  int worst_k = 10;         // How many worst states to list.
  int64_t max_listed = 1000;  // Cap on listed suboptimal states.
};

struct StateResidual {
  StateId state = 0;
  double residual = 0.0;   // |(T V)(s) - V(s)|.
  double candidate = 0.0;  // V(s).
  double backup = 0.0;     // (T V)(s).
};

struct ValuesReport {
  bool pass = false;
  double tolerance = 0.0;
  double max_residual = 0.0;
  double value_error_bound = 0.0;
  double greedy_policy_loss_bound = 0.0;
  std::vector<StateResidual> worst;  // Largest residuals first.
  std::vector<double> residuals;     // Per state.
};

// REQUIRES: candidate.size() == m.num_states().
ValuesReport VerifyValues(const Model& m, std::span<const double> candidate,
                          const VerifyOptions& options);

struct StateLoss {
  StateId state = 0;
  double loss = 0.0;
  double value = 0.0;          // V^pi(s).
  double optimal_value = 0.0;  // V*(s) from the reference solution.
};

struct SuboptimalChoice {
  StateId state = 0;
  std::vector<RowId> chosen;   // Rows with positive probability outside the optimal set.
  std::vector<RowId> optimal;  // The state's optimal set.
};

struct PolicyReport {
  bool pass = false;
  double tolerance = 0.0;
  double max_loss = 0.0;
  double evaluation_error_bound = 0.0;
  double optimal_value_error_bound = 0.0;
  LinearSolver solver_used = LinearSolver::kDirect;
  std::vector<StateLoss> worst;               // Largest losses first.
  std::vector<SuboptimalChoice> suboptimal;   // At most options.max_listed.
  int64_t suboptimal_count = 0;               // All of them.
  std::vector<double> values;                 // V^pi.
  std::vector<double> losses;                 // Per state.
};

// Evaluates `policy` exactly and compares it with `optimal` (a solution of the same model).
Result<PolicyReport> VerifyPolicy(const Model& m, const Policy& policy, const Solution& optimal,
                                  const VerifyOptions& options,
                                  const EvaluateOptions& evaluate = {});

}  // namespace mdp

#endif  // MDP_SOLVER_VERIFY_H_
