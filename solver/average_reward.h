// Average-reward solvers: the long-run reward (or cost) per step of a finite MDP, found by
// relative value iteration or by policy iteration, with the chain-structure analysis both
// use. Pure functions of (model, options): thread-safe on immutable models, no global state;
// results are plain values the caller owns. The model's discount is ignored, and a terminal
// state counts as absorbing with reward 0 per step (so its gain is 0).
//
// The criterion. The gain of a stationary policy pi from state s is
//   g^pi(s) = lim_N (1/N) E[sum_{t<N} r(S_t, A_t) | S_0 = s];
// the optimal gain g*(s) is its maximum over policies (minimum for Objective::kMinimize).
// When g* is the same in every state (as in unichain models), the optimality equation
//   g + h(s) = best_a q(s, a),   q(s, a) = r(s, a) + sum_s' p(s' | s, a) h(s')        (OE)
// has solutions (g*, h); h is a bias, or relative value, vector ("best" is max or min).
// Puterman 1994, Markov Decision Processes, ch. 8 (from memory for section numbers).
// In general g* may differ between states, and (g*, h) solve the multichain optimality
// equations (Puterman 1994, ch. 9, from memory)
//   best_a sum_s' p(s' | s, a) g(s') = g(s),                                          (ME1)
//   best_{a in K(s)} q(s, a) = g(s) + h(s),   K(s) = {a : sum_s' p(s' | s, a) g(s') = g(s)},  (ME2)
// where K(s) is the set of actions that keep the gain. (ME1)-(ME2) reduce to (OE) when g is
// constant (every action keeps a constant gain).
//
// The gain bracket. For any vector v let d(s) = best_a [r(s, a) + sum p v] - v(s), with
// d(s) = 0 at terminal states. Then, in every finite model (unichain or not),
//   min_s d(s) <= g*(s') <= max_s d(s)   for every state s'.
// Proof for kMaximize (kMinimize is the mirror image): the greedy policy G of v has
// r_G + P_G v - v = d; applying its limiting matrix P*_G (rows sum to 1, P*_G P_G = P*_G)
// gives g^G = P*_G d >= min d, and g* >= g^G. Every deterministic stationary pi has
// r_pi + P_pi v - v <= d, so g^pi = P*_pi (r_pi + P_pi v - v) <= max d, and in a finite model
// some deterministic stationary policy is gain-optimal (Puterman 1994, ch. 9, from memory).
// For unichain models this is the bound Puterman gives for (relative) value iteration
// (sec. 8.5, from memory). The bracket's width is at least max g* - min g*, so it can shrink
// to 0 only when g* is constant. When it does, gain = the bracket's midpoint, and
// |gain - g*(s)| <= (gain_upper - gain_lower) / 2 for every s.
//
// The greedy policy. The same argument bounds what a policy picking from q loses: if at every
// state it takes a row whose q trails the best by at most t, its gain is within
// (gain_upper - gain_lower) + t of g* from every start state.
//
// Chain structure. A policy's recurrent classes are the closed strongly connected components
// of its transition graph (no edge leaves them; a terminal state is a class by itself). With
// two or more classes the model is multichain and the gain may differ between states.
// Policy iteration then returns the optimal gain of each state (state_gain) with a bias
// solving (ME1)-(ME2). Relative value iteration needs one gain for all states: it returns
// kFailedPrecondition, naming the classes, when it can show that the gain differs, and solves
// multichain models whose optimal gain is the same everywhere normally. Both set
// multichain_suspected and list the classes of the chosen policy.
#ifndef MDP_SOLVER_AVERAGE_REWARD_H_
#define MDP_SOLVER_AVERAGE_REWARD_H_

#include <array>
#include <cstdint>
#include <span>
#include <string>
#include <string_view>
#include <vector>

#include "solver/model.h"
#include "solver/options.h"
#include "solver/progress.h"
#include "solver/solution.h"
#include "solver/status.h"

namespace mdp {

enum class AverageRewardMethod {
  kRelativeValueIteration,  // RelativeValueIteration() below.
  kPolicyIteration,         // AverageRewardPolicyIteration() below.
};

// "relative_value_iteration" or "policy_iteration".
std::string_view AverageRewardMethodName(AverageRewardMethod method);

struct AverageRewardOptions {
  // Target width of the gain bracket (reward units per step); converged iff reached.
  double tolerance = 1e-8;
  int64_t max_iterations = 100000;  // Outcome kIterationLimit when reached.
  double time_limit_seconds = 0.0;  // 0 means no limit; else outcome kTimeLimit.
  // Relative value iteration only: tau of the aperiodicity transformation
  //   p'(s' | s, a) = tau [s' = s] + (1 - tau) p(s' | s, a),   r' = r,
  // in [0, 0.99]; 0 turns it off. Plain relative value iteration can oscillate for ever on a
  // periodic chain (two states that swap deterministically: d alternates between the two
  // rewards); with tau > 0 every policy's chain has self-loops and is aperiodic. The
  // transformed model has the same gain, and its bias is h / (1 - tau): from
  // g + h' = r + tau h' + (1 - tau) P h' follows g + (1 - tau) h' = r + P (1 - tau) h'. The
  // solver converts back, so bias and q always refer to the original model. Larger tau
  // slows convergence; smaller tau damps oscillation less.
  double aperiodicity = 0.5;
  double tie_tolerance = 1e-9;  // Extra slack (reward units) when grouping tied actions.
  int threads = 1;              // Threads for sweeps; 0 = all cores.
  StateId reference_state = 0;  // The reported bias is 0 here.
};

// Bounds of the numeric AverageRewardOptions fields, in declaration order (reference_state is
// further limited to the model's states).
inline constexpr std::array<OptionBound, 7> kAverageRewardOptionBounds = {{
    {"tolerance", "target width of the bracket around the optimal gain, in reward units per step",
     1e-8, 1e-14, 1e6},
    {"max_iterations", "iteration cap; the outcome says iteration_limit when reached", 100000, 1,
     1e9},
    {"time_limit_seconds", "wall-clock limit in seconds, 0 for none", 0, 0, 1e7},
    {"aperiodicity",
     "relative value iteration: weight of the self-loop mixed into every "
     "transition so periodic chains converge, 0 for none",
     0.5, 0, 0.99},
    {"tie_tolerance", "extra slack when grouping actions as tied, in reward units", 1e-9, 0, 1e6},
    {"threads", "threads for sweeps, 0 for all cores", 1, 0, 256},
    {"reference_state", "index of the state whose bias is 0", 0, 0, 2147483647},
}};

// Returns kInvalidArgument naming the field if an option is out of its bounds or
// reference_state is not a state of `m`.
Status CheckAverageRewardOptions(const Model& m, const AverageRewardOptions& options);

struct AverageRewardSolution {
  AverageRewardMethod method = AverageRewardMethod::kPolicyIteration;
  AverageRewardOptions options;
  // kConverged iff gain_upper - gain_lower <= options.tolerance; for a multichain_gain
  // solution, iff policy iteration ended at a stable policy and optimality_residual and
  // state_gain_error are both <= options.tolerance.
  SolveOutcome outcome = SolveOutcome::kConverged;
  int64_t iterations = 0;  // Relative value iteration: sweeps; policy iteration: improvements.
  int64_t sweeps = 0;      // Full passes over the model, including the final one.
  double solve_seconds = 0.0;

  // The optimal gain, in reward units per step. state_gain is the answer in every model; gain
  // and its bracket summarise it.
  // One gain for all states (multichain_gain false): gain_lower <= g*(s) <= gain_upper for
  // every s (header comment), gain is the midpoint, and every state_gain[s] equals gain.
  // Gain differing between states (multichain_gain true; policy iteration only):
  //   gain_lower = min(min_s state_gain[s], L),   gain_upper = max(max_s state_gain[s], U),
  // where [L, U] is the header's bracket at v = bias intersected with the one at
  // v = bias + M state_gain, M the smallest value at which no row that loses gain has
  // r + P v - v above state_gain[s] (solver/average_reward.cc). So gain_lower <= g*(s) <=
  // gain_upper for every s still, and on convergence the pair is [min_s g*(s), max_s g*(s)]
  // up to the evaluation's rounding; gain is their midpoint, no state's gain in particular.
  double gain = 0.0;
  double gain_lower = 0.0;
  double gain_upper = 0.0;
  // Per state: the optimal gain g*(s) (0 at terminal states). One gain for all states: every
  // entry is `gain`. Otherwise: the gain g^pi of the last evaluated policy pi, computed by
  // sparse linear solves to within state_gain_error. kConverged then means pi is stable
  // under both improvement steps, which makes it gain-optimal from every state (Puterman
  // 1994, sec. 9.2, from memory), so g^pi = g*; a run stopped early reports a policy's gain,
  // so g*(s) >= state_gain[s] - state_gain_error (kMinimize: <= ... +) in any case.
  std::vector<double> state_gain;
  // True iff max_s state_gain[s] - min_s state_gain[s] > options.tolerance: the optimal gain
  // differs between states. Only policy iteration returns such solutions.
  bool multichain_gain = false;
  // A bound on |state_gain[s] - g^pi(s)| for every s. One gain for all states: (gain_upper -
  // gain_lower) / 2, which bounds |gain - g*(s)|. Otherwise, for the evaluated policy pi:
  // on a recurrent class C, g^pi = pi_C (r + P h - h) differs from the computed class gain
  // by at most max_C |r + P h - h - g|; on the transient states add the gain system's
  // residual times the expected time to absorption (bounded from a solve of its own), plus
  // a rounding allowance. The solves aim at residuals that keep it near options.tolerance /
  // 100 (the transient gains' aim is divided by the absorption time, a direct solve taking
  // over when that is below the iterative solver's rounding floor and its factors fit the
  // memory budget of internal/mmatrix_lu.h).
  double state_gain_error = 0.0;
  // Residual of (ME1)-(ME2) at (state_gain, bias): the larger of
  // max_s |best_a sum p state_gain - state_gain[s]| and
  // max_s |best q over the gain-keeping rows of s - state_gain[s] - bias[s]| over non-terminal
  // s, plus a rounding allowance. It measures how well the equations hold, not the distance
  // to g* (a slowly mixing chain can amplify it). One gain for all states: (gain_upper -
  // gain_lower) / 2, which bounds the residual of (OE) at (gain, bias).
  double optimality_residual = 0.0;

  // A bias. One gain for all states: h with best_a q(s, a) - h(s) in [gain_lower, gain_upper]
  // for every non-terminal s, so it solves (OE) up to the bracket width. Gain differing
  // between states: h solving (ME2) with g = state_gain up to optimality_residual.
  // bias[reference_state] = 0 in both cases. (OE) and (ME2) say nothing about a terminal
  // state's own bias. When the equations have solutions that differ by more than a constant
  // (e.g. several optimal policies with different recurrent classes) the two methods may
  // return different ones.
  StateId reference_state = 0;
  std::vector<double> bias;  // Per state.
  std::vector<double> q;     // Per row: r(s, a) + sum p h (relative action values).
  // A row keeps the gain iff |sum p state_gain - state_gain[s]| <= options.tie_tolerance +
  // 1e-11 max(1, max_s |state_gain[s]|) + 2 state_gain_error (if no row of s does, which only
  // a run stopped early can show: the rows within that of the best sum p state_gain). One
  // gain for all states: every row keeps it, and all rows take part below.
  // Per state: the first row (document order) that keeps the gain and whose q is within
  // options.tie_tolerance of the best q among the rows that keep the gain; -1 for terminal
  // states.
  std::vector<RowId> best_row;
  // Per row: 1 iff the row keeps the gain and its q is within tie_tolerance (below) of the
  // best q among the rows of its state that keep the gain.
  std::vector<uint8_t> optimal_row;
  // Per state: |best q - second best q| among the rows that keep the gain; NaN with fewer
  // than 2 such rows.
  std::vector<double> action_gap;
  int64_t tied_states = 0;  // States whose optimal set has two or more rows.
  // options.tie_tolerance + 2 optimality_residual (with one gain for all states this is
  // options.tie_tolerance + (gain_upper - gain_lower)). With one gain: a policy taking only
  // rows in the optimal sets has gain within 2 (gain_upper - gain_lower) +
  // options.tie_tolerance of g* (plus rounding, 1e-12 max(1, |best q|)), by the argument of
  // the header comment.
  double tie_tolerance = 0.0;
  // pi = the best_row policy. One gain for all states: g* - g^pi(s) <= policy_loss_bound for
  // every s (kMinimize: g^pi(s) - g*(s)); the bracket width plus the pick's slack. Gain
  // differing between states: max_s (state_gain[s] - g^pi(s)) (kMinimize: the reverse) by an
  // exact evaluation of pi (skipped, giving 0, when pi is the evaluated policy), plus
  // optimality_residual: an estimate as good as the evaluation, not a certificate; NaN if
  // that evaluation was cut short (cancel, the time limit) or could not be done.
  double policy_loss_bound = 0.0;

  // Chain structure of the best_row policy.
  bool multichain_suspected = false;                    // Two or more recurrent classes.
  std::vector<std::vector<StateId>> recurrent_classes;  // Sorted; ordered by first state.
  std::string chain_structure_note;                     // Plain words; empty if unichain.
};

// Relative value iteration on the aperiodicity-transformed model (options.aperiodicity):
// v <- T'v - (T'v)(reference_state), stopping when the bracket of v (the span of T'v - v)
// is at most options.tolerance, or at a limit, on cancel, or when the width stalls.
// With aperiodicity > 0 it converges on unichain models (Puterman 1994, sec. 8.5, from
// memory); with 0 it may stall on periodic chains, the bracket still valid.
// Returns kInvalidArgument for bad options and kFailedPrecondition, naming the classes and
// pointing to policy iteration, when it finds the optimal gain differs between states (see
// the .cc for the test used). A returned solution has multichain_gain false.
// `progress` and `cancel` may be null; progress is called once per iteration from this thread.
Result<AverageRewardSolution> RelativeValueIteration(const Model& m,
                                                     const AverageRewardOptions& options,
                                                     const ProgressFn* progress,
                                                     const CancelToken* cancel);

// Policy iteration for the average criterion, unichain or multichain. Each policy is
// evaluated exactly, one recurrent class at a time: g + h(s) = r_pi(s) + sum P_pi h on the
// class with h = 0 at its smallest state (a sparse system in which g takes that state's
// unknown), then the transient states, whose gain is the absorption-weighted class gains
// (Eigen's sparse LU up to 3,000 unknowns; beyond, the M-matrix factors of
// internal/mmatrix_lu.h when their counted fill fits the budget, else BiCGSTAB). The bias is
// solved pinned at the class's most visited state, then shifted to 0 at its smallest state.
// After a factored evaluation, improvement looks 64 Gauss-Seidel sweeps ahead (the gain
// cannot drop, and no look-ahead step returns to a policy already evaluated, so the loop
// ends). Improvement first seeks a better
// gain (best_a sum p g) and, when no state finds one, a better q among the actions that keep
// the gain, keeping the current action unless another beats it by more than a small slack:
// Howard's method, in its multichain form (Puterman 1994, sec. 9.2, from memory), which
// reduces to the unichain method when every policy has one class. When the final gain is
// the same in every state (within options.tolerance) the solution reads as for relative
// value iteration and kConverged means the bracket is within options.tolerance; otherwise
// multichain_gain is set, state_gain holds each state's optimal gain, and kConverged means
// the policy is stable and optimality_residual and state_gain_error are within
// options.tolerance.
// Returns kInvalidArgument for bad options; kResourceExhausted if memory runs out; kInternal
// if the first policy's evaluation fails. A later policy that cannot be evaluated in double
// precision is retried with half of its switches, and the run ends kStalled if even one
// switch cannot be. A run that ends kStalled (or whose first evaluation fails) is followed
// by a second, within what is left of the time and iteration limits, from the discounted
// optimum at a discount near 1 (average_reward.cc, DiscountedWarmStart); the solution
// counts both runs' iterations, sweeps and time, and is the second's unless that one
// certified a wider bracket. The time limit and cancel are heard inside an evaluation too.
// A run stopped early returns the evaluated bias with the narrowest bracket, which is valid.
// options.aperiodicity is not used.
// `progress` (may be null) is called once per improvement.
Result<AverageRewardSolution> AverageRewardPolicyIteration(const Model& m,
                                                           const AverageRewardOptions& options,
                                                           const ProgressFn* progress,
                                                           const CancelToken* cancel);

// The method `auto`. Up to kAutomaticPreludeMinStates states: AverageRewardPolicyIteration
// (each evaluation a small exact solve). Beyond, relative value iteration runs first as a
// prelude: at sweep counts 16, 32, 64, ... it goes on only while the bracket's width, shrinking
// at the rate of the last half of the run, would reach the tolerance within
// kAutomaticPreludeSweeps sweeps in all, and it hands over at that many sweeps in any case.
// Its solution is returned if it converged or stopped at the time limit or on cancel.
// Otherwise (handed over, stalled, at options.max_iterations, or evidence that the gain
// differs between states) AverageRewardPolicyIteration runs in what is left of the time
// limit, with options.max_iterations improvements, and its solution is returned, its sweeps
// and solve_seconds counting the prelude's too; but if policy iteration fails, or stops at a
// limit or on cancel with a wider bracket than the prelude's values give, the prelude's
// solution is returned (outcome: what stopped policy iteration).
// `method` says which one answered. Relative value iteration converges in a few dozen sweeps
// where chains mix fast (next states anywhere), and there policy iteration's evaluations are
// long Krylov solves: on the benchmark's 1,000,000-state random model it converged in 3.5 s
// where policy iteration took 20 s. Where chains mix slowly (rings, grids, inventories) the
// bracket shrinks slowly from the start and the prelude hands over after 16 to 32 sweeps.
inline constexpr StateId kAutomaticPreludeMinStates = 3000;
inline constexpr int64_t kAutomaticPreludeSweeps = 512;
Result<AverageRewardSolution> AverageRewardAutomatic(const Model& m,
                                                     const AverageRewardOptions& options,
                                                     const ProgressFn* progress,
                                                     const CancelToken* cancel);

// Recurrent classes of the Markov chain of the deterministic policy `rows` (rows[s] is a row
// of s, or -1 exactly for terminal states): the closed strongly connected components of its
// transition graph, each sorted, ordered by their smallest state. Iterative (no recursion).
// REQUIRES: rows.size() == m.num_states().
std::vector<std::vector<StateId>> RecurrentClasses(const Model& m, std::span<const RowId> rows);

}  // namespace mdp

#endif  // MDP_SOLVER_AVERAGE_REWARD_H_
