// Verification: how far is a candidate value function, or a candidate policy, from optimal
// under the model's criterion (model_spec.h Criterion)? Pure functions of their inputs;
// thread-safe; results are values the caller owns. Reports carry `criterion`, and their
// fields read per criterion as below; a field that does not apply is NaN.
//
// Candidate values V.
//  - kDiscounted (discount g, e = sup_s |(T V)(s) - V(s)|, common practice / the
//    g-contraction of T): sup |V - V*| <= e / (1 - g); the greedy policy pi of V loses at
//    most min(2 e / (1 - g), 2 g e / (1 - g)^2): |V^pi - V| <= e / (1 - g) because
//    T_pi V = T V, and |V* - V^pi| <= 2 g |V - V*| / (1 - g). Pass iff e / (1 - g) <= tolerance.
//    In the bounds, e is the computed residual plus twice the rounding allowance of the
//    backup (internal::BackupRoundingAllowance), so that they hold for computed numbers.
//  - kFiniteHorizon: V is read as stage-0 values (the whole horizon ahead) and compared with
//    the exact V*_0 (the reference's stage 0, or computed here by backward induction):
//    residuals(s) = |V(s) - V*_0(s)|, max_residual = reference_distance = their maximum,
//    value_error_bound = reference_distance + reference_error_bound (0: backward induction is
//    exact). Pass iff value_error_bound <= tolerance. greedy_policy_loss_bound is NaN: stage-0
//    values do not determine the decisions of later stages.
//  - kAverage: V is read as a bias h. d(s) = (T h)(s) - h(s) with T the undiscounted operator
//    best_a [r(s, a) + sum p h]; a terminal state is absorbing with reward 0 (a self-loop), so
//    d = 0 there whatever h is. Then gain_lower = min d <= g*(s) <= max d = gain_upper for every
//    s (the bracket of average_reward.h). residuals(s) = |d(s) - m|, m the bracket's midpoint,
//    so max_residual = (gain_upper - gain_lower) / 2 bounds |m - g*(s)|. The greedy policy of h
//    gains at least min d everywhere (kMinimize: at most max d), so greedy_policy_loss_bound =
//    gain_upper - gain_lower (gain per step). value_error_bound is NaN (a bias is unique only
//    up to a constant per class). Pass iff gain_upper - gain_lower <= tolerance: possible only
//    when g* is one number.
//  - kTotal: A = the states that can reach a goal w.p. 1 (the reference's total.reaches_goal,
//    or computed here), a row is safe iff all its next states lie in A, and T takes the best
//    safe row (T V = 0 at goals). residuals(s) = |(T V)(s) - V(s)| on A, NaN outside A
//    (values are undefined there; states_not_reaching_goal counts them). With a reference:
//    reference_distance = max over A of |V - V*|, value_error_bound = reference_distance +
//    reference_error_bound, pass iff value_error_bound <= tolerance. Without one no bound can be
//    stated (a small residual does not make V close to V* when reaching a goal takes long):
//    value_error_bound is NaN and the verdict fails. greedy_policy_loss_bound is NaN (the
//    greedy policy of V may not even reach a goal).
//
// Candidate policy pi, against a reference Solution of the same model (Solve()), by exact
// evaluation (criterion_eval.h). loss(s) = V*(s) - V^pi(s) for kMaximize, V^pi(s) - V*(s) for
// kMinimize, where V reads per criterion:
//  - kDiscounted: values. kFiniteHorizon: stage-0 values; the candidate is stationary (applied
//    at every stage) while the optimal policy may depend on the stage, so a stationary policy
//    can have positive loss however it is chosen; suboptimal choices are judged against the
//    reference's stage-0 optimal sets.
//  - kAverage: gains, reward per step. g*(s) is the reference's average.state_gain[s], or
//    average.gain when state_gain is empty; 0 at terminal states, where every policy earns 0
//    (their loss is 0). optimal_value_error_bound = (gain_upper - gain_lower) / 2 when g* is
//    one number on the non-terminal states (state_gain empty or equal to gain there), which
//    bounds |gain - g*(s)| by the bracket of average_reward.h; when state_gain varies: the
//    reference's options.tolerance if it converged (average_reward.h: state_gain is then g*
//    within state_gain_error <= tolerance), NaN otherwise. A row outside the optimal set may
//    still keep the optimal gain (e.g. at a transient state): the verdict rests on the gains.
//  - kTotal: values; where the reference reaches a goal w.p. 1 (total.reaches_goal) and the
//    candidate does not, loss = +infinity and the state is listed in improper_states. Where
//    the reference does not reach a goal no policy does: loss 0, values NaN, nothing listed.
// Verdict: pass iff max loss + evaluation_error_bound + optimal_value_error_bound <= tolerance,
// i.e. the policy is certainly within tolerance of optimal (false when any term is NaN).
#ifndef MDP_SOLVER_VERIFY_H_
#define MDP_SOLVER_VERIFY_H_

#include <limits>
#include <span>
#include <vector>

#include "solver/evaluate.h"
#include "solver/model.h"
#include "solver/policy.h"
#include "solver/solution.h"
#include "solver/status.h"

namespace mdp {

struct VerifyOptions {
  double tolerance = 1e-6;  // Verdict threshold in reward units (kAverage: per step).
  int worst_k = 10;         // How many worst states to list.
  int64_t max_listed = 1000;  // Cap on listed suboptimal (and improper) states.
};

struct StateResidual {
  StateId state = 0;
  double residual = 0.0;   // residuals(s) (header comment).
  double candidate = 0.0;  // V(s).
  // (T V)(s); kFiniteHorizon: V*_0(s), the value it is compared with.
  double backup = 0.0;
};

struct ValuesReport {
  bool pass = false;
  double tolerance = 0.0;
  CriterionKind criterion = CriterionKind::kDiscounted;  // The model's.
  double max_residual = 0.0;
  double value_error_bound = 0.0;
  double greedy_policy_loss_bound = 0.0;
  // kAverage: the bracket [min d, max d] around every state's optimal gain. NaN otherwise.
  double gain_lower = std::numeric_limits<double>::quiet_NaN();
  double gain_upper = std::numeric_limits<double>::quiet_NaN();
  // kFiniteHorizon, kTotal: max |V - V*| over the compared states, and the reference's own
  // bound on |V* - exact| (0 for kFiniteHorizon). NaN when there is no reference to compare
  // with (kTotal without one) and for the other criteria.
  double reference_distance = std::numeric_limits<double>::quiet_NaN();
  double reference_error_bound = std::numeric_limits<double>::quiet_NaN();
  int64_t states_not_reaching_goal = 0;  // kTotal: states outside A (residual NaN).
  std::vector<StateResidual> worst;  // Largest residuals first (NaN residuals never listed).
  std::vector<double> residuals;     // Per state.
};

// Verifies `candidate` without a reference solution (header comment); kFiniteHorizon computes
// V*_0 by backward induction here (time horizon x model size), kTotal cannot pass.
// REQUIRES: candidate.size() == m.num_states().
ValuesReport VerifyValues(const Model& m, std::span<const double> candidate,
                          const VerifyOptions& options);

// The same against `reference`, a Solution of `m` (Solve()); kFiniteHorizon and kTotal compare
// with it, kDiscounted and kAverage do not need it. Returns kInvalidArgument if `candidate` or
// `reference` does not match the model (size, criterion; kFiniteHorizon: no stage-0 values).
Result<ValuesReport> VerifyValues(const Model& m, std::span<const double> candidate,
                                  const Solution& reference, const VerifyOptions& options);

struct StateLoss {
  StateId state = 0;
  double loss = 0.0;           // May be +infinity (kTotal, improper).
  double value = 0.0;          // V^pi(s) (kAverage: g^pi(s); kTotal: NaN where improper).
  double optimal_value = 0.0;  // V*(s) from the reference solution (kAverage: g*(s)).
};

struct SuboptimalChoice {
  StateId state = 0;
  std::vector<RowId> chosen;   // Rows with positive probability outside the optimal set.
  std::vector<RowId> optimal;  // The state's optimal set.
};

struct PolicyReport {
  bool pass = false;
  double tolerance = 0.0;
  CriterionKind criterion = CriterionKind::kDiscounted;  // The model's.
  double max_loss = 0.0;  // +infinity iff kTotal and improper_count > 0.
  double evaluation_error_bound = 0.0;  // kAverage: on the gains; kFiniteHorizon: 0.
  double optimal_value_error_bound = 0.0;
  LinearSolver solver_used = LinearSolver::kDirect;
  std::vector<StateLoss> worst;               // Largest losses first.
  std::vector<SuboptimalChoice> suboptimal;   // At most options.max_listed.
  int64_t suboptimal_count = 0;               // All of them.
  std::vector<double> values;                 // V^pi as in StateLoss::value.
  std::vector<double> losses;                 // Per state.
  // kTotal: states where the reference reaches a goal w.p. 1 and the candidate does not,
  // ascending, at most options.max_listed; improper_count counts all of them.
  std::vector<StateId> improper_states;
  int64_t improper_count = 0;
};

// Evaluates `policy` exactly under the model's criterion and compares it with `optimal` (a
// Solution of the same model). Returns kInvalidArgument if the policy is malformed or
// `optimal` does not match the model (size, criterion; kFiniteHorizon: no stage-0 values),
// and passes on EvaluateUnderCriterion's errors.
Result<PolicyReport> VerifyPolicy(const Model& m, const Policy& policy, const Solution& optimal,
                                  const VerifyOptions& options,
                                  const EvaluateOptions& evaluate = {});

}  // namespace mdp

#endif  // MDP_SOLVER_VERIFY_H_
