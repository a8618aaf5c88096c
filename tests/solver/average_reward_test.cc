// Checks of the average-reward solvers (solver/average_reward.h) against answers from outside
// the project: closed forms derived here, a published worked example (named beside its
// check), independent linear programs solved by SciPy's HiGHS (tests/reference/
// average_lp_check.py for one gain, multichain_lp_check.py for per-state gains, run through
// /usr/bin/python3), and, for small multichain models, every deterministic stationary policy
// enumerated and evaluated here with dense Eigen algebra (limiting matrices by repeated
// squaring, a method the solver does not use).
#include <gtest/gtest.h>
#include <sys/wait.h>

#include <Eigen/Dense>
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <limits>
#include <optional>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::Out;
using testing::SpecWriter;

using AverageSolver = Result<AverageRewardSolution> (*)(const Model&, const AverageRewardOptions&,
                                                        const ProgressFn*, const CancelToken*);
struct NamedSolver {
  const char* name;
  AverageSolver solve;
};
constexpr NamedSolver kSolvers[] = {{"relative_value_iteration", &RelativeValueIteration},
                                    {"policy_iteration", &AverageRewardPolicyIteration}};

AverageRewardOptions Tight() {
  AverageRewardOptions options;
  options.tolerance = 1e-11;
  return options;
}

// A seeded random model in which every row moves to state 0 with probability at least 0.05.
// State 0 is then reachable in one step from everywhere under every policy, so every policy
// has exactly one recurrent class (the one containing state 0): the model is unichain.
ModelSpec RandomUnichainSpec(uint64_t seed, StateId states, Objective objective) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.name = "unichain-" + std::to_string(seed);
  spec.objective = objective;
  spec.criterion.discount = 0.5;  // Ignored by the average-reward solvers.
  for (int a = 0; a < 4; ++a) spec.action_names.push_back("a" + std::to_string(a));
  for (StateId s = 0; s < states; ++s) {
    spec.AddState("s" + std::to_string(s));
    const int actions = 1 + static_cast<int>(rng() % 4);
    for (int a = 0; a < actions; ++a) {
      spec.AddStateAction(a, 10.0 * (2.0 * unit(rng) - 1.0));
      const double to_zero = 0.05 + 0.25 * unit(rng);
      spec.AddOutcome(0, to_zero, 0.0);
      const int outcomes = 1 + static_cast<int>(rng() % 5);
      std::vector<double> w(outcomes);
      double sum = 0.0;
      for (double& x : w) sum += (x = unit(rng) + 1e-3);
      for (double x : w) {
        spec.AddOutcome(static_cast<StateId>(rng() % states), (1.0 - to_zero) * x / sum,
                        2.0 * unit(rng) - 1.0);
      }
    }
  }
  return spec;
}

// Writes `m` in the text format of the reference scripts (tests/reference/*.py).
void WriteReferenceModel(const Model& m, const std::string& path) {
  std::ofstream out(path);
  out.precision(17);
  out << "average-reward-model " << m.num_states() << " " << m.num_rows() << " "
      << (m.objective() == Objective::kMaximize ? "maximize" : "minimize") << "\n";
  for (StateId s = 0; s < m.num_states(); ++s) {
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      out << s << " " << m.row_reward(r) << " " << (m.entry_end(r) - m.entry_begin(r));
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        out << " " << m.entry_next(e) << " " << m.entry_probability(e);
      }
      out << "\n";
    }
  }
}

// The output of /usr/bin/python3 tests/reference/`script` run on `m`, or nullopt with *skip
// set if SciPy is missing. Records a failure if the script fails otherwise.
std::optional<std::string> RunReference(const std::string& script, const Model& m,
                                        const std::string& tag, bool* skip) {
  *skip = false;
  const std::string path = ::testing::TempDir() + "reference_" + script + "_" + tag + ".txt";
  WriteReferenceModel(m, path);
  const std::filesystem::path script_path =
      std::filesystem::path(__FILE__).parent_path().parent_path() / "reference" / script;
  const std::string command = "/usr/bin/python3 " + script_path.string() + " " + path + " 2>&1";
  FILE* pipe = popen(command.c_str(), "r");
  if (pipe == nullptr) {
    ADD_FAILURE() << "cannot run " << command;
    return std::nullopt;
  }
  std::string output;
  char buffer[512];
  while (fgets(buffer, sizeof buffer, pipe) != nullptr) output += buffer;
  const int status = pclose(pipe);
  std::filesystem::remove(path);
  if (WIFEXITED(status) && WEXITSTATUS(status) == 3) {
    *skip = true;
    return std::nullopt;
  }
  if (status != 0) {
    ADD_FAILURE() << command << " failed: " << output;
    return std::nullopt;
  }
  return output;
}

// The optimal gain of unichain `m` from the LP of tests/reference/average_lp_check.py.
std::optional<double> LpGain(const Model& m, const std::string& tag, bool* skip) {
  const std::optional<std::string> output = RunReference("average_lp_check.py", m, tag, skip);
  double gain = 0.0;
  if (!output.has_value()) return std::nullopt;
  if (std::sscanf(output->c_str(), "gain %lf", &gain) != 1) {
    ADD_FAILURE() << "unexpected output: " << *output;
    return std::nullopt;
  }
  return gain;
}

// Per-state optimal gains of `m` from the multichain LP of
// tests/reference/multichain_lp_check.py.
std::optional<std::vector<double>> LpStateGains(const Model& m, const std::string& tag,
                                                bool* skip) {
  const std::optional<std::string> output =
      RunReference("multichain_lp_check.py", m, tag, skip);
  if (!output.has_value()) return std::nullopt;
  std::istringstream in(*output);
  std::string word;
  std::vector<double> gains(m.num_states());
  in >> word;
  for (double& g : gains) in >> g;
  if (word != "gains" || !in) {
    ADD_FAILURE() << "unexpected output: " << *output;
    return std::nullopt;
  }
  return gains;
}

// Howard 1960, Dynamic Programming and Markov Processes, the toymaker under the average
// criterion (from memory): state 1 "successful toy", state 2 "unsuccessful toy". In state 1,
// no advertising moves to (1, 2) w.p. (0.5, 0.5) with rewards (9, 3); advertising w.p.
// (0.8, 0.2) with rewards (4, 4). In state 2, no research w.p. (0.4, 0.6) with rewards
// (3, -7); research w.p. (0.7, 0.3) with rewards (1, -19). Howard's answer: advertise and do
// research, gain 2, relative values v1 = 10, v2 = 0 (from memory). The test derives them.
TEST(AverageRewardTest, HowardToymaker) {
  for (double discount : {0.9, 0.0}) {  // The discount must be ignored.
    SCOPED_TRACE(discount);
    SpecWriter w(discount, Objective::kMaximize);
    w.States({"successful", "unsuccessful"}, {});
    w.Action("successful", "no_advertising", {{"successful", 0.5, 9}, {"unsuccessful", 0.5, 3}});
    w.Action("successful", "advertising", {{"successful", 0.8, 4}, {"unsuccessful", 0.2, 4}});
    w.Action("unsuccessful", "no_research", {{"successful", 0.4, 3}, {"unsuccessful", 0.6, -7}});
    w.Action("unsuccessful", "research", {{"successful", 0.7, 1}, {"unsuccessful", 0.3, -19}});
    const Model m = w.Build();
    // Policy (advertising, research): P = [[0.8, 0.2], [0.7, 0.3]], r = (4, -5). The
    // stationary distribution of a two-state chain is (p21, p12) / (p12 + p21).
    const double p12 = 0.2, p21 = 0.7, r1 = 4.0, r2 = 0.7 * 1 + 0.3 * -19;
    const double gain = (p21 * r1 + p12 * r2) / (p12 + p21);
    // Bias with h(2) = 0: g + h1 = r1 + 0.8 h1.
    const double h1 = (r1 - gain) / (1.0 - 0.8);
    EXPECT_NEAR(gain, 2.0, 1e-12);  // Howard's published gain.
    EXPECT_NEAR(h1, 10.0, 1e-12);   // Howard's published relative value.
    // The other three policies earn less (same formula): (no adv., no res.) gives 1.
    const double other = (0.4 * 6.0 + 0.5 * -3.0) / (0.5 + 0.4);
    EXPECT_NEAR(other, 1.0, 1e-12);
    for (const NamedSolver& solver : kSolvers) {
      SCOPED_TRACE(solver.name);
      AverageRewardOptions options = Tight();
      options.reference_state = 1;
      Result<AverageRewardSolution> s = solver.solve(m, options, nullptr, nullptr);
      ASSERT_OK(s);
      EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
      EXPECT_NEAR(s->gain, gain, 1e-10);
      EXPECT_LE(s->gain_lower, gain + 1e-12);
      EXPECT_GE(s->gain_upper, gain - 1e-12);
      EXPECT_EQ(s->reference_state, 1);
      EXPECT_EQ(s->bias[1], 0.0);
      EXPECT_NEAR(s->bias[0], h1, 1e-8);
      EXPECT_EQ(m.row_action_name(s->best_row[0]), "advertising");
      EXPECT_EQ(m.row_action_name(s->best_row[1]), "research");
      // q = r + P h: no advertising 6 + 0.5 h1, no research -3 + 0.4 h1.
      EXPECT_NEAR(s->q[0], 6.0 + 0.5 * h1, 1e-8);
      EXPECT_NEAR(s->q[1], gain + h1, 1e-8);
      EXPECT_NEAR(s->q[2], -3.0 + 0.4 * h1, 1e-8);
      EXPECT_NEAR(s->q[3], gain, 1e-8);
      EXPECT_NEAR(s->action_gap[0], gain + h1 - (6.0 + 0.5 * h1), 1e-8);
      EXPECT_FALSE(s->multichain_suspected);
      EXPECT_EQ(s->recurrent_classes, (std::vector<std::vector<StateId>>{{0, 1}}));
      EXPECT_TRUE(s->chain_structure_note.empty());
      // One gain for all states: state_gain repeats it and the flag is off.
      EXPECT_FALSE(s->multichain_gain);
      EXPECT_EQ(s->state_gain, (std::vector<double>{s->gain, s->gain}));
      EXPECT_LE(s->optimality_residual, 1e-10);
    }
  }
}

// Two states that swap deterministically, earning r1 and r2: the chain has period 2 and the
// gain is (r1 + r2) / 2 (each state is visited every other step). Bias with h(a) = 0:
// g + h(a) = r1 + h(b) gives h(b) = g - r1. Plain relative value iteration (no transformation)
// sees d alternate between (r1, r2) and never narrows the bracket; the transformed one does.
TEST(AverageRewardTest, PeriodicChainNeedsTheAperiodicityTransformation) {
  const double r1 = 4.0, r2 = -1.0, gain = (r1 + r2) / 2.0;
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"a", "b"}, {});
  w.Action("a", "swap", {{"b", 1.0, r1}});
  w.Action("b", "swap", {{"a", 1.0, r2}});
  const Model m = w.Build();

  AverageRewardOptions plain = Tight();
  plain.aperiodicity = 0.0;
  plain.max_iterations = 1000;
  Result<AverageRewardSolution> oscillating = RelativeValueIteration(m, plain, nullptr, nullptr);
  ASSERT_OK(oscillating);
  EXPECT_NE(oscillating->outcome, SolveOutcome::kConverged);
  EXPECT_NEAR(oscillating->gain_upper - oscillating->gain_lower, r1 - r2, 1e-9);
  EXPECT_LE(oscillating->gain_lower, gain);
  EXPECT_GE(oscillating->gain_upper, gain);

  for (const NamedSolver& solver : kSolvers) {
    SCOPED_TRACE(solver.name);
    Result<AverageRewardSolution> s = solver.solve(m, Tight(), nullptr, nullptr);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    EXPECT_NEAR(s->gain, gain, 1e-10);
    EXPECT_EQ(s->bias[0], 0.0);
    EXPECT_NEAR(s->bias[1], gain - r1, 1e-8);
    EXPECT_EQ(s->recurrent_classes, (std::vector<std::vector<StateId>>{{0, 1}}));
  }
}

// Closed form with a threshold choice: a machine at wear level k = 0..9 either runs (earns
// 10 - 2k, wear k + 1) or is replaced (costs 15, back to level 0); at level 9 it must be
// replaced. Replacing at level m makes the cycle 0, 1, ..., m of m + 1 steps, so
//   gain(m) = (sum_{k<m} (10 - 2k) - 15) / (m + 1) = (10m - m(m - 1) - 15) / (m + 1),
// and every policy's recurrent class is the cycle of its first replacement level, so
// g* = max_m gain(m): by hand m = 4 with gain (40 - 12 - 15) / 5 = 2.6 (m = 3: 2.25,
// m = 5: 2.5). The cycles are periodic, so this also exercises the transformation.
TEST(AverageRewardTest, ReplacementThreshold) {
  const int levels = 10;
  const double income = 10.0, wear_cost = 2.0, replace = 15.0;
  auto cycle_gain = [&](int m) {
    return (m * income - wear_cost * m * (m - 1) / 2.0 - replace) / (m + 1);
  };
  int best_m = 0;
  for (int m = 1; m < levels; ++m) {
    if (cycle_gain(m) > cycle_gain(best_m)) best_m = m;
  }
  ASSERT_EQ(best_m, 4);
  EXPECT_NEAR(cycle_gain(4), 2.6, 1e-12);
  SpecWriter w(0.9, Objective::kMaximize);
  std::vector<std::string> names;
  for (int k = 0; k < levels; ++k) names.push_back("wear" + std::to_string(k));
  w.States(names, {});
  for (int k = 0; k < levels; ++k) {
    if (k + 1 < levels) w.Action(names[k], "run", {{names[k + 1], 1.0, income - wear_cost * k}});
    w.Action(names[k], "replace", {{names[0], 1.0, -replace}});
  }
  const Model m = w.Build();
  for (const NamedSolver& solver : kSolvers) {
    SCOPED_TRACE(solver.name);
    Result<AverageRewardSolution> s = solver.solve(m, Tight(), nullptr, nullptr);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    EXPECT_NEAR(s->gain, cycle_gain(best_m), 1e-9);
    for (int k = 0; k <= best_m; ++k) {
      EXPECT_EQ(m.row_action_name(s->best_row[k]), k < best_m ? "run" : "replace") << k;
    }
    ASSERT_EQ(s->recurrent_classes.size(), 1u);
    EXPECT_EQ(s->recurrent_classes[0], (std::vector<StateId>{0, 1, 2, 3, 4}));
    EXPECT_LE(s->policy_loss_bound, 1e-8);
  }
}

// A path into a terminal state: the terminal state is absorbing with reward 0, so the gain is
// 0 and, with the terminal state as reference, h(s1) = r1 and h(s0) = r0 + r1.
TEST(AverageRewardTest, TerminalStateIsAbsorbingWithZeroReward) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"s0", "s1", "end"}, {false, false, true});
  w.Action("s0", "go", {{"s1", 1.0, 3.0}});
  w.Action("s1", "go", {{"end", 1.0, 5.0}});
  const Model m = w.Build();
  for (const NamedSolver& solver : kSolvers) {
    SCOPED_TRACE(solver.name);
    AverageRewardOptions options = Tight();
    options.reference_state = 2;
    Result<AverageRewardSolution> s = solver.solve(m, options, nullptr, nullptr);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    EXPECT_NEAR(s->gain, 0.0, 1e-10);
    EXPECT_NEAR(s->bias[1], 5.0, 1e-8);
    EXPECT_NEAR(s->bias[0], 8.0, 1e-8);
    EXPECT_EQ(s->best_row[2], -1);
    EXPECT_EQ(s->recurrent_classes, (std::vector<std::vector<StateId>>{{2}}));
  }
}

// Independent check: random unichain models against the LP of tests/reference. (Kept
// small: HiGHS needs seconds for a few thousand states; ResetChainBeyondDirectSolves covers
// large models.)
TEST(AverageRewardTest, MatchesLinearProgramOnRandomUnichainModels) {
  const StateId sizes[] = {5, 20, 60, 150, 300, 40};
  for (int seed = 0; seed < 6; ++seed) {
    const Objective objective = seed % 2 == 0 ? Objective::kMaximize : Objective::kMinimize;
    SCOPED_TRACE(seed);
    const Model m = testing::MustBuild(RandomUnichainSpec(seed + 1, sizes[seed], objective));
    bool skip = false;
    const std::optional<double> lp = LpGain(m, std::to_string(seed), &skip);
    if (skip) GTEST_SKIP() << "/usr/bin/python3 has no scipy; LP reference unavailable";
    ASSERT_TRUE(lp.has_value());
    for (const NamedSolver& solver : kSolvers) {
      SCOPED_TRACE(solver.name);
      Result<AverageRewardSolution> s = solver.solve(m, Tight(), nullptr, nullptr);
      ASSERT_OK(s);
      EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
      EXPECT_NEAR(s->gain, *lp, 1e-6);
      EXPECT_LE(s->gain_lower, *lp + 1e-7);
      EXPECT_GE(s->gain_upper, *lp - 1e-7);
      EXPECT_FALSE(s->multichain_suspected);
      EXPECT_FALSE(s->multichain_gain);
      ASSERT_EQ(s->state_gain.size(), static_cast<size_t>(m.num_states()));
      for (double g : s->state_gain) EXPECT_NEAR(g, *lp, 1e-6);
    }
  }
}

// A seeded ring on which the chain moves slowly: every row goes to 8 states drawn within
// `reach` of s either way (weights uniform), earning a reward uniform in [0, 1). The best
// policies gather the chain where rewards are high; many policies on the way have several
// such places, each kept for longer than a double can count. Policy iteration started from
// the greedy policy alone stalls on the first two rings of the test below (reported gains of
// 3.3e5 and 4.9e13); the third, of reach 1, it solves either way.
ModelSpec SlowRingSpec(uint64_t seed, StateId states, int reach) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.name = "slow-ring-" + std::to_string(seed);
  spec.criterion.discount = 0.5;  // Ignored by the average-reward solvers.
  for (int a = 0; a < 4; ++a) spec.action_names.push_back("a" + std::to_string(a));
  for (StateId s = 0; s < states; ++s) {
    spec.AddState("s" + std::to_string(s));
    for (int a = 0; a < 4; ++a) {
      spec.AddStateAction(a, unit(rng));
      std::vector<double> w(8);
      double sum = 0.0;
      for (double& x : w) sum += (x = unit(rng) + 1e-3);
      for (double x : w) {
        const int64_t offset = static_cast<int64_t>(rng() % (2 * reach + 1)) - reach;
        spec.AddOutcome(static_cast<StateId>((s + offset + states) % states), x / sum, 0.0);
      }
    }
  }
  return spec;
}

TEST(AverageRewardTest, PolicyIterationSolvesSlowlyMixingRings) {
  struct Ring {
    uint64_t seed;
    StateId states;
    int reach;
  };
  for (const Ring ring : {Ring{1, 2000, 4}, Ring{2, 3000, 2}, Ring{3, 4000, 1}}) {
    SCOPED_TRACE(ring.seed);
    const Model m = testing::MustBuild(SlowRingSpec(ring.seed, ring.states, ring.reach));
    bool skip = false;
    const std::optional<double> lp = LpGain(m, "ring" + std::to_string(ring.seed), &skip);
    if (skip) GTEST_SKIP() << "/usr/bin/python3 has no scipy; LP reference unavailable";
    ASSERT_TRUE(lp.has_value());
    AverageRewardOptions options;
    options.tolerance = 1e-8;
    // Progress goes on counting through the second run (from the discounted warm start).
    std::vector<int64_t> iterations;
    const ProgressFn progress = [&](const Progress& p) { iterations.push_back(p.iteration); };
    Result<AverageRewardSolution> s = AverageRewardPolicyIteration(m, options, &progress, nullptr);
    ASSERT_OK(s);
    ASSERT_FALSE(iterations.empty());
    EXPECT_TRUE(std::is_sorted(iterations.begin(), iterations.end()));
    EXPECT_LE(iterations.back(), s->iterations);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    EXPECT_NEAR(s->gain, *lp, 1e-7);
    EXPECT_LE(s->gain_lower, *lp + 1e-7);
    EXPECT_GE(s->gain_upper, *lp - 1e-7);
    EXPECT_LE(s->gain_upper - s->gain_lower, 1e-8);
    EXPECT_FALSE(s->multichain_gain);
  }
}

// Closed form on a model too large for the direct solves (n > direct_max_states, so policy
// iteration evaluates with BiCGSTAB): in state k = 1..n-2, "advance" earns k and moves to
// k + 1 w.p. a, else back to 0; state n-1 earns n-1 and returns to 0. In state 0, "start"
// earns 0 and moves to 1 w.p. a (else stays), while "wait" earns w and stays. With "start"
// the stationary distribution is pi_k = (1 - a) a^k / (1 - a^n) (pi_k = a pi_{k-1}), so
//   gain = (1 - a) / (1 - a^n) sum_{k<n} k a^k
//        = (1 - a) / (1 - a^n) a (1 - n a^(n-1) + (n-1) a^n) / (1 - a)^2,
// which is a / (1 - a) = 9 for a = 0.9 up to a^n ~ 1e-183. With "wait", state 0 is the
// recurrent class and the gain is w. So "start" is optimal iff w < 9.
TEST(AverageRewardTest, ResetChainBeyondDirectSolves) {
  const StateId n = 4000;
  ASSERT_GT(n, EvaluateOptions().direct_max_states);
  const double a = 0.9;
  const double start_gain = (1.0 - a) / (1.0 - std::pow(a, n)) * a *
                            (1.0 - n * std::pow(a, n - 1) + (n - 1) * std::pow(a, n)) /
                            ((1.0 - a) * (1.0 - a));
  EXPECT_NEAR(start_gain, 9.0, 1e-12);
  for (double wait : {8.5, 9.5}) {
    SCOPED_TRACE(wait);
    ModelSpec spec;
    spec.criterion.discount = 0.5;
    spec.action_names = {"start", "wait", "advance"};
    spec.AddState("k0");
    spec.AddStateAction(0, 0.0);
    spec.AddOutcome(1, a);
    spec.AddOutcome(0, 1.0 - a);
    spec.AddStateAction(1, wait);
    spec.AddOutcome(0, 1.0);
    for (StateId k = 1; k < n; ++k) {
      spec.AddState("k" + std::to_string(k));
      spec.AddStateAction(2, static_cast<double>(k));
      if (k + 1 < n) {
        spec.AddOutcome(k + 1, a);
        spec.AddOutcome(0, 1.0 - a);
      } else {
        spec.AddOutcome(0, 1.0);
      }
    }
    const Model m = testing::MustBuild(spec);
    for (const NamedSolver& solver : kSolvers) {
      SCOPED_TRACE(solver.name);
      // Default tolerance: the bias reaches 4e4 here, so 1e-11 is below the rounding floor.
      Result<AverageRewardSolution> s = solver.solve(m, AverageRewardOptions(), nullptr, nullptr);
      ASSERT_OK(s);
      EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
      EXPECT_NEAR(s->gain, std::max(start_gain, wait), 1e-8);
      EXPECT_EQ(m.row_action_name(s->best_row[0]), wait < start_gain ? "start" : "wait");
    }
  }
}

// Multichain: from "start" the decision picks one of two absorbing states earning 3 and 5
// per step. From A every path earns 3 per step for ever, so g*(A) = 3; likewise g*(B) = 5.
// From start, one step (reward 0) leads into A or B for ever, and one step does not count in
// the long-run average: g*(start) = max(3, 5) = 5 (kMinimize: min(3, 5) = 3). (ME2) at start
// with its optimal row (go_b; kMinimize go_a, reward 0): g(start) + h(start) = 0 + h(B), so
// h(start) - h(B) = -5 (kMinimize: h(start) - h(A) = -3), whatever constant fixes h.
ModelSpec TwoLoopsSpec(Objective objective) {
  SpecWriter w(0.9, objective);
  w.States({"start", "A", "B"}, {});
  w.Action("start", "go_a", {{"A", 1.0, 0.0}});
  w.Action("start", "go_b", {{"B", 1.0, 0.0}});
  w.Action("A", "stay", {{"A", 1.0, 3.0}});
  w.Action("B", "stay", {{"B", 1.0, 5.0}});
  return w.Spec();
}

TEST(AverageRewardTest, PolicyIterationGivesEachStateItsOwnGain) {
  for (Objective objective : {Objective::kMaximize, Objective::kMinimize}) {
    const bool maximize = objective == Objective::kMaximize;
    SCOPED_TRACE(maximize ? "maximize" : "minimize");
    const Model m = testing::MustBuild(TwoLoopsSpec(objective));
    const double start_gain = maximize ? 5.0 : 3.0;
    const StateId target = maximize ? 2 : 1;  // B or A.
    Result<AverageRewardSolution> s = AverageRewardPolicyIteration(m, Tight(), nullptr, nullptr);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    ASSERT_EQ(s->state_gain.size(), 3u);
    EXPECT_NEAR(s->state_gain[0], start_gain, 1e-12);
    EXPECT_NEAR(s->state_gain[1], 3.0, 1e-12);
    EXPECT_NEAR(s->state_gain[2], 5.0, 1e-12);
    EXPECT_TRUE(s->multichain_gain);
    // The bracket spans the per-state gains, [3, 5], and gain is its midpoint.
    EXPECT_LE(s->gain_lower, 3.0);
    EXPECT_GE(s->gain_lower, 3.0 - 1e-9);
    EXPECT_GE(s->gain_upper, 5.0);
    EXPECT_LE(s->gain_upper, 5.0 + 1e-9);
    EXPECT_NEAR(s->gain, 4.0, 1e-9);
    EXPECT_NEAR(s->bias[0] - s->bias[target], -start_gain, 1e-9);
    const RowId go_a = *m.FindRow(0, "go_a");
    const RowId go_b = *m.FindRow(0, "go_b");
    EXPECT_EQ(s->best_row[0], maximize ? go_b : go_a);
    EXPECT_EQ(s->optimal_row[go_a], maximize ? 0 : 1);
    EXPECT_EQ(s->optimal_row[go_b], maximize ? 1 : 0);
    EXPECT_TRUE(std::isnan(s->action_gap[0]));  // Only one row keeps the gain.
    EXPECT_LE(s->optimality_residual, 1e-11);
    EXPECT_LE(s->policy_loss_bound, 1e-11);
    EXPECT_TRUE(s->multichain_suspected);
    EXPECT_EQ(s->recurrent_classes, (std::vector<std::vector<StateId>>{{1}, {2}}));
    EXPECT_NE(s->chain_structure_note.find("state_gain"), std::string::npos);
  }
}

// Changed: policy iteration used to reject this model too; it now returns per-state gains
// (above). Relative value iteration still needs one gain and says where to go instead.
TEST(AverageRewardTest, RelativeValueIterationRejectsDifferingGains) {
  for (Objective objective : {Objective::kMaximize, Objective::kMinimize}) {
    const Model m = testing::MustBuild(TwoLoopsSpec(objective));
    Result<AverageRewardSolution> s = RelativeValueIteration(m, Tight(), nullptr, nullptr);
    ASSERT_FALSE(s.ok());
    EXPECT_EQ(s.status().code(), StatusCode::kFailedPrecondition);
    EXPECT_NE(s.status().message().find("{\"A\"}"), std::string::npos) << s.status().message();
    EXPECT_NE(s.status().message().find("\"B\""), std::string::npos) << s.status().message();
    EXPECT_NE(s.status().message().find("policy iteration"), std::string::npos)
        << s.status().message();
  }
}

// A random split between two classes. "spin" (reward 1) stays at start w.p. 0.2 and moves to
// A (3 per step) w.p. 0.2, to B (5 per step) w.p. 0.6; "settle" (reward 10) moves to A. Under
// spin the chain leaves start at the first step that does not stay, and that step goes to A
// or B in the ratio 0.2 : 0.6, so it ends in A w.p. 1/4 and in B w.p. 3/4; the steps before
// do not count in the average: gain(start) = 3/4 + 15/4 = 4.5. Under settle: 3. So
// g*(start) = 4.5 with spin (kMinimize: 3 with settle; the one-off 10 does not matter).
// (ME2) at start under spin: 4.5 + h(start) = 1 + 0.2 h(start) + 0.2 h(A) + 0.6 h(B).
TEST(AverageRewardTest, RandomSplitEarnsTheMixtureOfTheClassGains) {
  const double mixture = 0.25 * 3.0 + 0.75 * 5.0;
  EXPECT_DOUBLE_EQ(mixture, 4.5);
  for (Objective objective : {Objective::kMaximize, Objective::kMinimize}) {
    const bool maximize = objective == Objective::kMaximize;
    SCOPED_TRACE(maximize ? "maximize" : "minimize");
    SpecWriter w(0.9, objective);
    w.States({"start", "A", "B"}, {});
    w.Action("start", "spin", {{"start", 0.2, 1.0}, {"A", 0.2, 1.0}, {"B", 0.6, 1.0}});
    w.Action("start", "settle", {{"A", 1.0, 10.0}});
    w.Action("A", "stay", {{"A", 1.0, 3.0}});
    w.Action("B", "stay", {{"B", 1.0, 5.0}});
    const Model m = w.Build();
    Result<AverageRewardSolution> s = AverageRewardPolicyIteration(m, Tight(), nullptr, nullptr);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    EXPECT_TRUE(s->multichain_gain);
    EXPECT_NEAR(s->state_gain[0], maximize ? mixture : 3.0, 1e-12);
    EXPECT_NEAR(s->state_gain[1], 3.0, 1e-12);
    EXPECT_NEAR(s->state_gain[2], 5.0, 1e-12);
    EXPECT_EQ(m.row_action_name(s->best_row[0]), maximize ? "spin" : "settle");
    const std::vector<double>& h = s->bias;
    if (maximize) {
      EXPECT_NEAR(mixture + h[0], 1.0 + 0.2 * h[0] + 0.2 * h[1] + 0.6 * h[2], 1e-9);
    } else {
      EXPECT_NEAR(3.0 + h[0], 10.0 + h[1], 1e-9);
    }
    EXPECT_LE(s->gain_lower, 3.0);
    EXPECT_GE(s->gain_upper, 5.0);
  }
}

// Gain first, bias second. From start: "bonus_to_a" earns 50 once, then A's 3 per step;
// "pay_to_b" costs 100 once, then B's 5; "enter_b" costs 2 once, then 5; "via_gate" costs 1,
// then the gate's "pass" earns 4, then 5. Rewards over the first N steps: bonus_to_a
// 50 + 3 (N - 1); pay_to_b 5N - 105; enter_b 5N - 7; via_gate -1 + 4 + 5 (N - 2) = 5N - 7.
// So g*(start) = 5 (the bonus leads to gain 3, however large it is), and among the three rows
// that keep gain 5 the bias decides: enter_b and via_gate tie, pay_to_b trails by 98. (ME2):
// h(start) - h(B) = -2 - 5 = -7 and h(gate) - h(B) = 4 - 5 = -1.
TEST(AverageRewardTest, GainOutranksAOneOffRewardAndBiasBreaksGainTies) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"start", "gate", "A", "B"}, {});
  w.Action("start", "bonus_to_a", {{"A", 1.0, 50.0}});
  w.Action("start", "pay_to_b", {{"B", 1.0, -100.0}});
  w.Action("start", "enter_b", {{"B", 1.0, -2.0}});
  w.Action("start", "via_gate", {{"gate", 1.0, -1.0}});
  w.Action("gate", "pass", {{"B", 1.0, 4.0}});
  w.Action("A", "stay", {{"A", 1.0, 3.0}});
  w.Action("B", "stay", {{"B", 1.0, 5.0}});
  const Model m = w.Build();
  Result<AverageRewardSolution> s = AverageRewardPolicyIteration(m, Tight(), nullptr, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  EXPECT_TRUE(s->multichain_gain);
  const std::vector<double> expected = {5.0, 5.0, 3.0, 5.0};
  for (StateId k = 0; k < 4; ++k) EXPECT_NEAR(s->state_gain[k], expected[k], 1e-12) << k;
  const RowId bonus = *m.FindRow(0, "bonus_to_a");
  const RowId pay = *m.FindRow(0, "pay_to_b");
  const RowId enter = *m.FindRow(0, "enter_b");
  const RowId gate = *m.FindRow(0, "via_gate");
  // The bonus row loses gain, so it is not optimal whatever its q.
  EXPECT_EQ(s->optimal_row[bonus], 0);
  EXPECT_EQ(s->optimal_row[pay], 0);
  EXPECT_EQ(s->optimal_row[enter], 1);
  EXPECT_EQ(s->optimal_row[gate], 1);
  EXPECT_EQ(s->best_row[0], enter);  // First of the tie in document order.
  EXPECT_EQ(s->tied_states, 1);
  EXPECT_NEAR(s->action_gap[0], 0.0, 1e-9);
  EXPECT_NEAR(s->q[enter] - s->q[pay], 98.0, 1e-9);
  EXPECT_NEAR(s->q[enter], s->q[gate], 1e-9);
  EXPECT_NEAR(s->bias[0] - s->bias[3], -7.0, 1e-9);
  EXPECT_NEAR(s->bias[1] - s->bias[3], -1.0, 1e-9);
  EXPECT_LE(s->policy_loss_bound, 1e-9);
}

// A terminal state (absorbing, reward 0: gain 0) against a loop earning 2 per step. From
// start, "quit" earns 10 once and ends; "enter" leads into the loop. Maximising:
// g*(start) = 2 (entering wins for ever after), and (ME2) gives h(start) - h(loop) = 0 - 2.
// Minimising: g*(start) = 0 by quitting, and h(start) - h(end) = 10 - 0.
TEST(AverageRewardTest, TerminalStateAgainstARewardLoop) {
  for (Objective objective : {Objective::kMaximize, Objective::kMinimize}) {
    const bool maximize = objective == Objective::kMaximize;
    SCOPED_TRACE(maximize ? "maximize" : "minimize");
    SpecWriter w(0.9, objective);
    w.States({"start", "loop", "end"}, {false, false, true});
    w.Action("start", "quit", {{"end", 1.0, 10.0}});
    w.Action("start", "enter", {{"loop", 1.0, 0.0}});
    w.Action("loop", "stay", {{"loop", 1.0, 2.0}});
    const Model m = w.Build();
    Result<AverageRewardSolution> s = AverageRewardPolicyIteration(m, Tight(), nullptr, nullptr);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    EXPECT_TRUE(s->multichain_gain);
    EXPECT_NEAR(s->state_gain[0], maximize ? 2.0 : 0.0, 1e-12);
    EXPECT_NEAR(s->state_gain[1], 2.0, 1e-12);
    EXPECT_EQ(s->state_gain[2], 0.0);
    EXPECT_EQ(m.row_action_name(s->best_row[0]), maximize ? "enter" : "quit");
    EXPECT_EQ(s->best_row[2], -1);
    if (maximize) {
      EXPECT_NEAR(s->bias[0] - s->bias[1], -2.0, 1e-9);
    } else {
      EXPECT_NEAR(s->bias[0] - s->bias[2], 10.0, 1e-9);
    }
    EXPECT_LE(s->gain_lower, 0.0);
    EXPECT_GE(s->gain_upper, 2.0);
  }
}

// Multichain with one gain: two terminal states (each its own recurrent class, gain 0) and a
// choice between them. The single gain 0 is right for every state; the classes are named.
TEST(AverageRewardTest, MultichainWithEqualGainsIsSolvedAndFlagged) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"start", "left", "right"}, {false, true, true});
  w.Action("start", "go_left", {{"left", 1.0, 5.0}});
  w.Action("start", "go_right", {{"right", 1.0, 7.0}});
  const Model m = w.Build();
  for (const NamedSolver& solver : kSolvers) {
    SCOPED_TRACE(solver.name);
    Result<AverageRewardSolution> s = solver.solve(m, Tight(), nullptr, nullptr);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    EXPECT_NEAR(s->gain, 0.0, 1e-10);
    EXPECT_FALSE(s->multichain_gain);
    EXPECT_EQ(s->state_gain, (std::vector<double>(3, s->gain)));
    EXPECT_TRUE(s->multichain_suspected);
    EXPECT_EQ(s->recurrent_classes, (std::vector<std::vector<StateId>>{{1}, {2}}));
    EXPECT_NE(s->chain_structure_note.find("\"left\""), std::string::npos);
  }
}

// A seeded random model built to be multichain: no action leaves states {0, 1}; actions of
// {2, 3, 4} stay in {0, ..., 4}; actions of 5 .. 8 may go anywhere; for seeds divisible by 3,
// state 8 is terminal. Up to 3 actions per state and 3 outcomes per action, so at most
// 3^9 = 19683 deterministic stationary policies.
ModelSpec RandomMultichainSpec(uint64_t seed, Objective objective) {
  constexpr StateId kStates = 9;
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.name = "multichain-" + std::to_string(seed);
  spec.objective = objective;
  spec.criterion.discount = 0.5;  // Ignored by the average-reward solvers.
  for (int a = 0; a < 3; ++a) spec.action_names.push_back("a" + std::to_string(a));
  for (StateId s = 0; s < kStates; ++s) {
    const bool terminal = s == kStates - 1 && seed % 3 == 0;
    spec.AddState("s" + std::to_string(s), terminal);
    if (terminal) continue;
    const StateId reach = s < 2 ? 2 : s < 5 ? 5 : kStates;  // Successors are 0 .. reach - 1.
    const int actions = 1 + static_cast<int>(rng() % 3);
    for (int a = 0; a < actions; ++a) {
      spec.AddStateAction(a, 10.0 * unit(rng) - 5.0);
      const int outcomes = 1 + static_cast<int>(rng() % 3);
      std::vector<double> w(outcomes);
      double sum = 0.0;
      for (double& x : w) sum += (x = unit(rng) + 0.05);
      for (double x : w) spec.AddOutcome(static_cast<StateId>(rng() % reach), x / sum);
    }
  }
  return spec;
}

// The limiting matrix P* = lim_N (1/N) sum_{t<N} P^t of a stochastic matrix P, as the limit
// of Q^(2^k) for the lazy chain Q = (I + P) / 2. Q has the same invariant vectors, recurrent
// classes and absorption probabilities as P, hence the same P*, and it is aperiodic, so its
// powers converge (common practice; Puterman 1994, Markov Decision Processes, sec. 8.5 uses
// the same transformation, from memory). Rows are renormalised after each squaring so that
// rounding cannot grow over 2^k steps. Records a failure unless the squaring has settled.
Eigen::MatrixXd LimitingMatrix(const Eigen::MatrixXd& p) {
  const Eigen::Index n = p.rows();
  Eigen::MatrixXd q = 0.5 * (Eigen::MatrixXd::Identity(n, n) + p);
  double change = 0.0;
  for (int k = 0; k < 80; ++k) {  // 2^80 steps.
    Eigen::MatrixXd next = q * q;
    for (Eigen::Index i = 0; i < n; ++i) next.row(i) /= next.row(i).sum();
    change = (next - q).cwiseAbs().maxCoeff();
    q = std::move(next);
  }
  EXPECT_LT(change, 1e-12) << "repeated squaring did not settle";
  return q;
}

// The gain vector g = P* r of the deterministic stationary policy `rows` (-1 at terminal
// states, which are absorbing with reward 0), from the model's raw rows.
Eigen::VectorXd PolicyGain(const Model& m, const std::vector<RowId>& rows) {
  const StateId n = m.num_states();
  Eigen::MatrixXd p = Eigen::MatrixXd::Zero(n, n);
  Eigen::VectorXd r = Eigen::VectorXd::Zero(n);
  for (StateId s = 0; s < n; ++s) {
    if (rows[s] < 0) {
      p(s, s) = 1.0;
      continue;
    }
    r[s] = m.row_reward(rows[s]);
    for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
      p(s, m.entry_next(e)) += m.entry_probability(e);
    }
  }
  return LimitingMatrix(p) * r;
}

// g*(s) = the best over all deterministic stationary policies of their gain from s, taken
// state by state: in a finite model some such policy attains g* from every state at once
// (Puterman 1994, ch. 9, from memory), so the state-wise best is g*.
std::vector<double> OptimalGainByEnumeration(const Model& m) {
  const StateId n = m.num_states();
  const bool maximize = m.objective() == Objective::kMaximize;
  std::vector<RowId> rows(n);
  for (StateId s = 0; s < n; ++s) rows[s] = m.row_begin(s) == m.row_end(s) ? -1 : m.row_begin(s);
  std::vector<double> best(n, maximize ? -INFINITY : INFINITY);
  for (;;) {
    const Eigen::VectorXd g = PolicyGain(m, rows);
    for (StateId s = 0; s < n; ++s) {
      best[s] = maximize ? std::max(best[s], g[s]) : std::min(best[s], g[s]);
    }
    // Next policy: a mixed-radix counter over the states' rows.
    StateId s = 0;
    while (s < n && (rows[s] < 0 || rows[s] + 1 == m.row_end(s))) {
      if (rows[s] >= 0) rows[s] = m.row_begin(s);
      ++s;
    }
    if (s == n) break;
    ++rows[s];
  }
  return best;
}

// Policy iteration against the enumeration on seeded multichain models: the per-state gain,
// the bracket, the flag, the optimality equations (ME1)-(ME2) checked here from the model,
// the gain of the best_row policy, and a run stopped after one improvement.
TEST(AverageRewardTest, MultichainGainMatchesEnumerationOfPolicies) {
  int differing = 0;
  for (uint64_t seed = 0; seed < 24; ++seed) {
    SCOPED_TRACE(seed);
    const Objective objective = seed % 2 == 0 ? Objective::kMaximize : Objective::kMinimize;
    const double sign = objective == Objective::kMaximize ? 1.0 : -1.0;
    const Model m = testing::MustBuild(RandomMultichainSpec(seed + 100, objective));
    const StateId n = m.num_states();
    const std::vector<double> g_star = OptimalGainByEnumeration(m);
    const auto [low, high] = std::minmax_element(g_star.begin(), g_star.end());
    const double spread = *high - *low;
    if (spread > 1e-6) ++differing;

    Result<AverageRewardSolution> s = AverageRewardPolicyIteration(m, Tight(), nullptr, nullptr);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    ASSERT_EQ(s->state_gain.size(), static_cast<size_t>(n));
    for (StateId k = 0; k < n; ++k) {
      EXPECT_NEAR(s->state_gain[k], g_star[k], 1e-9) << k;
      EXPECT_LE(std::fabs(s->state_gain[k] - g_star[k]), s->state_gain_error + 1e-12) << k;
    }
    EXPECT_LE(s->state_gain_error, 1e-11);
    if (spread > 1e-6 || spread < 1e-12) {
      EXPECT_EQ(s->multichain_gain, spread > 1e-6);
    }
    EXPECT_LE(s->gain_lower, *low + 1e-12);
    EXPECT_GE(s->gain_upper, *high - 1e-12);
    EXPECT_NEAR(s->gain_lower, *low, 1e-8);
    EXPECT_NEAR(s->gain_upper, *high, 1e-8);

    // (ME1) and (ME2) at (state_gain, bias), and the optimal sets they define.
    const std::vector<double>& g = s->state_gain;
    const std::vector<double>& h = s->bias;
    for (StateId k = 0; k < n; ++k) {
      if (m.row_begin(k) == m.row_end(k)) continue;
      double best_gain = -INFINITY;
      for (RowId r = m.row_begin(k); r < m.row_end(k); ++r) {
        double pg = 0.0;
        for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
          pg += m.entry_probability(e) * g[m.entry_next(e)];
        }
        best_gain = std::max(best_gain, sign * pg);
      }
      EXPECT_NEAR(sign * best_gain, g[k], 1e-9) << k;
      double best_q = -INFINITY;
      for (RowId r = m.row_begin(k); r < m.row_end(k); ++r) {
        double pg = 0.0, ph = 0.0;
        for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
          pg += m.entry_probability(e) * g[m.entry_next(e)];
          ph += m.entry_probability(e) * h[m.entry_next(e)];
        }
        const bool keeps = std::fabs(pg - g[k]) <= 1e-9;
        if (keeps) best_q = std::max(best_q, sign * (m.row_reward(r) + ph));
        if (!keeps) {
          EXPECT_EQ(s->optimal_row[r], 0) << "row " << r;
        }
      }
      EXPECT_NEAR(sign * best_q, g[k] + h[k], 1e-9) << k;
    }
    // Taking the best rows earns g* from every state.
    const Eigen::VectorXd picked = PolicyGain(m, s->best_row);
    for (StateId k = 0; k < n; ++k) EXPECT_NEAR(picked[k], g_star[k], 1e-8) << k;

    // Stopped after one improvement: the bracket still holds g*, and a gain that differs
    // between states is a policy's gain, so no better than g*.
    AverageRewardOptions once = Tight();
    once.max_iterations = 1;
    Result<AverageRewardSolution> early = AverageRewardPolicyIteration(m, once, nullptr, nullptr);
    ASSERT_OK(early);
    if (early->multichain_gain) {
      for (StateId k = 0; k < n; ++k) {
        EXPECT_LE(sign * early->state_gain[k], sign * g_star[k] + early->state_gain_error + 1e-12)
            << k;
      }
    }
    EXPECT_LE(early->gain_lower, *low + 1e-12);
    EXPECT_GE(early->gain_upper, *high - 1e-12);

    // Relative value iteration either proves the gains differ or, if it returns, brackets g*.
    AverageRewardOptions rvi_options = Tight();
    rvi_options.max_iterations = 20000;
    Result<AverageRewardSolution> rvi = RelativeValueIteration(m, rvi_options, nullptr, nullptr);
    if (rvi.ok()) {
      EXPECT_FALSE(rvi->multichain_gain);
      EXPECT_LE(rvi->gain_lower, *low + 1e-12);
      EXPECT_GE(rvi->gain_upper, *high - 1e-12);
    } else {
      EXPECT_EQ(rvi.status().code(), StatusCode::kFailedPrecondition);
      EXPECT_GT(spread, 1e-6);
    }
  }
  EXPECT_GE(differing, 10) << "too few seeds gave a multichain gain to test";
}

// A seeded random multichain model of any size: the states fall in four bands by index.
// Actions of the first band stay in it, and so do those of the second (two groups no action
// leaves); the third band's go to the first three; the fourth's anywhere, and a few of its
// states are terminal.
ModelSpec RandomBandedMultichainSpec(uint64_t seed, StateId states, Objective objective) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.name = "banded-" + std::to_string(seed);
  spec.objective = objective;
  spec.criterion.discount = 0.5;  // Ignored by the average-reward solvers.
  for (int a = 0; a < 4; ++a) spec.action_names.push_back("a" + std::to_string(a));
  const StateId b1 = states / 5, b2 = 2 * states / 5, b3 = 3 * states / 5;
  for (StateId s = 0; s < states; ++s) {
    const bool terminal = s >= b3 && unit(rng) < 0.05;
    spec.AddState("s" + std::to_string(s), terminal);
    if (terminal) continue;
    const StateId lo = s >= b1 && s < b2 ? b1 : 0;
    const StateId hi = s < b1 ? b1 : s < b2 ? b2 : s < b3 ? b3 : states;
    const int actions = 1 + static_cast<int>(rng() % 4);
    for (int a = 0; a < actions; ++a) {
      spec.AddStateAction(a, 10.0 * unit(rng) - 5.0);
      const int outcomes = 1 + static_cast<int>(rng() % 4);
      std::vector<double> w(outcomes);
      double sum = 0.0;
      for (double& x : w) sum += (x = unit(rng) + 0.05);
      for (double x : w) spec.AddOutcome(lo + static_cast<StateId>(rng() % (hi - lo)), x / sum);
    }
  }
  return spec;
}

// Independent check on models too large to enumerate: per-state gains against the
// multichain LP of tests/reference/multichain_lp_check.py (SciPy's HiGHS).
TEST(AverageRewardTest, MultichainGainMatchesLinearProgram) {
  const StateId sizes[] = {10, 25, 60, 120, 250, 400};
  int differing = 0;
  for (int seed = 0; seed < 6; ++seed) {
    SCOPED_TRACE(seed);
    const Objective objective = seed % 2 == 0 ? Objective::kMaximize : Objective::kMinimize;
    const Model m =
        testing::MustBuild(RandomBandedMultichainSpec(seed + 500, sizes[seed], objective));
    bool skip = false;
    const std::optional<std::vector<double>> lp =
        LpStateGains(m, "banded" + std::to_string(seed), &skip);
    if (skip) GTEST_SKIP() << "/usr/bin/python3 has no scipy; LP reference unavailable";
    ASSERT_TRUE(lp.has_value());
    const auto [low, high] = std::minmax_element(lp->begin(), lp->end());
    if (*high - *low > 1e-6) ++differing;
    Result<AverageRewardSolution> s = AverageRewardPolicyIteration(m, Tight(), nullptr, nullptr);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
    EXPECT_EQ(s->multichain_gain, *high - *low > 1e-6);
    for (StateId k = 0; k < m.num_states(); ++k) {
      EXPECT_NEAR(s->state_gain[k], (*lp)[k], 1e-8) << k;
    }
    EXPECT_LE(s->gain_lower, *low + 1e-8);
    EXPECT_GE(s->gain_upper, *high - 1e-8);
  }
  EXPECT_GE(differing, 4) << "too few seeds gave a multichain gain to test";
}

// Gambler's ruin beyond the direct solves: states 0 .. N, where 0 and N are absorbing and
// earn a and b per step, and each state 0 < k < N moves to k - 1 or k + 1 w.p. 1/2 each,
// earning 0. The gain satisfies g(k) = (g(k - 1) + g(k + 1)) / 2 inside with g(0) = a,
// g(N) = b, so it is linear: g(k) = a + (b - a) k / N (the walk ends at N w.p. k / N). The
// N - 1 transient states exceed direct_max_states, so their gains come from the iterative
// solver; the expected time to absorption, k (N - k), reaches 4e6 steps here.
TEST(AverageRewardTest, GamblersRuinGainIsLinearBeyondDirectSolves) {
  const StateId n = 4002;  // States 0 .. N with N = 4001.
  const double a = 1.0, b = 3.0, last = static_cast<double>(n - 1);
  ASSERT_GT(n - 2, EvaluateOptions().direct_max_states);
  ModelSpec spec;
  spec.criterion.discount = 0.5;
  spec.action_names = {"stay", "walk"};
  for (StateId k = 0; k < n; ++k) {
    spec.AddState("k" + std::to_string(k));
    if (k == 0 || k == n - 1) {
      spec.AddStateAction(0, k == 0 ? a : b);
      spec.AddOutcome(k, 1.0);
    } else {
      spec.AddStateAction(1, 0.0);
      spec.AddOutcome(k - 1, 0.5);
      spec.AddOutcome(k + 1, 0.5);
    }
  }
  const Model m = testing::MustBuild(spec);
  // The bias reaches 8e6 here (it grows like k^3), so the rounding floor of the optimality
  // equations is near 1e-8: ask for 1e-6.
  AverageRewardOptions options;
  options.tolerance = 1e-6;
  Result<AverageRewardSolution> s = AverageRewardPolicyIteration(m, options, nullptr, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  EXPECT_TRUE(s->multichain_gain);
  double worst = 0.0;
  for (StateId k = 0; k < n; ++k) {
    worst = std::max(worst, std::fabs(s->state_gain[k] - (a + (b - a) * k / last)));
  }
  EXPECT_LE(worst, 1e-9);
  // The error bound holds, and is what made this converge: the iterative solve alone left
  // errors near 1e-6 here, which its small residual did not show.
  EXPECT_GE(s->state_gain_error, worst);
  EXPECT_LE(s->state_gain_error, options.tolerance);
  EXPECT_LE(s->gain_lower, a);
  EXPECT_GE(s->gain_upper, b);
}

// RecurrentClasses on a hand-drawn graph: 0 -> 1, 1 <-> 2, 3 loops, 4 -> 0: the closed
// components are {1, 2} and {3}. Then a 300000-state cycle, deep enough to overflow a
// recursive search: one class holding every state.
TEST(AverageRewardTest, RecurrentClassesOfAPolicy) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"s0", "s1", "s2", "s3", "s4"}, {});
  w.Action("s0", "go", {{"s1", 1.0}});
  w.Action("s1", "go", {{"s2", 1.0}});
  w.Action("s2", "go", {{"s1", 0.5}, {"s2", 0.5}});
  w.Action("s3", "go", {{"s3", 1.0}});
  w.Action("s4", "go", {{"s0", 1.0}});
  const Model small = w.Build();
  const std::vector<RowId> rows = {0, 1, 2, 3, 4};
  EXPECT_EQ(RecurrentClasses(small, rows), (std::vector<std::vector<StateId>>{{1, 2}, {3}}));

  const StateId n = 300000;
  ModelSpec spec;
  spec.criterion.discount = 0.5;
  spec.action_names = {"next"};
  for (StateId s = 0; s < n; ++s) {
    spec.AddState("c" + std::to_string(s));
    spec.AddStateAction(0, 0.0);
    spec.AddOutcome((s + 1) % n, 1.0);
  }
  const Model cycle = testing::MustBuild(spec);
  std::vector<RowId> cycle_rows(n);
  for (StateId s = 0; s < n; ++s) cycle_rows[s] = s;
  const std::vector<std::vector<StateId>> classes = RecurrentClasses(cycle, cycle_rows);
  ASSERT_EQ(classes.size(), 1u);
  EXPECT_EQ(classes[0].size(), static_cast<size_t>(n));
}

// Progress, cancellation, limits and option checks, on a random unichain model whose gain
// comes from the LP reference.
TEST(AverageRewardTest, ProgressCancelAndLimits) {
  const Model m = testing::MustBuild(RandomUnichainSpec(41, 200, Objective::kMaximize));
  bool skip = false;
  const std::optional<double> lp = LpGain(m, "control", &skip);
  if (skip) GTEST_SKIP() << "/usr/bin/python3 has no scipy; LP reference unavailable";
  ASSERT_TRUE(lp.has_value());

  // Relative value iteration reports every sweep and stops on cancel with a valid bracket.
  std::vector<Progress> seen;
  CancelToken cancel;
  ProgressFn progress = [&](const Progress& p) {
    seen.push_back(p);
    if (p.iteration >= 3) cancel.Cancel();
  };
  AverageRewardOptions options;
  options.tolerance = 1e-14;
  options.aperiodicity = 0.9;  // Slow on purpose.
  Result<AverageRewardSolution> s = RelativeValueIteration(m, options, &progress, &cancel);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kCancelled);
  EXPECT_EQ(s->iterations, 3);
  ASSERT_EQ(seen.size(), 3u);
  for (size_t i = 0; i < seen.size(); ++i) {
    EXPECT_EQ(seen[i].iteration, static_cast<int64_t>(i + 1));
    EXPECT_GT(seen[i].residual, 0.0);
  }
  EXPECT_LE(s->gain_lower, *lp + 1e-9);
  EXPECT_GE(s->gain_upper, *lp - 1e-9);
  EXPECT_EQ(s->bias.size(), static_cast<size_t>(m.num_states()));

  // Iteration limit.
  options.max_iterations = 5;
  s = RelativeValueIteration(m, options, nullptr, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kIterationLimit);
  EXPECT_EQ(s->iterations, 5);

  // Policy iteration with a token cancelled up front still returns a well-formed answer
  // whose bracket holds the optimum.
  CancelToken cancelled;
  cancelled.Cancel();
  s = AverageRewardPolicyIteration(m, Tight(), nullptr, &cancelled);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kCancelled);
  EXPECT_EQ(s->q.size(), static_cast<size_t>(m.num_rows()));
  EXPECT_LE(s->gain_lower, *lp + 1e-9);
  EXPECT_GE(s->gain_upper, *lp - 1e-9);

  // Options out of bounds.
  for (auto spoil : std::vector<void (*)(AverageRewardOptions&)>{
           [](AverageRewardOptions& o) { o.tolerance = 0.0; },
           [](AverageRewardOptions& o) { o.aperiodicity = 1.0; },
           [](AverageRewardOptions& o) { o.reference_state = 200; },
           [](AverageRewardOptions& o) { o.threads = -1; }}) {
    AverageRewardOptions bad;
    spoil(bad);
    for (const NamedSolver& solver : kSolvers) {
      Result<AverageRewardSolution> r = solver.solve(m, bad, nullptr, nullptr);
      ASSERT_FALSE(r.ok());
      EXPECT_EQ(r.status().code(), StatusCode::kInvalidArgument);
    }
  }
}

// Minimising costs c is maximising rewards -c: the gain and bias change sign, the policy
// stays. Checked on a random unichain model against its negated copy.
TEST(AverageRewardTest, MinimizeIsNegatedMaximize) {
  const ModelSpec spec = RandomUnichainSpec(77, 80, Objective::kMaximize);
  ModelSpec negated = spec;
  negated.objective = Objective::kMinimize;
  for (double& r : negated.slot_reward) r = -r;
  for (double& r : negated.outcome_reward) r = -r;
  const Model max_model = testing::MustBuild(spec);
  const Model min_model = testing::MustBuild(negated);
  for (const NamedSolver& solver : kSolvers) {
    SCOPED_TRACE(solver.name);
    Result<AverageRewardSolution> a = solver.solve(max_model, Tight(), nullptr, nullptr);
    Result<AverageRewardSolution> b = solver.solve(min_model, Tight(), nullptr, nullptr);
    ASSERT_OK(a);
    ASSERT_OK(b);
    EXPECT_NEAR(b->gain, -a->gain, 1e-9);
    EXPECT_NEAR(b->gain_lower, -a->gain_upper, 1e-9);
    for (StateId s = 0; s < max_model.num_states(); ++s) {
      EXPECT_NEAR(b->bias[s], -a->bias[s], 1e-7) << s;
      EXPECT_EQ(b->best_row[s], a->best_row[s]) << s;
    }
  }
}

}  // namespace
}  // namespace mdp
