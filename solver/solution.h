// Solution: what a solve produced — values, the Q-table, the optimal action sets, action
// gaps — with the guarantees that hold for them. A plain value; the caller owns it; share it
// read-only across threads freely.
//
// Guarantees (discounted criterion, discount g). Finalize() takes the last iterate V of any
// method, applies one exact Bellman backup V1 = T V, measures the residual e = sup|V1 - V|,
// and builds the Q-table from V1. Then (Puterman 1994, Markov Decision Processes, Thm 6.3.1,
// and the g-contraction of T):
//   sup |V1 - V*|          <= g e / (1 - g)
//   sup |Q - Q*|           <= g * g e / (1 - g)              (q_error_bound)
//   sup |values - V*|      <= g * g e / (1 - g)              (value_error_bound; values = max Q)
//   greedy policy loss     <= 2 g e / (1 - g) + d / (1 - g)  (policy_loss_bound)
// where d = options.tie_tolerance + 1e-12 * max(1, max |values|) is how far the deterministic
// pick may trail the best Q (a policy whose actions trail T V1 by d per step loses at most
// d / (1 - g) more: the same contraction argument).
// These hold in exact arithmetic. For the computed numbers, e is widened by twice a bound a
// on the rounding of one computed backup (internal::BackupRoundingAllowance: (k + 4) units
// of roundoff of the largest value or reward, k the longest row), and a is added once more
// for V1 and once for Q: value_error_bound = q_error_bound = g * (g (e + 2a) / (1 - g) + a)
// + a, policy_loss_bound = 2 (g (e + 2a) / (1 - g) + a) + d / (1 - g). Without it a bound
// that is tight could fall short by rounding alone (8e-5 with values near 2e8 at g = 0.9999;
// tests/fuzz/discounted_oracle_fuzz, SolutionTest.BoundsCoverTheirOwnRoundingWhereTheyAreTight).
//
// Optimal action sets. Row r of state s is in the set iff
//   |Q(s, r) - values(s)| <= tie_tolerance + 1e-12 * max(1, |values(s)|),
// where tie_tolerance = options.tie_tolerance + 2 * q_error_bound. Two actions with equal
// true Q* differ in computed Q by at most 2 * q_error_bound, so every truly optimal action is
// in the set; an action within the tolerance of the best is reported as tied with it.
// The deterministic pick (best_row) is the first row in document order whose Q is within
// options.tie_tolerance + 1e-12 * max(1, |values(s)|) of the best: exact ties break by
// document order, and the pick is always in the set. The stochastic optimal policy is
// uniform over the set. The action gap is |best Q - second
// best Q| over all available actions (NaN when a state has fewer than two).
#ifndef MDP_SOLVER_SOLUTION_H_
#define MDP_SOLVER_SOLUTION_H_

#include <cstdint>
#include <span>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "solver/model.h"
#include "solver/options.h"

namespace mdp {

enum class SolveOutcome {
  kConverged,       // value_error_bound <= options.tolerance.
  kIterationLimit,  // max_iterations reached first.
  kTimeLimit,       // time_limit_seconds passed first.
  kCancelled,       // The CancelToken fired.
  kStalled,         // The residual stopped shrinking above tolerance (floating-point floor;
                    // relative value iteration: also progress too slow to see).
};

std::string_view SolveOutcomeName(SolveOutcome outcome);  // "converged", ...

struct Solution {
  Method method = Method::kPolicyIteration;
  SolveOptions options;
  SolveOutcome outcome = SolveOutcome::kConverged;
  int64_t iterations = 0;  // Method iterations (improvement steps for policy iteration).
  int64_t sweeps = 0;  // Passes over the model, including finalize, or over a policy's rows
                       // (evaluation steps of policy iteration).
  double residual = 0.0;   // e = sup |T V - V| of the last iterate V.
  double value_error_bound = 0.0;
  double q_error_bound = 0.0;
  double policy_loss_bound = 0.0;
  double tie_tolerance = 0.0;  // Slack used for the optimal sets (see above).
  double solve_seconds = 0.0;

  std::vector<double> values;        // Per state: best Q (0 for terminal states).
  std::vector<double> q;             // Per row.
  std::vector<RowId> best_row;       // Per state: deterministic pick, -1 for terminal.
  std::vector<uint8_t> optimal_row;  // Per row: 1 iff in its state's optimal set.
  std::vector<double> action_gap;    // Per state; NaN with fewer than two actions.
  int64_t tied_states = 0;           // States whose optimal set has two or more actions.

  // Which criterion these numbers answer (the model's). The fields above read as follows:
  //  - kDiscounted: as stated in the header comment.
  //  - kAverage: `values` is a bias h (0 at average.reference_state) and
  //    q(s, a) = r(s, a) + sum p h - gain(s), so values(s) = best q(s, .) up to the gain
  //    bracket. value_error_bound and q_error_bound are NaN (a bias is unique only up to a
  //    constant per recurrent class); residual is the bracket's width, or with differing
  //    gains the optimality residual; policy_loss_bound is a bound on the gain lost per step
  //    (see average_reward.h).
  //  - kFiniteHorizon: every per-state field is stage 0 (the whole horizon ahead); the table
  //    of all stages is stage_values. Backward induction is exact up to rounding: the
  //    bounds are 0.
  //  - kTotal: expected total reward until a goal. values are NaN for states that cannot
  //    reach a goal with probability 1 (total.reaches_goal), q is NaN for rows that risk
  //    leaving the goal-reaching states; see total_reward.h for the bounds.
  CriterionKind criterion = CriterionKind::kDiscounted;

  struct AverageReport {
    double gain = 0.0;        // Midpoint of [gain_lower, gain_upper].
    double gain_lower = 0.0;  // gain_lower <= g*(s) <= gain_upper for every state s.
    double gain_upper = 0.0;
    StateId reference_state = 0;
    // Per state, only when the optimal gain differs between states (multichain models
    // solved by policy iteration); empty means `gain` is every state's gain.
    std::vector<double> state_gain;
    bool multichain = false;         // The best policy has two or more recurrent classes.
    std::vector<std::vector<StateId>> recurrent_classes;  // Of the best policy.
    std::string note;                // Plain words about the chain structure; may be empty.
  } average;

  int64_t horizon = 0;              // kFiniteHorizon: H.
  int64_t stage = 0;                // kFiniteHorizon: the stage the per-state fields describe.
  std::vector<double> stage_values;  // kFiniteHorizon: V_t(s) at [t * states + s], t = 0..H.

  struct TotalReport {
    std::vector<uint8_t> reaches_goal;   // Per state: a goal is reachable w.p. 1.
    std::vector<double> expected_steps;  // Per state, under best_row; NaN where undefined.
    int64_t states_not_reaching_goal = 0;
    double max_expected_steps = 0.0;
  } total;

  // Number of rows in the optimal set of state s.
  int64_t OptimalCount(const Model& m, StateId s) const;
};

// Completes a solution from the last iterate `v` (see the header comment). Sets values, q,
// best_row, optimal_row, action_gap, tied_states, residual and the bounds; leaves the
// bookkeeping fields (method, outcome, iterations, times) to the caller but adds 2 sweeps.
void Finalize(const Model& m, std::span<const double> v, const SolveOptions& options,
              Solution& solution);

// Up to k states with the smallest action gaps among states with two or more actions that
// are not tied, smallest first.
std::vector<std::pair<StateId, double>> SmallestGaps(const Model& m, const Solution& solution,
                                                     int k);

}  // namespace mdp

#endif  // MDP_SOLVER_SOLUTION_H_
