// Simulation: Monte Carlo rollouts of a fixed policy on a Model from a start distribution.
// Reports the spread of the return under the model's criterion (mean, standard deviation, a
// confidence interval of the mean, quantiles), episode lengths and how often each state was
// visited. Simulate() is a pure function of its inputs: it owns its random stream, runs on the
// calling thread and returns a report the caller owns; it is safe to call from any number of
// threads at once.
//
// What a step earns. A compiled Model keeps only the expected immediate reward r(s, a) of each
// state action, not the distribution of rewards within a step, so a step earns r(S_t, A_t),
// with S_t, A_t sampled from the policy and the transitions. The expectation of each such
// term is the same as that of the sampled reward, so the mean agrees with exact evaluation
// (criterion_eval.h) as stated below; the spread reflects the randomness of states and actions
// only, not reward noise within a step. An episode's return, by criterion:
//  - kDiscounted (discount g): R = sum_{t < L} g^t r_t, L the step at which a terminal state is
//    reached (or max_steps). E[R] = V^pi(start) when no episode is cut short.
//  - kTotal: R = sum_{t < L} r_t, undiscounted, L as above (the model's discount is not used).
//    E[R] = V^pi(start) when no episode is cut short, which needs pi proper from the start.
//  - kFiniteHorizon (horizon H, discount g, terminal values V_H): exactly H steps (max_steps is
//    not used; an episode that reaches a terminal state earlier stops there, earning 0 from then
//    on), R = sum_{t < H} g^t r_t + g^H V_H(S_H). E[R] = V^pi_0(start) exactly. A Solution is
//    simulated with its stage-dependent decisions (the Simulate overload below).
//  - kAverage: R = (1/N) sum_{t < N} r_t with N = max_steps, a terminal state absorbing with
//    reward 0 (the episode stops there; its remaining steps count 0). E[R] tends to the gain
//    g^pi(start) as N grows: E[R] - g^pi(start) = (h(start) - E h(S_N)) / N for the policy's bias
//    h (sum_{t<N} P^t (r - g) = sum_{t<N} P^t (I - P) h = h - P^N h; Puterman 1994, sec. 8.2,
//    from memory), at most span(h) / N; starting from a stationary distribution it is 0.
//
// Truncation. kDiscounted: an episode cut at max_steps misses sum_{t >= max_steps} g^t r_t, at
// most truncation_bound = g^max_steps * max|r| / (1 - g) in size (max over the rows the policy
// may take). The mean is therefore biased by at most P(cut) * truncation_bound, estimated as
// truncation_bias_bound; callers should warn when that is not small against the confidence
// interval. kTotal: without discounting no bound exists (what follows step max_steps is not
// geometrically small, and an improper policy never stops), so truncation_bound is +infinity
// and truncation_bias_bound is +infinity as soon as one episode was cut (0 otherwise);
// truncated_episodes says how many were. kFiniteHorizon: nothing is cut (all 0). kAverage: every
// episode runs its N steps by definition (truncated_episodes 0); the gap to the gain above is
// not computed here (truncation_bound and truncation_bias_bound NaN).
//
// Reproducibility. One std::mt19937_64 seeded with options.seed drives every draw, in episode
// order, and uniforms are made from its raw 64-bit output (not std::uniform_real_distribution,
// whose algorithm varies between standard libraries), so the same inputs give the same
// episodes with any compiler and library, and the same report (apart from elapsed_seconds)
// from the same build.
#ifndef MDP_SOLVER_SIMULATE_H_
#define MDP_SOLVER_SIMULATE_H_

#include <array>
#include <cstdint>
#include <string_view>
#include <vector>

#include "solver/model.h"
#include "solver/options.h"
#include "solver/policy.h"
#include "solver/progress.h"
#include "solver/solution.h"
#include "solver/status.h"

namespace mdp {

// One state of the start distribution and its probability.
struct StartWeight {
  StateId state = 0;
  double probability = 1.0;
};

// Tolerance on |sum of start probabilities - 1|.
inline constexpr double kStartSumTolerance = 1e-6;

struct SimulateOptions {
  std::vector<StartWeight> start;  // Start distribution; a state may appear more than once.
  int64_t episodes = 10000;        // Episodes to run.
  // An episode ends at a terminal state or after this many steps (kAverage: N; kFiniteHorizon
  // ignores it and runs the horizon).
  int64_t max_steps = 1000;
  uint64_t seed = 1;               // Seed of the random stream; same seed, same report.
  double confidence = 0.95;        // Level of the confidence interval of the mean, in (0, 1).
  std::vector<double> quantiles = {0.05, 0.25, 0.5, 0.75, 0.95};  // Levels in [0, 1].
};

// Bounds of the numeric SimulateOptions fields (confidence is open at both ends).
inline constexpr std::array<OptionBound, 3> kSimulateOptionBounds = {{
    {"episodes", "episodes to run (each return is stored for the quantiles: 8 bytes each)",
     10000, 1, 1e8},
    {"max_steps", "steps after which an episode is cut short", 1000, 1, 1e9},
    {"confidence", "level of the confidence interval of the mean, strictly between 0 and 1",
     0.95, 0, 1},
}};

enum class SimulationOutcome {
  kCompleted,  // All requested episodes ran.
  kCancelled,  // The CancelToken fired; the report covers the episodes finished before.
};

std::string_view SimulationOutcomeName(SimulationOutcome outcome);  // "completed", ...

struct QuantileValue {
  double level = 0.0;  // q in [0, 1].
  double value = 0.0;  // The smallest return x such that at least q * episodes returns are <= x.
};

// Statistics over the episodes run. Fields that need at least one episode (mean, min, max,
// quantiles) or two (std_dev, std_error, the interval) are NaN when there are fewer.
struct SimulationReport {
  SimulationOutcome outcome = SimulationOutcome::kCompleted;
  CriterionKind criterion = CriterionKind::kDiscounted;  // The model's; says what R is.
  int64_t episodes = 0;  // Episodes run to their end (requested ones unless cancelled).

  double mean = 0.0;       // Mean return R (header comment; kAverage: reward per step).
  double std_dev = 0.0;    // Sample standard deviation of the return (divisor episodes - 1).
  double std_error = 0.0;  // std_dev / sqrt(episodes).
  // Normal-approximation interval: mean -/+ z * std_error with Phi(z) = (1 + confidence) / 2.
  double ci_low = 0.0;
  double ci_high = 0.0;
  double min = 0.0;
  double max = 0.0;
  std::vector<QuantileValue> quantiles;  // In the order of options.quantiles.

  // Mean steps per episode taken in non-terminal states (cut episodes count max_steps).
  double mean_length = 0.0;
  // Episodes cut at max_steps in a non-terminal state (kDiscounted, kTotal; else 0).
  int64_t truncated_episodes = 0;
  // kDiscounted: g^max_steps * max|r| / (1 - g); other criteria: see the header comment.
  double truncation_bound = 0.0;
  // kDiscounted: truncated_episodes / episodes * truncation_bound (0 with no episodes): the
  // observed fraction of cut episodes times the bound, an estimate of how far cutting can move
  // the mean. Other criteria: see the header comment.
  double truncation_bias_bound = 0.0;

  // Steps taken, and per state the steps taken from it (terminal states stay 0). After a
  // cancellation these include the steps of the episode that was interrupted.
  int64_t total_steps = 0;
  std::vector<int64_t> visits;
  std::vector<double> visit_frequency;  // visits / total_steps (all 0 when no step was taken).

  double elapsed_seconds = 0.0;  // Wall time of the call.
};

// OK iff `options` can be simulated on `m`: a non-empty start whose states exist and whose
// probabilities are finite, non-negative and sum to 1 within kStartSumTolerance, the numeric
// fields within kSimulateOptionBounds, and quantile levels in [0, 1]. Else kInvalidArgument
// naming the field.
Status CheckSimulateOptions(const Model& m, const SimulateOptions& options);

// Runs options.episodes episodes of the stationary `policy` on `m` (kFiniteHorizon: the same
// decisions at every stage). Returns kInvalidArgument if the policy is
// malformed (CheckPolicy) or the options are (CheckSimulateOptions), kResourceExhausted if
// memory runs out. Cancellation is a successful call with outcome kCancelled. `progress` (may
// be null) is called from this thread about every 1% of the episodes with iteration = episodes
// finished and phase "simulate" (other numeric fields 0); `cancel` (may be null) is polled
// before the first episode, at the same points, and every 65536 steps within an episode.
Result<SimulationReport> Simulate(const Model& m, const Policy& policy,
                                  const SimulateOptions& options,
                                  const ProgressFn* progress = nullptr,
                                  const CancelToken* cancel = nullptr);

// Runs options.episodes episodes of the decisions of `solution`, a Solution of `m` (Solve()):
// for kFiniteHorizon the stage-dependent pick (DecideAtStage in solver.h: the first optimal
// row at stage t, t steps into the episode), otherwise the stationary pick best_row (the same
// episodes as Simulate(m, GreedyPolicy(m, solution), ...)). Returns kInvalidArgument as above,
// and if `solution` does not match the model (criterion, size; kFiniteHorizon: without the
// whole stage table) or, for kTotal, a start state has no decision (it cannot reach a goal
// w.p. 1). Progress and cancel as above.
Result<SimulationReport> Simulate(const Model& m, const Solution& solution,
                                  const SimulateOptions& options,
                                  const ProgressFn* progress = nullptr,
                                  const CancelToken* cancel = nullptr);

}  // namespace mdp

#endif  // MDP_SOLVER_SIMULATE_H_
