// Total reward until a goal (the stochastic shortest path problem), solved by policy
// iteration over the policies that reach a goal with probability 1. Pure function of
// (model, options): thread-safe on immutable models, no global state; the result is a plain
// value the caller owns. The model's criterion (its discount included) is not read: the
// caller has chosen this one.
//
// The criterion. Goals are the terminal states (absorbing, value 0). For a policy pi and a
// start state s, with tau the first time a goal is reached,
//   V^pi(s) = lim_k E[sum_{t < min(k, tau)} r(S_t, A_t) | S_0 = s],   r(s, a) = m.row_reward,
// and V*(s) is its best value (max, or min for Objective::kMinimize) over the policies that
// reach a goal with probability 1 from s ("proper"; history-dependent ones included).
//
// Analysis before solving.
//  1. Goal-reaching set A: the states from which some policy reaches a goal w.p. 1 (the
//     almost-sure reachability fixed point: keep only rows whose next states all lie in the
//     current set, keep only the states that reach a goal through kept rows, repeat until
//     stable; common practice). A row of a state of A is "safe" iff all its next states lie
//     in A. A policy that reaches a goal w.p. 1 takes only safe rows (any other row leaves A
//     with positive probability, and from outside A no policy reaches a goal w.p. 1). States
//     outside A get value NaN; unsafe rows get q = NaN and are never picked.
//  2. Wrong direction: on A without the goals, with safe rows that do not reach a goal, the
//     maximal end components (sets in which some policy can stay for ever) are found by
//     repeated strongly-connected-component refinement (common practice). If some policy
//     staying in one earns a gain (average reward per step) better than 0 (> eps when
//     maximising, < -eps when minimising, eps = 1e-9 max(1, max|r|)), looping there k times
//     before heading for a goal gains about k |gain|: V* is unbounded and the call returns
//     kFailedPrecondition naming the loop. The gain is found by AverageRewardPolicyIteration
//     on the component alone, only when one of its rows earns better than eps (a gain is an
//     average of rewards); an end component is communicating, so its optimal gain is one
//     number (Puterman 1994, Markov Decision Processes, ch. 9, from memory). Loops with gain
//     within eps of 0 or in the right direction are accepted.
//  3. Start: the attractor of the goals over safe rows. Breadth first backwards from the
//     goals, each state takes, among its safe rows entering already settled states, the one
//     most likely to do so (the first on ties). It is proper: from every state of A a goal
//     is reached within |A| steps with positive probability.
//
// Policy iteration. Evaluate the policy mu exactly: (I - P_mu) V = r_mu on A minus the goals
// (V = 0 at goals), and also (I - P_mu) N = 1, the expected number of steps to a goal. Then
// each state switches to its best safe row (the first best in document order) only if that
// beats its current row by more than the slack sigma(s) = 2 eps_V + 8 (k + 2) u max(1, |q| + 2
// |V|), where eps_V bounds the evaluation error and the second term is 8 times the rounding of a q
// over k outcomes (u = 2^-53): so every switch is a true strict improvement.
//  - Properness is kept. If the new policy mu' had a closed class C avoiding the goals, let
//    pi be its stationary distribution on C and d = r_mu' + P_mu' V^mu - V^mu >= 0 (> 0
//    where mu' switched, and C must contain a switch since mu is proper). As pi P_mu' = pi
//    on the closed class C, pi r_mu' = pi d - pi (P_mu' - I) V^mu = pi d > 0: mu' earns a
//    positive gain on C, which lies in an end component of step 2 whose optimal gain is
//    <= 0, a contradiction (for kMinimize, the mirror image). Loops with gain in (0, eps]
//    escape this argument (V* is then, strictly, unbounded, by at most eps per step; the
//    answer is that of the proper policy found), so each improvement is also checked:
//    states that no longer reach a goal are settled breadth first backwards from those
//    that do, each keeping its new row if that row can step to a settled state and
//    reverting to its old row otherwise (the largest improvement given up is reported in
//    improvement_slack). Every state can then reach a goal with positive probability (mu's
//    rows do, and settled states step towards states that do), so no closed class avoids
//    the goals: the policy is proper.
//  - Termination: a proper mu' that improves strictly somewhere has V^mu' >= V^mu with
//    strict inequality where it switched ((I - P_mu')^-1 >= I), so no policy repeats.
//  - Optimality (exact arithmetic): if no safe row improves on mu, then V = V^mu satisfies
//    V >= T V (max; T = best safe q). For any policy that reaches a goal w.p. 1 the process
//    V(S_t) + sum_{u<t} r_u is then a supermartingale up to tau, so
//    V(s) >= E[sum_{t<min(k,tau)} r_t] + E[V(S_k); tau > k], and the last term tends to 0
//    because V is bounded and P(tau > k) -> 0. So V^mu = V*. This is the policy-iteration
//    result for stochastic shortest paths (Bertsekas & Tsitsiklis 1991, "An analysis of
//    stochastic shortest path problems", Mathematics of Operations Research, from memory),
//    proved here directly because their assumption (every improper policy has infinite
//    cost) fails when zero-reward loops exist.
//
// Large models (inexact evaluation). Above 3,000 non-goal states of A (LinearSolver::kAuto),
// and always with kBiCgStab or kSweeps, no evaluation is exact: each policy's rows are copied
// out (internal/total_policy.h) and N, then V, are improved from warm starts (the last
// policy's N and T_mu' V) by restarted BiCGSTAB or Gauss-Seidel sweeps, or (kAuto) through
// the sparse factors of I - P_mu when their fill, counted first, is small (next states near
// the state: chains, rings, bands), polling cancel and the time limit. While the policy
// changes, N is solved to rho_N <= 0.1 and V to an error bound rho Nbar <= share * e (e the
// last Bellman residual, share 0.002, tenfold tighter whenever an improvement fails to halve
// e): the improvement rule above, with eps_V = rho Nbar, still makes every switch a true
// strict improvement, so the argument above holds unchanged. Only when no row improves is
// the same policy evaluated to the exact path's accuracy (N to 1e-9, V to 1e-3 tolerance /
// Nbar, or the rounding floor) and improved once more; the run is stable when that changes
// nothing. If three such rounds in a row halve neither residual, it stops as stable with the
// bound it has (outcome kStalled unless it meets the tolerance). A stop (cancel, time limit)
// keeps the last completed evaluation, or the interrupted first one; its bounds are computed
// from its own residuals, so they are honest, if loose. The expected steps of the report are
// solved for the picks to the 1e-9 residual; after a stop with only a little more work
// (unpolled, a bounded overrun), and they are NaN when that residual was not met.
//
// Bounds (all sup-norms over A minus the goals).
//  - evaluation_error_bound: rho_N = sup|(I - P_mu) N - 1| < 1 gives
//    max N^mu <= max N / (1 - rho_N) =: Nbar, and rho = sup|(I - P_mu) V - r_mu| gives
//    |V - V^mu| = |(I - P_mu)^-1 (residual)| <= rho N^mu <= rho Nbar (the inverse is the
//    nonnegative series sum_k P_mu^k and (I - P_mu)^-1 1 = N^mu). Always valid.
//  - value_error_bound: when policy iteration stopped because no row improved, it equals
//    evaluation_error_bound, as a bound on sup|values - V*| and sup|q - q*| (T is a sup-norm
//    nonexpansion, so |T V - V*| = |T V - T V*| <= |V - V*|). What is proved: no safe row
//    beats mu against V^mu by more than improvement_slack, so by the argument above with an
//    optimal stationary policy mu*, V* - V^mu <= improvement_slack * N^mu*(s) (kMinimize:
//    mirror); that term, at the level of the evaluation error, is not included.
//    NaN when the run stopped early: then no upper bound on V* is known (kMaximize: values
//    are still values of proper policies up to evaluation_error_bound — take the best row,
//    then follow mu — so V* >= values - evaluation_error_bound; kMinimize: the mirror).
//  - policy_loss_bound: the pick pi (best_row) trails V by w(s) = V(s) - q(s, pi(s))
//    (kMinimize: q - V); V^pi - V = (I - P_pi)^-1 (q_pi - V) >= -max(w, 0) N^pi, so
//    V* - V^pi <= value_error_bound + (max w + rounding) max N^pi. NaN when stopped early.
#ifndef MDP_SOLVER_TOTAL_REWARD_H_
#define MDP_SOLVER_TOTAL_REWARD_H_

#include <array>
#include <cstdint>
#include <vector>

#include "solver/model.h"
#include "solver/options.h"
#include "solver/progress.h"
#include "solver/solution.h"
#include "solver/status.h"

namespace mdp {

struct TotalRewardOptions {
  double tolerance = 1e-8;          // Target evaluation_error_bound; converged iff met.
  int64_t max_iterations = 100000;  // Improvement steps; outcome kIterationLimit when reached.
  double time_limit_seconds = 0.0;  // 0 means no limit; else outcome kTimeLimit.
  double tie_tolerance = 1e-9;      // Slack (reward units) when grouping tied actions.
  // Evaluation: kAuto is exact (sparse LU) up to 3000 non-goal states of A, and inexact
  // beyond ("Large models" above); kBiCgStab is inexact at any size; kSweeps is inexact with
  // Gauss-Seidel sweeps only (they converge because I - P_mu is a nonsingular M-matrix for a
  // proper mu); kDirect is sparse LU at any size.
  LinearSolver linear_solver = LinearSolver::kAuto;
  int threads = 1;  // Threads for the improvement and final passes; 0 = all cores.
};

// Bounds of the numeric TotalRewardOptions fields, in declaration order.
inline constexpr std::array<OptionBound, 5> kTotalRewardOptionBounds = {{
    {"tolerance", "target bound on the error of the evaluated values, in reward units", 1e-8, 1e-14,
     1e6},
    {"max_iterations", "improvement steps; the outcome says iteration_limit when reached", 100000,
     1, 1e9},
    {"time_limit_seconds", "wall-clock limit in seconds, 0 for none", 0, 0, 1e7},
    {"tie_tolerance", "extra slack when grouping actions as tied, in reward units", 1e-9, 0, 1e6},
    {"threads", "threads for the improvement passes, 0 for all cores", 1, 0, 256},
}};

// Returns kInvalidArgument naming the field if an option is out of its bounds.
Status CheckTotalRewardOptions(const TotalRewardOptions& options);

struct TotalRewardSolution {
  TotalRewardOptions options;
  // kConverged iff no row improved and evaluation_error_bound <= options.tolerance; kStalled
  // if no row improved but the bound is larger (an ill-conditioned evaluation).
  SolveOutcome outcome = SolveOutcome::kConverged;
  int64_t iterations = 0;  // Improvement steps.
  int64_t sweeps = 0;      // Passes over the model: evaluations, improvements, final pass.
  double solve_seconds = 0.0;

  // Analysis (steps 1 and 2 of the header comment).
  std::vector<uint8_t> reaches_goal;  // Per state: 1 iff in A (goals included).
  std::vector<uint8_t> safe_row;      // Per row: 1 iff its state and all next states are in A.
  int64_t states_not_reaching_goal = 0;
  int64_t end_components = 0;  // Maximal end components found; all earn gain <= eps.

  // Per state: best safe q, i.e. (T V)(s) (0 at goals, NaN outside A).
  std::vector<double> values;
  // Per row: r(s, a) + sum p V for safe rows, V the final policy's evaluated values;
  // NaN for unsafe rows (and so for every row of a state outside A).
  std::vector<double> q;
  // Per state: the deterministic pick, -1 for goals and states outside A. It is the first
  // safe row (document order) within options.tie_tolerance + 1e-12 max(1, |values|) of the
  // best, except where those picks would together loop for ever without reaching a goal
  // (possible only among tied rows, e.g. on zero-reward loops): such states instead take,
  // breadth first backwards from the states that do reach a goal, the first tied row
  // (document order) with positive probability of an already settled state (or, if no tied
  // row has one, the final policy's row). The picked policy is always proper.
  std::vector<RowId> best_row;
  std::vector<uint8_t> optimal_row;  // Per row: safe and within tie_tolerance (below) of best.
  std::vector<double> action_gap;    // Per state: |best - second best| over safe rows; NaN <2.
  int64_t tied_states = 0;           // States whose optimal set has two or more rows.
  // options.tie_tolerance + 2 evaluation_error_bound: rows with equal exact q against V^mu
  // differ in computed q by at most twice the evaluation error (plus 1e-12 max(1, |values|)
  // for rounding, applied per state).
  double tie_tolerance = 0.0;

  // Bounds: see the header comment.
  double residual = 0.0;                // e = sup |values - V|, the Bellman residual of V.
  double evaluation_residual = 0.0;     // rho = sup |(I - P_mu) V - r_mu|, rounding included.
  double evaluation_error_bound = 0.0;  // sup |V - V^mu| <= rho * max N^mu (bound).
  // Largest sigma(s) of the last improvement step, or the larger improvement the properness
  // guard gave up there: at the end no safe row beats mu against V^mu by more.
  double improvement_slack = 0.0;
  double value_error_bound = 0.0;  // sup |values - V*|; NaN when stopped early.
  double policy_loss_bound = 0.0;  // sup (V* - V^best_row) (mirror); NaN when stopped.

  // Per state: expected steps to a goal under best_row, from (I - P) N = 1; 0 at goals,
  // NaN outside A. max_expected_steps is its maximum over A (0 if A holds only goals). Both
  // NaN on the non-goal states of A when an inexact solve did not reach (I - P) N = 1 within
  // 1e-9 (possible after a stop: "Large models").
  std::vector<double> expected_steps;
  double max_expected_steps = 0.0;
};

// Solves the total-reward criterion on `m` (header comment). Returns kInvalidArgument for
// bad options; kFailedPrecondition if the model has no goal, if no non-goal state can reach
// one w.p. 1, or if a loop earns in the wrong direction (the message names up to 10 of its
// states, the actions it takes and its reward per step, and suggests a fix);
// kResourceExhausted if memory runs out; kInternal if a linear solve fails. Exact path:
// cancel and the time limit are polled once per improvement, and cancel also inside the
// iterative linear solves of every evaluation but the first; a stopped run returns the last
// fully evaluated policy. Inexact path: both are polled inside every solve, about once per
// two products with P_mu ("Large models"). A cancel or time limit during the end-component
// check that leaves a loop's sign undecided returns kCancelled or kDeadlineExceeded.
// `progress` (may be null) is called once per improvement that changed the policy (inexact
// path: and once per improvement that did not, but left the evaluation to be tightened),
// with residual = the Bellman residual of V and error_bound = residual * Nbar (an estimate).
Result<TotalRewardSolution> TotalRewardPolicyIteration(const Model& m,
                                                       const TotalRewardOptions& options,
                                                       const ProgressFn* progress,
                                                       const CancelToken* cancel);

}  // namespace mdp

#endif  // MDP_SOLVER_TOTAL_REWARD_H_
