// Exact evaluation of a stationary (possibly stochastic) policy under the model's criterion
// (model_spec.h Criterion). Pure function of its inputs; thread-safe on immutable models;
// returns a plain value the caller owns.
//
// A policy pi (policy.h) gives the chain P_pi(s, s') = sum_a pi(a | s) p(s' | s, a) and the
// reward r_pi(s) = sum_a pi(a | s) r(s, a). Per criterion:
//  - kDiscounted: V = (I - g P_pi)^-1 r_pi, by EvaluatePolicy (evaluate.h), with its bounds.
//  - kFiniteHorizon (horizon H, discount g, terminal values V_H): pi is applied at every stage,
//    V_t = r_pi + g P_pi V_{t+1} for t = H-1 .. 0; values = V_0. Exact up to floating-point
//    rounding, which is not counted (bounds 0, as for a solved Solution's stage values).
//  - kAverage: a terminal state is absorbing with reward 0 per step. The recurrent classes are
//    the closed strongly connected components of the support graph of P_pi (an edge s -> s'
//    iff P_pi(s, s') > 0). On a class C the stationary distribution mu_C (mu_C P_C = mu_C,
//    sum 1) gives the gain g_C = mu_C r_C; a transient state's gain is the absorption-weighted
//    class gain, g_T = (I - P_TT)^-1 P_TC g_C. values is the bias h: (I - P_pi) h = r_pi - g
//    with mu_C h_C = 0 on every class, i.e. P* h = 0 (Puterman 1994, Markov Decision Processes,
//    sec. 8.2, from memory).
//  - kTotal: terminal states are the goals (value 0). pi is proper from s iff a goal is reached
//    w.p. 1 from s, iff every state reachable from s in the support graph can reach a goal
//    (otherwise a closed class without goals is entered with positive probability). On the
//    proper states S, which no transition leaves except to goals, V = (I - P_SS)^-1 r_S and the
//    expected steps to a goal N = (I - P_SS)^-1 1. Elsewhere the total is undefined: NaN.
//
// Error bounds (the rounding in computing a residual is not counted). For a nonsingular
// M-matrix A = I - P_SS (S proper or transient) the inverse is the nonnegative series
// sum_k P_SS^k and A^-1 1 = N, the expected steps to leave S. So with rho_N = sup|A N' - 1|
// for the computed N', max N <= max N' / (1 - rho_N) =: Nbar when rho_N < 1 (common practice),
// and a computed x with rho = sup|A x - b| is within rho * Nbar of A^-1 b.
//  - kTotal: value_error_bound = rho_V Nbar.
//  - kAverage: for the exact mu_C and the computed (g_C, h), mu_C (r + P h - h) = g^pi_C
//    because mu_C P_C = mu_C, so |g_C - g^pi_C| <= e_C = max_C |r + P h - h - g_C|. On the
//    transient states add rho_g Nbar (absorption probabilities sum to at most 1):
//    gain_error_bound = max_C e_C + rho_g Nbar. No bound is stated for the bias.
#ifndef MDP_SOLVER_CRITERION_EVAL_H_
#define MDP_SOLVER_CRITERION_EVAL_H_

#include <vector>

#include "solver/evaluate.h"
#include "solver/model.h"
#include "solver/options.h"
#include "solver/policy.h"
#include "solver/progress.h"
#include "solver/status.h"

namespace mdp {

struct CriterionValues {
  CriterionKind criterion = CriterionKind::kDiscounted;  // The model's.
  // Per state, the policy's value under the criterion: kDiscounted V^pi; kFiniteHorizon V^pi_0
  // (the whole horizon ahead); kAverage the bias h (0 at terminal states); kTotal the expected
  // total reward until a goal where proper (0 at goals), NaN where not.
  std::vector<double> values;
  // kAverage: per state the gain g^pi(s), reward per step (0 at terminal states). Else empty.
  std::vector<double> gains;
  // kAverage: the recurrent classes of P_pi, each sorted, ordered by their first state; a
  // terminal state is a class of its own. Else empty.
  std::vector<std::vector<StateId>> recurrent_classes;
  // kTotal: per state 1 iff pi reaches a goal w.p. 1 from it (1 at goals). Else empty.
  std::vector<uint8_t> proper;
  std::vector<StateId> improper_states;  // kTotal: the states with proper 0, ascending.
  // kTotal: expected steps to a goal where proper (0 at goals), NaN elsewhere. Else empty.
  std::vector<double> expected_steps;

  // kDiscounted: as EvaluatePolicy. kAverage, kTotal: kDirect iff every system was solved by
  // sparse LU, else kBiCgStab. kFiniteHorizon: kSweeps (H exact backups).
  LinearSolver solver_used = LinearSolver::kDirect;
  // Sup-norm residual of the equations solved: kDiscounted sup|(I - g P_pi) V - r_pi|;
  // kFiniteHorizon 0; kAverage the larger of sup|P_pi g - g| and sup|r_pi + P_pi h - h - g|;
  // kTotal sup|(I - P_SS) V - r_S| over the proper states.
  double residual = 0.0;
  // Bound on sup|values - exact| (header comment): kDiscounted residual / (1 - g);
  // kFiniteHorizon 0; kTotal rho_V Nbar over the proper states (+inf if none can be stated);
  // kAverage NaN (no bound is stated for a bias).
  double value_error_bound = 0.0;
  double gain_error_bound = 0.0;  // kAverage: bound on sup|gains - g^pi|. Else 0.
};

// Evaluates `policy` on `m` under m.criterion(). kDiscounted uses `options` as EvaluatePolicy
// does. kAverage and kTotal solve their sparse systems by LU up to options.direct_max_states
// unknowns (always with kDirect), by BiCGSTAB with refinement beyond (always with kBiCgStab),
// falling back to LU when it misses its target; kSweeps reads as kAuto. They aim at bounds
// near options.tolerance. Returns kInvalidArgument if the policy is malformed (CheckPolicy),
// kCancelled if `cancel` (may be null) fired (polled once per stage for kFiniteHorizon and
// between and within iterative solves otherwise), kResourceExhausted if memory runs out,
// kInternal if a linear solve fails.
Result<CriterionValues> EvaluateUnderCriterion(const Model& m, const Policy& policy,
                                               const EvaluateOptions& options = {},
                                               const CancelToken* cancel = nullptr);

}  // namespace mdp

#endif  // MDP_SOLVER_CRITERION_EVAL_H_
