// Checks of the average-reward solvers (solver/average_reward.h) against answers from outside
// the project: closed forms derived here, a published worked example (named beside its
// check), and an independent linear program solved by SciPy's HiGHS
// (tests/reference/average_lp_check.py, run through /usr/bin/python3).
#include <gtest/gtest.h>
#include <sys/wait.h>

#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <limits>
#include <optional>
#include <random>
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

std::filesystem::path LpScript() {
  return std::filesystem::path(__FILE__).parent_path().parent_path() / "reference" /
         "average_lp_check.py";
}

// The optimal gain of `m` from the LP reference, or nullopt with *skip set if SciPy is
// missing. Records a failure if the script fails otherwise.
std::optional<double> LpGain(const Model& m, const std::string& tag, bool* skip) {
  *skip = false;
  const std::string path = ::testing::TempDir() + "average_lp_" + tag + ".txt";
  {
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
  const std::string command = "/usr/bin/python3 " + LpScript().string() + " " + path + " 2>&1";
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
  double gain = 0.0;
  if (status != 0 || std::sscanf(output.c_str(), "gain %lf", &gain) != 1) {
    ADD_FAILURE() << command << " failed: " << output;
    return std::nullopt;
  }
  return gain;
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
    }
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

// Multichain: from "start" the decision picks one of two absorbing states earning 1 and 3
// per step, so g*(A) = 1 and g*(B) = g*(start) = 3: no single gain exists.
TEST(AverageRewardTest, MultichainWithDifferentGainsIsAnError) {
  for (Objective objective : {Objective::kMaximize, Objective::kMinimize}) {
    SpecWriter w(0.9, objective);
    w.States({"start", "A", "B"}, {});
    w.Action("start", "go_a", {{"A", 1.0, 0.0}});
    w.Action("start", "go_b", {{"B", 1.0, 0.0}});
    w.Action("A", "stay", {{"A", 1.0, 1.0}});
    w.Action("B", "stay", {{"B", 1.0, 3.0}});
    const Model m = w.Build();
    for (const NamedSolver& solver : kSolvers) {
      SCOPED_TRACE(solver.name);
      Result<AverageRewardSolution> s = solver.solve(m, Tight(), nullptr, nullptr);
      ASSERT_FALSE(s.ok());
      EXPECT_EQ(s.status().code(), StatusCode::kFailedPrecondition);
      EXPECT_NE(s.status().message().find("{\"A\"}"), std::string::npos) << s.status().message();
      EXPECT_NE(s.status().message().find("\"B\""), std::string::npos) << s.status().message();
    }
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
    EXPECT_TRUE(s->multichain_suspected);
    EXPECT_EQ(s->recurrent_classes, (std::vector<std::vector<StateId>>{{1}, {2}}));
    EXPECT_NE(s->chain_structure_note.find("\"left\""), std::string::npos);
  }
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
