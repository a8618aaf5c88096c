// Tests solver/total_reward.{h,cc}: total reward until a goal (stochastic shortest paths).
// Every expected number comes from outside the project: closed forms derived in the
// comments here, and a brute force over all deterministic policies evaluated with Eigen's
// dense LU (an independent general-purpose library).
#include "solver/total_reward.h"

#include <gtest/gtest.h>

#include <Eigen/Dense>
#include <Eigen/SparseCore>
#include <Eigen/SparseLU>
#include <cmath>
#include <functional>
#include <limits>
#include <random>
#include <string>
#include <vector>

#include "solver/internal/total_policy.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::SpecWriter;

TotalRewardSolution MustSolve(const Model& m, const TotalRewardOptions& options = {}) {
  Result<TotalRewardSolution> s = TotalRewardPolicyIteration(m, options, nullptr, nullptr);
  EXPECT_TRUE(s.ok()) << s.status().ToString();
  return s.ok() ? std::move(*s) : TotalRewardSolution();
}

RowId Row(const Model& m, const std::string& state, const std::string& action) {
  return *m.FindRow(*m.FindState(state), action);
}
StateId State(const Model& m, const std::string& name) { return *m.FindState(name); }

// Gambler's ruin (any probability textbook; derived here). States 0..n, 0 and n terminal;
// from i one action "bet" moves to i+1 w.p. p and to i-1 w.p. q = 1 - p. With reward 1 on
// reaching n (as an outcome reward, so the row's expected reward is p at i = n-1) and
// `step_reward` on every step. The spec's discount (0.5) must be ignored by the solver.
Model GamblersRuin(int n, double p, Objective objective, bool win_reward, double step_reward) {
  ModelSpec spec;
  spec.name = "gamblers-ruin";
  spec.objective = objective;
  spec.criterion.discount = 0.5;
  spec.action_names = {"bet"};
  for (int i = 0; i <= n; ++i) {
    spec.AddState(std::to_string(i), i == 0 || i == n);
    if (i == 0 || i == n) continue;
    spec.AddStateAction(0, step_reward);
    spec.AddOutcome(i + 1, p, win_reward && i + 1 == n ? 1.0 : 0.0);
    spec.AddOutcome(i - 1, 1.0 - p, 0.0);
  }
  return testing::MustBuild(spec);
}

// P(i) = P(reach n from i) solves P(i) = p P(i+1) + q P(i-1), P(0) = 0, P(n) = 1. The
// characteristic equation p x^2 - x + q = 0 has roots 1 and q/p, so for p != q
// P(i) = A + B (q/p)^i and the boundary conditions give P(i) = (1 - (q/p)^i) / (1 - (q/p)^n);
// for p = q the roots coincide, P is linear: P(i) = i / n.
double WinProbability(int i, int n, double p) {
  const double q = 1.0 - p;
  if (p == q) return static_cast<double>(i) / n;
  const double r = q / p;
  return (1.0 - std::pow(r, i)) / (1.0 - std::pow(r, n));
}

// D(i) = expected duration solves D(i) = 1 + p D(i+1) + q D(i-1), D(0) = D(n) = 0. For p != q,
// i / (q - p) is a particular solution (1 + [p (i+1) + q (i-1)] / (q - p) = i / (q - p)), so
// D(i) = i / (q - p) + A + B (q/p)^i; D(0) = 0 gives A = -B and D(n) = 0 gives
// B = n / ((q - p)(1 - (q/p)^n)): D(i) = i/(q-p) - (n/(q-p)) (1 - (q/p)^i) / (1 - (q/p)^n).
// For p = q = 1/2, D(i) = i (n - i): 1 + [(i+1)(n-i-1) + (i-1)(n-i+1)] / 2 = i (n - i).
double Duration(int i, int n, double p) {
  const double q = 1.0 - p;
  if (p == q) return static_cast<double>(i) * (n - i);
  const double r = q / p;
  return i / (q - p) - (n / (q - p)) * (1.0 - std::pow(r, i)) / (1.0 - std::pow(r, n));
}

void ExpectRelative(double actual, double expected, double rel, const std::string& what) {
  EXPECT_NEAR(actual, expected, rel * std::max(1.0, std::fabs(expected))) << what;
}

TEST(TotalRewardTest, GamblersRuinWinProbabilityAndDuration) {
  const int n = 10;
  for (double p : {0.3, 0.5, 0.7}) {
    SCOPED_TRACE("p = " + std::to_string(p));
    const Model win = GamblersRuin(n, p, Objective::kMaximize, true, 0.0);
    const TotalRewardSolution s = MustSolve(win);
    EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
    EXPECT_EQ(s.states_not_reaching_goal, 0);
    EXPECT_EQ(s.end_components, 0);
    const Model cost = GamblersRuin(n, p, Objective::kMinimize, false, 1.0);
    const TotalRewardSolution d = MustSolve(cost);
    EXPECT_EQ(d.outcome, SolveOutcome::kConverged);
    for (int i = 0; i <= n; ++i) {
      const std::string at = "i = " + std::to_string(i);
      // At the goal n itself nothing more is earned: V(n) = 0.
      const double win = i == n ? 0.0 : WinProbability(i, n, p);
      ExpectRelative(s.values[i], win, 1e-9, at);
      // The bound is checked against the closed form too (plus the closed form's rounding).
      EXPECT_LE(std::fabs(s.values[i] - win), s.value_error_bound + 1e-14) << at;
      ExpectRelative(d.values[i], Duration(i, n, p), 1e-9, at);
      ExpectRelative(d.expected_steps[i], Duration(i, n, p), 1e-9, at);
      ExpectRelative(s.expected_steps[i], Duration(i, n, p), 1e-9, at);
    }
    EXPECT_EQ(s.best_row[0], -1);
    EXPECT_EQ(s.best_row[n], -1);
    EXPECT_TRUE(std::isnan(s.action_gap[3]));  // One action.
  }
}

// The same closed form on 4000 states, where kAuto evaluates with BiCGSTAB (falling back to
// LU if it stalls), and on small models with Gauss-Seidel sweeps and BiCGSTAB. With values
// and expected durations up to 2e4, the provable bound rho * max N (rounding of order 1e-16
// times 2e4, times 2e4 steps) is far above 1e-8, so the tolerance is set above it.
TEST(TotalRewardTest, GamblersRuinWithIterativeEvaluation) {
  struct Case {
    int n;
    double p;
    LinearSolver solver;
  };
  for (const Case& c : {Case{4000, 0.6, LinearSolver::kAuto}, Case{20, 0.6, LinearSolver::kSweeps},
                        Case{30, 0.5, LinearSolver::kBiCgStab}}) {
    SCOPED_TRACE("n = " + std::to_string(c.n));
    const Model m = GamblersRuin(c.n, c.p, Objective::kMinimize, false, 1.0);
    TotalRewardOptions options;
    options.tolerance = 1e-4;
    options.linear_solver = c.solver;
    const TotalRewardSolution s = MustSolve(m, options);
    EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
    for (int i = 0; i <= c.n; i += std::max(1, c.n / 50)) {
      ExpectRelative(s.values[i], Duration(i, c.n, c.p), 1e-9, "i = " + std::to_string(i));
      ExpectRelative(s.expected_steps[i], Duration(i, c.n, c.p), 1e-9, "i = " + std::to_string(i));
    }
  }
}

// A boat at sea minimises the expected number of hours to the dock. "slow": 1 hour, docks
// w.p. 0.25, else still at sea. "fast": 1 hour, docks w.p. 0.6, stays at sea w.p. 0.3, hits
// the reef w.p. 0.1; at the reef "repair" costs c hours and returns to sea. Derived by hand
// (one decision state, so compare the two stationary choices):
//   slow: V = 1 + 0.75 V                  => V = 4,             N = 4 steps;
//   fast: V = 1 + 0.3 V + 0.1 (c + V)     => V = (1 + 0.1 c) / 0.6,
//         N = 1 + 0.3 N + 0.1 (1 + N)     => N = 11/6 steps from sea, 17/6 from the reef.
// c = 5: fast, V = 2.5, q(slow) = 1 + 0.75 * 2.5 = 2.875, gap 0.375, V(reef) = 7.5.
// c = 20: slow, V = 4, V(reef) = 24, q(fast) = 1 + 0.3 * 4 + 0.1 * 24 = 4.6, gap 0.6.
// c = 14: both give 4: tied; the pick is the first in document order ("slow").
Model Boat(double repair) {
  SpecWriter w(0.9, Objective::kMinimize);
  w.States({"sea", "reef", "dock"}, {false, false, true});
  w.Action("sea", "slow", {{"dock", 0.25}, {"sea", 0.75}}, 1.0);
  w.Action("sea", "fast", {{"dock", 0.6}, {"sea", 0.3}, {"reef", 0.1}}, 1.0);
  w.Action("reef", "repair", {{"sea", 1.0}}, repair);
  return w.Build();
}

TEST(TotalRewardTest, SafeSlowOrRiskyFastRoute) {
  {
    const Model m = Boat(5.0);
    const TotalRewardSolution s = MustSolve(m);
    EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
    EXPECT_NEAR(s.values[State(m, "sea")], 2.5, 1e-12);
    EXPECT_NEAR(s.values[State(m, "reef")], 7.5, 1e-12);
    EXPECT_EQ(s.best_row[State(m, "sea")], Row(m, "sea", "fast"));
    EXPECT_NEAR(s.q[Row(m, "sea", "slow")], 2.875, 1e-12);
    EXPECT_NEAR(s.action_gap[State(m, "sea")], 0.375, 1e-12);
    EXPECT_EQ(s.optimal_row[Row(m, "sea", "slow")], 0);
    EXPECT_EQ(s.optimal_row[Row(m, "sea", "fast")], 1);
    EXPECT_EQ(s.tied_states, 0);
    EXPECT_NEAR(s.expected_steps[State(m, "sea")], 11.0 / 6.0, 1e-12);
    EXPECT_NEAR(s.expected_steps[State(m, "reef")], 17.0 / 6.0, 1e-12);
    EXPECT_NEAR(s.max_expected_steps, 17.0 / 6.0, 1e-12);
    // No end component: every row at sea docks with positive probability.
    EXPECT_EQ(s.end_components, 0);
    EXPECT_EQ(s.values[State(m, "dock")], 0.0);
    EXPECT_EQ(s.expected_steps[State(m, "dock")], 0.0);
  }
  {
    const Model m = Boat(20.0);
    const TotalRewardSolution s = MustSolve(m);
    EXPECT_NEAR(s.values[State(m, "sea")], 4.0, 1e-12);
    EXPECT_NEAR(s.values[State(m, "reef")], 24.0, 1e-12);
    EXPECT_EQ(s.best_row[State(m, "sea")], Row(m, "sea", "slow"));
    EXPECT_NEAR(s.q[Row(m, "sea", "fast")], 4.6, 1e-12);
    EXPECT_NEAR(s.action_gap[State(m, "sea")], 0.6, 1e-12);
    EXPECT_NEAR(s.expected_steps[State(m, "sea")], 4.0, 1e-12);
  }
  {
    const Model m = Boat(14.0);
    const TotalRewardSolution s = MustSolve(m);
    EXPECT_NEAR(s.values[State(m, "sea")], 4.0, 1e-12);
    EXPECT_EQ(s.optimal_row[Row(m, "sea", "slow")], 1);
    EXPECT_EQ(s.optimal_row[Row(m, "sea", "fast")], 1);
    EXPECT_EQ(s.tied_states, 1);
    EXPECT_EQ(s.best_row[State(m, "sea")], Row(m, "sea", "slow"));
    EXPECT_NEAR(s.action_gap[State(m, "sea")], 0.0, 1e-12);
  }
}

// Reachability by hand: "trap" only loops; "doomed" only falls into it; "edge" reaches the
// goal or "doomed" w.p. 1/2 each; "x" only goes to "y", and "y" either risks the trap
// (w.p. 1/2) or goes back to "x" — so neither reaches the goal w.p. 1 (found only in the
// second round of the fixed point). From "start", "gamble" pays 100 but risks the trap, so
// it is unsafe; "walk" pays 1 and reaches the goal: V(start) = 1.
TEST(TotalRewardTest, StatesThatCannotReachTheGoal) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"start", "trap", "doomed", "edge", "x", "y", "goal"},
           {false, false, false, false, false, false, true});
  w.Action("start", "gamble", {{"goal", 0.9}, {"trap", 0.1}}, 100.0);
  w.Action("start", "walk", {{"goal", 1.0}}, 1.0);
  w.Action("trap", "wait", {{"trap", 1.0}});
  w.Action("doomed", "fall", {{"trap", 1.0}}, 5.0);
  w.Action("edge", "try", {{"goal", 0.5}, {"doomed", 0.5}});
  w.Action("x", "go", {{"y", 1.0}});
  w.Action("y", "risk", {{"goal", 0.5}, {"trap", 0.5}}, 7.0);
  w.Action("y", "back", {{"x", 1.0}});
  const Model m = w.Build();
  const TotalRewardSolution s = MustSolve(m);
  EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
  EXPECT_EQ(s.states_not_reaching_goal, 5);
  for (const char* name : {"trap", "doomed", "edge", "x", "y"}) {
    const StateId st = State(m, name);
    EXPECT_EQ(s.reaches_goal[st], 0) << name;
    EXPECT_TRUE(std::isnan(s.values[st])) << name;
    EXPECT_TRUE(std::isnan(s.expected_steps[st])) << name;
    EXPECT_EQ(s.best_row[st], -1) << name;
    for (RowId r = m.row_begin(st); r < m.row_end(st); ++r) {
      EXPECT_EQ(s.safe_row[r], 0) << name;
      EXPECT_TRUE(std::isnan(s.q[r])) << name;
      EXPECT_EQ(s.optimal_row[r], 0) << name;
    }
  }
  const StateId start = State(m, "start");
  EXPECT_EQ(s.reaches_goal[start], 1);
  EXPECT_EQ(s.reaches_goal[State(m, "goal")], 1);
  EXPECT_EQ(s.safe_row[Row(m, "start", "gamble")], 0);
  EXPECT_TRUE(std::isnan(s.q[Row(m, "start", "gamble")]));
  EXPECT_EQ(s.best_row[start], Row(m, "start", "walk"));
  EXPECT_DOUBLE_EQ(s.values[start], 1.0);
  EXPECT_TRUE(std::isnan(s.action_gap[start]));  // One safe row.
  EXPECT_DOUBLE_EQ(s.expected_steps[start], 1.0);
}

TEST(TotalRewardTest, AModelOfGoalsOnlyIsTrivial) {
  SpecWriter w(0.9, Objective::kMinimize);
  w.States({"g1", "g2"}, {true, true});
  ModelSpec spec = w.Spec();
  spec.action_names = {"unused"};  // A model lists at least one action.
  const TotalRewardSolution s = MustSolve(testing::MustBuild(spec));
  EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
  EXPECT_EQ(s.values, (std::vector<double>{0.0, 0.0}));
  EXPECT_EQ(s.best_row, (std::vector<RowId>{-1, -1}));
  EXPECT_EQ(s.expected_steps, (std::vector<double>{0.0, 0.0}));
  EXPECT_EQ(s.max_expected_steps, 0.0);
}

TEST(TotalRewardTest, NoGoalOrNoWayToIt) {
  SpecWriter lost(0.9, Objective::kMaximize);
  lost.States({"a", "b"}, {false, false});
  lost.Action("a", "go", {{"b", 1.0}});
  lost.Action("b", "go", {{"a", 1.0}});
  Result<TotalRewardSolution> s =
      TotalRewardPolicyIteration(lost.Build(), TotalRewardOptions(), nullptr, nullptr);
  ASSERT_FALSE(s.ok());
  EXPECT_EQ(s.status().code(), StatusCode::kFailedPrecondition);
  EXPECT_NE(s.status().message().find("goal"), std::string::npos) << s.status().message();

  SpecWriter cut_off(0.9, Objective::kMaximize);
  cut_off.States({"a", "goal"}, {false, true});
  cut_off.Action("a", "stay", {{"a", 1.0}});
  s = TotalRewardPolicyIteration(cut_off.Build(), TotalRewardOptions(), nullptr, nullptr);
  ASSERT_FALSE(s.ok());
  EXPECT_EQ(s.status().code(), StatusCode::kFailedPrecondition);
  EXPECT_NE(s.status().message().find("\"a\""), std::string::npos) << s.status().message();
}

// Loops that earn in the wrong direction make V* unbounded: going round k times before
// leaving earns k times the loop's reward per step (the gain) more. By hand: "a" -> "b" -> "a"
// earning 2 and 1 has gain 1.5; with +3 and -1 the gain is +1; a self-loop earning 1 has
// gain 1. Minimising, the mirror image (costs -2 and -1: gain -1.5).
TEST(TotalRewardTest, LoopsThatEarnInTheWrongDirectionAreRejected) {
  struct Case {
    Objective objective;
    double to_b, to_a;
    const char* gain;
  };
  for (const Case& c : {Case{Objective::kMaximize, 2.0, 1.0, "1.5"},
                        Case{Objective::kMaximize, 3.0, -1.0, "1 per step"},
                        Case{Objective::kMinimize, -2.0, -1.0, "-1.5"}}) {
    SpecWriter w(0.9, c.objective);
    w.States({"a", "b", "goal"}, {false, false, true});
    w.Action("a", "loop", {{"b", 1.0}}, c.to_b);
    w.Action("b", "back", {{"a", 1.0}}, c.to_a);
    w.Action("b", "leave", {{"goal", 1.0}});
    Result<TotalRewardSolution> s =
        TotalRewardPolicyIteration(w.Build(), TotalRewardOptions(), nullptr, nullptr);
    ASSERT_FALSE(s.ok());
    EXPECT_EQ(s.status().code(), StatusCode::kFailedPrecondition);
    const std::string& message = s.status().message();
    for (const char* part : {"\"a\": \"loop\"", "\"b\": \"back\"", c.gain, "discounted"}) {
      EXPECT_NE(message.find(part), std::string::npos) << part << " in: " << message;
    }
  }
  // A ring of 12 states earning 1 per step: the message lists 10 and says how many more.
  SpecWriter ring(0.9, Objective::kMaximize);
  std::vector<std::string> names;
  for (int i = 0; i < 12; ++i) {
    std::string name = "r";
    name += std::to_string(i);
    names.push_back(name);
  }
  names.push_back("goal");
  std::vector<bool> terminal(13, false);
  terminal[12] = true;
  ring.States(names, terminal);
  for (int i = 0; i < 12; ++i) ring.Action(names[i], "next", {{names[(i + 1) % 12], 1.0}}, 1.0);
  ring.Action("r0", "leave", {{"goal", 1.0}});
  Result<TotalRewardSolution> r =
      TotalRewardPolicyIteration(ring.Build(), TotalRewardOptions(), nullptr, nullptr);
  ASSERT_FALSE(r.ok());
  EXPECT_NE(r.status().message().find("and 2 more"), std::string::npos) << r.status().message();

  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"a", "goal"}, {false, true});
  w.Action("a", "stay", {{"a", 1.0}}, 1.0);
  w.Action("a", "go", {{"goal", 1.0}});
  Result<TotalRewardSolution> s =
      TotalRewardPolicyIteration(w.Build(), TotalRewardOptions(), nullptr, nullptr);
  ASSERT_FALSE(s.ok());
  EXPECT_NE(s.status().message().find("\"a\": \"stay\""), std::string::npos)
      << s.status().message();
}

// Loops with gain 0 or in the right direction are accepted, and the answer is the best
// over proper policies. By hand (maximising; moves between "a" and "b" form the loop):
//  1. Zero-reward loop; exits pay -1 (from a) and -3 (from b). Every proper policy ends with
//     one exit, so V(a) = V(b) = -1 (b goes to a, then exits). At a, "to_b" also has
//     q = V(b) = -1: a tie; picking it at a and "to_a" at b would loop for ever, so the pick
//     at a must be "exit": steps N(a) = 1, N(b) = 2.
//  2. Loop paying +1 then -1 (gain 0); exits pay 0 (a) and -5 (b): V(a) = 0, V(b) = -1,
//     again a tie at a between "to_b" (1 + V(b) = 0) and "exit".
//  3. Loop paying +1 then -3 (gain -1); exits pay 0 (a) and -2 (b): V(a) = 0, V(b) = -2,
//     q(a, to_b) = 1 - 2 = -1, q(b, to_a) = -3 + 0 = -3: both gaps 1.
TEST(TotalRewardTest, ZeroAndNegativeGainLoopsAreAccepted) {
  struct Case {
    double to_b, to_a, exit_a, exit_b;
    double va, vb;
    bool tie_at_a;
    double gap_a;
    double steps_b;
  };
  for (const Case& c :
       {Case{0, 0, -1, -3, -1, -1, true, 0, 2}, Case{1, -1, 0, -5, 0, -1, true, 0, 2},
        Case{1, -3, 0, -2, 0, -2, false, 1, 1}}) {
    SCOPED_TRACE("loop " + std::to_string(c.to_b) + ", " + std::to_string(c.to_a));
    SpecWriter w(0.9, Objective::kMaximize);
    w.States({"a", "b", "goal"}, {false, false, true});
    w.Action("a", "to_b", {{"b", 1.0}}, c.to_b);
    w.Action("a", "exit", {{"goal", 1.0}}, c.exit_a);
    w.Action("b", "to_a", {{"a", 1.0}}, c.to_a);
    w.Action("b", "exit", {{"goal", 1.0}}, c.exit_b);
    const Model m = w.Build();
    const TotalRewardSolution s = MustSolve(m);
    EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
    EXPECT_EQ(s.end_components, 1);
    EXPECT_NEAR(s.values[0], c.va, 1e-12);
    EXPECT_NEAR(s.values[1], c.vb, 1e-12);
    EXPECT_EQ(s.best_row[0], Row(m, "a", "exit"));
    EXPECT_EQ(s.optimal_row[Row(m, "a", "to_b")], c.tie_at_a ? 1 : 0);
    EXPECT_EQ(s.tied_states, c.tie_at_a ? 1 : 0);
    EXPECT_NEAR(s.action_gap[0], c.gap_a, 1e-12);
    EXPECT_NEAR(s.expected_steps[0], 1.0, 1e-12);
    EXPECT_NEAR(s.expected_steps[1], c.steps_b, 1e-12);
    EXPECT_TRUE(std::isfinite(s.policy_loss_bound));
  }
}

// A loop earning 1e-10 per step (below eps = 1e-9 max(1, max |r|), so treated as a zero-gain
// loop; total_reward.h, step 2) with exits paying -1 from both states. Improving from "exit
// everywhere" would switch both states into the loop, which never reaches the goal; the
// guard must keep the policy proper. Every proper policy exits somewhere, having earned at
// most 1e-10 on the way, so the answer lies in [-1, -1 + 2e-10] and each state reaches the
// goal within 2 steps.
TEST(TotalRewardTest, LoopsWithinRoundingOfZeroGainKeepThePolicyProper) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"a", "b", "goal"}, {false, false, true});
  w.Action("a", "to_b", {{"b", 1.0}}, 1e-10);
  w.Action("a", "exit", {{"goal", 1.0}}, -1.0);
  w.Action("b", "to_a", {{"a", 1.0}}, 1e-10);
  w.Action("b", "exit", {{"goal", 1.0}}, -1.0);
  const Model m = w.Build();
  const TotalRewardSolution s = MustSolve(m);
  EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
  for (StateId st : {0, 1}) {
    EXPECT_GE(s.values[st], -1.0 - 1e-12);
    EXPECT_LE(s.values[st], -1.0 + 2e-10 + 1e-12);
    EXPECT_GE(s.expected_steps[st], 1.0 - 1e-12);
    EXPECT_LE(s.expected_steps[st], 2.0 + 1e-12);
  }
  EXPECT_GE(s.improvement_slack, 0.9e-10);  // The improvement the guard gave up.
}

// ---------------------------------------------------------------------------------------
// Brute force over all deterministic policies of small random models, recomputing
// everything from the definitions:
//  - A: s reaches the goal w.p. 1 under a deterministic policy iff every state reachable from
//    s can reach the goal; A is the union over all deterministic policies (memoryless
//    policies suffice for almost-sure reachability, common practice).
//  - V*(s): the best V^pi(s) over the deterministic policies that reach the goal w.p. 1 from
//    s, each evaluated with Eigen's dense LU on the states it reaches. (When no loop earns
//    better than 0 per step, some deterministic stationary policy is optimal; total_reward.h
//    proves it for the policy its iteration ends with.)
//  - Loops: the best reward per step of a closed class (of any deterministic policy) inside
//    A minus the goal, from its stationary distribution (least squares, Eigen QR).
//  - End components: subsets C of A minus the goal in which every state has a row with all
//    next states in C, and which those rows keep strongly connected; the maximal ones are
//    counted.

struct BruteForce {
  std::vector<uint8_t> in_a;
  std::vector<double> best;
  int end_components = 0;
  // Best reward per step (cost per step negated when minimising) of a loop inside A minus
  // the goal; -infinity if there is none.
  double loop_gain = -std::numeric_limits<double>::infinity();
};

// Non-goal states 0..states-1 and the goal `states`. With `all_proper` every row moves to the
// goal w.p. >= 0.1 (so every policy is proper) and there are 2 or 3 actions per state.
// Otherwise rows move anywhere, traps and loops included. Rewards: costs > 0 when
// minimising, rewards < 0 when maximising, 0 w.p. 0.4 unless all_proper; with `mixed`, of
// either sign.
ModelSpec RandomSsp(uint64_t seed, Objective objective, int states, bool all_proper, bool mixed) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.name = "random-ssp";
  spec.objective = objective;
  spec.action_names = {"a0", "a1", "a2"};
  const double sign = objective == Objective::kMinimize ? 1.0 : -1.0;
  for (int s = 0; s <= states; ++s) {
    std::string name = "s";
    name += std::to_string(s);
    spec.AddState(name, s == states);
    if (s == states) continue;
    const int actions =
        all_proper ? 2 + static_cast<int>(rng() % 2) : 1 + static_cast<int>(rng() % 3);
    for (int a = 0; a < actions; ++a) {
      const double size = 0.5 + 2.5 * unit(rng);
      const bool zero = !all_proper && unit(rng) < 0.4;
      spec.AddStateAction(a, zero ? 0.0 : (mixed && rng() % 2 ? -sign : sign) * size);
      const double to_goal = all_proper ? 0.1 + 0.4 * unit(rng) : 0.0;
      if (all_proper) spec.AddOutcome(states, to_goal);
      const int outcomes = 1 + static_cast<int>(rng() % (all_proper ? 3 : 2));
      std::vector<double> w(outcomes);
      double sum = 0.0;
      for (double& x : w) sum += (x = unit(rng) + 0.1);
      for (double x : w) {
        const int next = static_cast<int>(rng() % (all_proper ? states : states + 1));
        spec.AddOutcome(next, (1.0 - to_goal) * x / sum);  // BuildModel merges repeats.
      }
    }
  }
  return spec;
}

// Next states in one step under `rows` (-1 rows: none).
std::vector<std::vector<int>> Successors(const Model& m, const std::vector<RowId>& rows) {
  std::vector<std::vector<int>> out(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (rows[s] < 0) continue;
    for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
      out[s].push_back(m.entry_next(e));
    }
  }
  return out;
}

// reach[s][t] = t reachable from s (s itself included), by Warshall's closure.
std::vector<std::vector<uint8_t>> Closure(const std::vector<std::vector<int>>& next) {
  const size_t n = next.size();
  std::vector<std::vector<uint8_t>> reach(n, std::vector<uint8_t>(n, 0));
  for (size_t s = 0; s < n; ++s) {
    reach[s][s] = 1;
    for (int t : next[s]) reach[s][t] = 1;
  }
  for (size_t k = 0; k < n; ++k) {
    for (size_t i = 0; i < n; ++i) {
      for (size_t j = 0; j < n; ++j) reach[i][j] |= reach[i][k] & reach[k][j];
    }
  }
  return reach;
}

// Columns (r_pi, 1) solved against I - P_pi on `members` (closed under pi apart from the goal):
// the policy's values and expected steps, by dense LU.
Eigen::MatrixXd ValuesAndSteps(const Model& m, const std::vector<RowId>& rows,
                               const std::vector<int>& members) {
  const int k = static_cast<int>(members.size());
  std::vector<int> local(m.num_states(), -1);
  for (int i = 0; i < k; ++i) local[members[i]] = i;
  Eigen::MatrixXd a = Eigen::MatrixXd::Identity(k, k);
  Eigen::MatrixXd b(k, 2);
  for (int i = 0; i < k; ++i) {
    const RowId r = rows[members[i]];
    b(i, 0) = m.row_reward(r);
    b(i, 1) = 1.0;
    for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
      if (!m.terminal(m.entry_next(e))) a(i, local[m.entry_next(e)]) -= m.entry_probability(e);
    }
  }
  return a.fullPivLu().solve(b);
}

// pi r over the closed class `cls` of `rows`, with pi (I - P) = 0 and sum pi = 1.
double ClassGain(const Model& m, const std::vector<RowId>& rows, const std::vector<int>& cls) {
  const int c = static_cast<int>(cls.size());
  std::vector<int> local(m.num_states(), -1);
  for (int i = 0; i < c; ++i) local[cls[i]] = i;
  Eigen::MatrixXd a = Eigen::MatrixXd::Zero(c + 1, c);
  Eigen::VectorXd b = Eigen::VectorXd::Zero(c + 1);
  Eigen::VectorXd r(c);
  for (int i = 0; i < c; ++i) {
    a(i, i) -= 1.0;  // Row i of (P^T - I).
    r[i] = m.row_reward(rows[cls[i]]);
    for (int64_t e = m.entry_begin(rows[cls[i]]); e < m.entry_end(rows[cls[i]]); ++e) {
      a(local[m.entry_next(e)], i) += m.entry_probability(e);
    }
    a(c, i) = 1.0;
  }
  b[c] = 1.0;
  return Eigen::VectorXd(a.colPivHouseholderQr().solve(b)).dot(r);
}

int MaximalEndComponents(const Model& m, int states, const std::vector<uint8_t>& in_a) {
  std::vector<uint32_t> components;
  for (uint32_t set = 1; set < (1u << states); ++set) {
    auto in = [&](int t) { return t < states && ((set >> t) & 1u) != 0; };
    bool ok = true;
    std::vector<std::vector<int>> next(states);
    for (int s = 0; s < states && ok; ++s) {
      if (!in(s)) continue;
      bool any = false;
      for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
        bool stays = true;
        for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
          stays = stays && in(m.entry_next(e));
        }
        if (!stays) continue;
        any = true;
        for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
          next[s].push_back(m.entry_next(e));
        }
      }
      ok = in_a[s] && any;
    }
    if (!ok) continue;
    const auto reach = Closure(next);
    for (int s = 0; s < states; ++s) {
      for (int t = 0; t < states; ++t) ok = ok && (!in(s) || !in(t) || reach[s][t]);
    }
    if (ok) components.push_back(set);
  }
  int count = 0;
  for (uint32_t c : components) {
    bool maximal = true;
    for (uint32_t d : components) maximal = maximal && !(d != c && (d & c) == c);
    count += maximal;
  }
  return count;
}

BruteForce SolveByBruteForce(const Model& m, int states) {
  const int goal = states;
  const double sign = m.objective() == Objective::kMaximize ? 1.0 : -1.0;
  BruteForce out;
  out.in_a.assign(states + 1, 0);
  out.in_a[goal] = 1;
  out.best.assign(states + 1, -std::numeric_limits<double>::infinity());
  out.best[goal] = 0.0;
  std::vector<std::vector<RowId>> policies;
  std::vector<RowId> rows(states + 1, -1);
  for (int s = 0; s < states; ++s) rows[s] = m.row_begin(s);
  for (;;) {  // Odometer over all deterministic policies.
    policies.push_back(rows);
    const auto reach = Closure(Successors(m, rows));
    std::vector<int> sure;  // Non-goal states reaching the goal w.p. 1 under `rows`.
    for (int s = 0; s < states; ++s) {
      bool ok = true;
      for (int t = 0; t <= states; ++t) ok = ok && (!reach[s][t] || reach[t][goal]);
      if (ok) sure.push_back(s);
    }
    const Eigen::MatrixXd x = ValuesAndSteps(m, rows, sure);
    for (size_t i = 0; i < sure.size(); ++i) {
      out.in_a[sure[i]] = 1;
      out.best[sure[i]] = std::max(out.best[sure[i]], sign * x(i, 0));  // Sign flipped below.
    }
    int s = 0;
    while (s < states && ++rows[s] == m.row_end(s)) rows[s] = m.row_begin(s), ++s;
    if (s == states) break;
  }
  for (int s = 0; s < states; ++s) out.best[s] *= sign;
  // A state is recurrent iff it can return from everywhere it reaches; its class is what it
  // reaches.
  for (const std::vector<RowId>& policy : policies) {
    const auto reach = Closure(Successors(m, policy));
    for (int s = 0; s < states; ++s) {
      std::vector<int> cls;
      bool closed_in_a = true;
      for (int t = 0; t <= states; ++t) {
        if (!reach[s][t]) continue;
        closed_in_a = closed_in_a && reach[t][s] && t != goal && out.in_a[t];
        cls.push_back(t);
      }
      if (closed_in_a) out.loop_gain = std::max(out.loop_gain, sign * ClassGain(m, policy, cls));
    }
  }
  out.end_components = MaximalEndComponents(m, states, out.in_a);
  return out;
}

enum class Verdict { kSolved, kLoopRejected, kNoWayToGoal };

// Solves `m` and checks everything against the brute force.
Verdict CheckAgainstBruteForce(const Model& m, int states) {
  const BruteForce brute = SolveByBruteForce(m, states);
  Result<TotalRewardSolution> sol =
      TotalRewardPolicyIteration(m, TotalRewardOptions(), nullptr, nullptr);
  int in_a = 0;
  for (int s = 0; s < states; ++s) in_a += brute.in_a[s];
  if (in_a == 0 || brute.loop_gain > 1e-9) {
    EXPECT_EQ(sol.status().code(), StatusCode::kFailedPrecondition) << brute.loop_gain;
    return in_a == 0 ? Verdict::kNoWayToGoal : Verdict::kLoopRejected;
  }
  EXPECT_OK(sol);
  if (!sol.ok()) return Verdict::kSolved;
  EXPECT_EQ(sol->outcome, SolveOutcome::kConverged);
  EXPECT_EQ(sol->end_components, brute.end_components);
  std::vector<int> members;  // A minus the goal.
  for (int s = 0; s <= states; ++s) {
    EXPECT_EQ(sol->reaches_goal[s], brute.in_a[s]) << "state " << s;
    if (!brute.in_a[s]) {
      EXPECT_TRUE(std::isnan(sol->values[s])) << "state " << s;
      continue;
    }
    EXPECT_NEAR(sol->values[s], brute.best[s], 1e-8) << "state " << s;
    if (s == states) continue;
    members.push_back(s);
    // q from the brute-force optimum for safe rows, and the optimal set.
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      double q = m.row_reward(r);
      bool safe = true;
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        safe = safe && brute.in_a[m.entry_next(e)];
        q += m.entry_probability(e) * brute.best[m.entry_next(e)];
      }
      EXPECT_EQ(sol->safe_row[r], safe);
      if (!safe) {
        EXPECT_TRUE(std::isnan(sol->q[r]));
        continue;
      }
      EXPECT_NEAR(sol->q[r], q, 1e-8);
      if (std::fabs(q - brute.best[s]) > 1e-6) {
        EXPECT_EQ(sol->optimal_row[r], 0);
      } else if (std::fabs(q - brute.best[s]) < 1e-12) {
        EXPECT_EQ(sol->optimal_row[r], 1);
      }
    }
  }
  // The pick reaches the goal w.p. 1 from every state of A, is optimal within the loss bound,
  // and its expected steps match.
  const auto reach = Closure(Successors(m, sol->best_row));
  for (int s : members) {
    for (int t = 0; t <= states; ++t) {
      EXPECT_TRUE(!reach[s][t] || reach[t][states]) << s << " reaches " << t;
    }
  }
  const Eigen::MatrixXd x = ValuesAndSteps(m, sol->best_row, members);
  for (size_t i = 0; i < members.size(); ++i) {
    EXPECT_LE(std::fabs(x(i, 0) - brute.best[members[i]]), sol->policy_loss_bound + 1e-12);
    EXPECT_NEAR(sol->expected_steps[members[i]], x(i, 1), 1e-9 * std::max(1.0, x(i, 1)));
  }
  return Verdict::kSolved;
}

// 6 states, every policy proper (the goal w.p. >= 0.1 from every row): no end components.
TEST(TotalRewardTest, MatchesBruteForceOnModelsWhereEveryPolicyIsProper) {
  for (Objective objective : {Objective::kMinimize, Objective::kMaximize}) {
    for (uint64_t seed = 1; seed <= 20; ++seed) {
      SCOPED_TRACE("seed " + std::to_string(seed));
      const bool mixed = objective == Objective::kMaximize;  // Costs > 0 when minimising.
      const Model m = testing::MustBuild(RandomSsp(seed, objective, 6, true, mixed));
      EXPECT_EQ(CheckAgainstBruteForce(m, 6), Verdict::kSolved);
    }
  }
}

// 7 states with traps, unsafe rows and zero-cost loops, costs never of the wrong sign; then
// rewards of mixed sign, where exactly the models with a loop earning better than 0 per step
// must be rejected.
TEST(TotalRewardTest, MatchesBruteForceWithTrapsLoopsAndMixedSigns) {
  int count[3][2] = {};  // [verdict][mixed]
  for (bool mixed : {false, true}) {
    for (Objective objective : {Objective::kMinimize, Objective::kMaximize}) {
      for (uint64_t seed = 1; seed <= 40; ++seed) {
        SCOPED_TRACE("seed " + std::to_string(seed) + (mixed ? " mixed" : ""));
        const Model m = testing::MustBuild(RandomSsp(seed, objective, 7, false, mixed));
        ++count[static_cast<int>(CheckAgainstBruteForce(m, 7))][mixed];
      }
    }
  }
  // The cases are not vacuous (counts as generated by these seeds, at least).
  EXPECT_GE(count[static_cast<int>(Verdict::kSolved)][0], 60);
  EXPECT_EQ(count[static_cast<int>(Verdict::kLoopRejected)][0], 0);
  EXPECT_GE(count[static_cast<int>(Verdict::kSolved)][1], 20);
  EXPECT_GE(count[static_cast<int>(Verdict::kLoopRejected)][1], 10);
}

// ---------------------------------------------------------------------------------------
// Large models: inexact evaluation (total_reward.h, "Large models"; internal/total_policy.h).
// 4000 non-goal states, above the 3000 up to which kAuto evaluates exactly.

// Random exits: non-goal states 0..n-1 and the goal n. Every state has the same three actions
// (probability g of stepping into the goal, cost c): express (0.5, 10), walk (0.1, 1), crawl
// (0.02, 0.3); the rest of the mass goes to 4 random non-goal states (seeded), so a policy's
// factors would fill in (about n^3 / 3 multiply-adds, past their cap) and each system is
// solved iteratively. Derived here: with the same actions everywhere, "always k" gives the
// constant V = c_k / g_k (20, 10, 15), and V = 10 solves the Bellman equation
// V = min_k (c_k + (1 - g_k) V) (express: 10 + 0.5 * 10 = 15, walk: 10, crawl:
// 0.3 + 0.98 * 10 = 10.1): V* = 10 everywhere, by walking, N = 1 / 0.1 = 10 steps.
// The constant 20 is a supersolution (c_k + (1 - g_k) 20 <= 20 for each k), so every policy
// has V^mu <= 20. Maximising rewards -c mirrors all of it.
constexpr double kExitGoal[3] = {0.5, 0.1, 0.02};
constexpr double kExitCost[3] = {10.0, 1.0, 0.3};

Model RandomExits(int n, uint64_t seed, Objective objective) {
  std::mt19937_64 rng(seed);
  ModelSpec spec;
  spec.name = "random-exits";
  spec.objective = objective;
  spec.action_names = {"express", "walk", "crawl"};
  const double sign = objective == Objective::kMinimize ? 1.0 : -1.0;
  for (int s = 0; s <= n; ++s) {
    spec.AddState("s" + std::to_string(s), s == n);
    if (s == n) continue;
    for (int a = 0; a < 3; ++a) {
      spec.AddStateAction(a, sign * kExitCost[a]);
      spec.AddOutcome(n, kExitGoal[a]);
      for (int k = 0; k < 4; ++k) {
        spec.AddOutcome(static_cast<StateId>(rng() % n), (1.0 - kExitGoal[a]) / 4.0);
      }
    }
  }
  return testing::MustBuild(spec);
}

TEST(TotalRewardLargeTest, InexactEvaluationMatchesTheClosedFormOfRandomExits) {
  const int n = 4000;
  for (Objective objective : {Objective::kMinimize, Objective::kMaximize}) {
    const double sign = objective == Objective::kMinimize ? 1.0 : -1.0;
    const Model m = RandomExits(n, 7, objective);
    const TotalRewardSolution s = MustSolve(m);
    EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
    EXPECT_GE(s.iterations, 2);  // The start policy was improved on.
    EXPECT_LE(s.value_error_bound, 1e-8);
    for (StateId st = 0; st < n; ++st) {
      ASSERT_LE(std::fabs(s.values[st] - sign * 10.0), s.value_error_bound + 1e-12) << st;
      ASSERT_EQ(s.best_row[st], m.row_begin(st) + 1) << st;  // Walk.
      ASSERT_NEAR(s.expected_steps[st], 10.0, 1e-9) << st;
      // q of the other rows against V*: express 10 + 0.5 * 10, crawl 0.3 + 0.98 * 10.
      ASSERT_NEAR(s.q[m.row_begin(st)], sign * 15.0, s.value_error_bound + 1e-12) << st;
      ASSERT_NEAR(s.q[m.row_begin(st) + 2], sign * 10.1, s.value_error_bound + 1e-12) << st;
    }
    EXPECT_NEAR(s.max_expected_steps, 10.0, 1e-9);
    EXPECT_LE(s.policy_loss_bound, 1e-7);
  }
}

// A ring of n states, every goal_every-th one a goal; 3 actions per state, each with a cost
// in [0.5, 2] and 4 outcomes at most 10 states away (weights random): slow to reach a goal
// (hundreds of steps). A fill-reducing order turns the ring into a band, so kAuto factors its
// systems; kBiCgStab iterates.
Model CostRing(int n, int goal_every, uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.name = "cost-ring";
  spec.objective = Objective::kMinimize;
  spec.action_names = {"a", "b", "c"};
  for (int s = 0; s < n; ++s) {
    const bool goal = s % goal_every == 0;
    spec.AddState("s" + std::to_string(s), goal);
    if (goal) continue;
    for (int a = 0; a < 3; ++a) {
      spec.AddStateAction(a, 0.5 + 1.5 * unit(rng));
      std::vector<double> w(4);
      double sum = 0.0;
      for (double& x : w) sum += (x = 0.1 + unit(rng));
      for (double x : w) {
        const int step = static_cast<int>(rng() % 21) - 10;
        spec.AddOutcome(static_cast<StateId>(((s + step) % n + n) % n), x / sum);
      }
    }
  }
  return testing::MustBuild(spec);
}

// Solves (I - P_rows) x = b on the non-goal states with Eigen's sparse LU, for the columns
// b = rewards and b = 1: the values and expected steps of `rows`, by an independent library.
Eigen::MatrixXd SparseLuValuesAndSteps(const Model& m, const std::vector<RowId>& rows) {
  std::vector<int> local(m.num_states(), -1);
  int size = 0;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (!m.terminal(s)) local[s] = size++;
  }
  std::vector<Eigen::Triplet<double>> triplets;
  Eigen::MatrixXd b(size, 2);
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (local[s] < 0) continue;
    triplets.emplace_back(local[s], local[s], 1.0);
    b(local[s], 0) = m.row_reward(rows[s]);
    b(local[s], 1) = 1.0;
    for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
      const int j = local[m.entry_next(e)];
      if (j >= 0) triplets.emplace_back(local[s], j, -m.entry_probability(e));
    }
  }
  Eigen::SparseMatrix<double> a(size, size);
  a.setFromTriplets(triplets.begin(), triplets.end());
  Eigen::SparseLU<Eigen::SparseMatrix<double>> lu;
  lu.compute(a);
  EXPECT_EQ(lu.info(), Eigen::Success);
  Eigen::MatrixXd x = lu.solve(b);
  x += lu.solve(Eigen::MatrixXd(b - a * x));  // One step of refinement.
  Eigen::MatrixXd out = Eigen::MatrixXd::Constant(m.num_states(), 2, 0.0);
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (local[s] >= 0) out.row(s) = x.row(local[s]);
  }
  return out;
}

// The pick's values W (by sparse LU) admit no improving row, so the pick is optimal and W is
// V* (total_reward.h, Optimality): the reported values must be within their bound of W.
void CheckRingAgainstSparseLu(const Model& m, const TotalRewardSolution& s) {
  ASSERT_EQ(s.outcome, SolveOutcome::kConverged);
  EXPECT_EQ(s.states_not_reaching_goal, 0);
  EXPECT_GE(s.iterations, 2);
  const Eigen::MatrixXd w = SparseLuValuesAndSteps(m, s.best_row);
  double most_steps = 0.0;
  for (StateId st = 0; st < m.num_states(); ++st) {
    if (m.terminal(st)) continue;
    const double scale = std::max(1.0, std::fabs(w(st, 0)));
    for (RowId r = m.row_begin(st); r < m.row_end(st); ++r) {
      double q = m.row_reward(r);
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        q += m.entry_probability(e) * w(m.entry_next(e), 0);
      }
      ASSERT_GE(q, w(st, 0) - 1e-9 * scale) << "row " << r << " improves on the pick";
    }
    ASSERT_NEAR(s.values[st], w(st, 0), s.value_error_bound + 1e-11 * scale) << st;
    ASSERT_NEAR(s.expected_steps[st], w(st, 1), 1e-9 * w(st, 1)) << st;
    most_steps = std::max(most_steps, w(st, 1));
  }
  EXPECT_GT(most_steps, 50.0);  // Not a trivial system.
  EXPECT_NEAR(s.max_expected_steps, most_steps, 1e-9 * most_steps);
  EXPECT_LE(s.value_error_bound, 1e-8);
}

TEST(TotalRewardLargeTest, InexactEvaluationMatchesSparseLuOnARing) {
  const Model m = CostRing(4400, 400, 3);
  for (LinearSolver solver : {LinearSolver::kAuto, LinearSolver::kBiCgStab}) {
    SCOPED_TRACE(solver == LinearSolver::kAuto ? "auto" : "bicgstab");
    TotalRewardOptions options;
    options.linear_solver = solver;
    CheckRingAgainstSparseLu(m, MustSolve(m, options));
  }
}

// Cancel and the time limit are polled inside every evaluation on the inexact path: stopped
// before the start, the run takes no improvement step at all (the exact path finishes its
// first evaluation and improves once: ProgressCancelAndLimits below). What it reports must
// still be honest: the values T V of a proper policy's approximate values V satisfy
// values >= V* - evaluation_error_bound (T is monotone and V^mu >= V*), with V* = 10.
TEST(TotalRewardLargeTest, CancelAndTimeLimitStopInsideTheFirstEvaluation) {
  const int n = 4000;
  const Model m = RandomExits(n, 11, Objective::kMinimize);
  CancelToken cancelled;
  cancelled.Cancel();
  TotalRewardOptions limited;
  limited.time_limit_seconds = 1e-9;
  struct Case {
    const TotalRewardOptions options;
    const CancelToken* cancel;
    SolveOutcome outcome;
  };
  for (const Case& c : {Case{TotalRewardOptions(), &cancelled, SolveOutcome::kCancelled},
                        Case{limited, nullptr, SolveOutcome::kTimeLimit}}) {
    Result<TotalRewardSolution> s = TotalRewardPolicyIteration(m, c.options, nullptr, c.cancel);
    ASSERT_OK(s);
    EXPECT_EQ(s->outcome, c.outcome);
    EXPECT_EQ(s->iterations, 0);
    EXPECT_TRUE(std::isnan(s->value_error_bound));
    EXPECT_TRUE(std::isnan(s->policy_loss_bound));
    for (StateId st = 0; st < n; ++st) {
      ASSERT_GE(s->values[st] + s->evaluation_error_bound, 10.0 - 1e-12) << st;
      // The picks are proper (each row enters the goal w.p. >= 0.02); their expected steps,
      // 1 / g of the row, are reported only if solved to the report's accuracy.
      const RowId pick = s->best_row[st];
      ASSERT_GE(pick, m.row_begin(st));
      const double steps = 1.0 / kExitGoal[pick - m.row_begin(st)];
      ASSERT_TRUE(std::isnan(s->expected_steps[st]) ||
                  std::fabs(s->expected_steps[st] - steps) <= 1e-9 * steps)
          << st;
    }
  }
  // Stopped between improvements (from the progress report after the first one), the run
  // reports the start policy's completed evaluation V, within eps of V^mu <= 20; so also
  // values = T V <= T V^mu + eps <= T 20 + eps = min(10 + 0.5 * 20, 1 + 0.9 * 20,
  // 0.3 + 0.98 * 20) + eps = 19 + eps (T is monotone and moves no value by more than eps).
  CancelToken cancel;
  ProgressFn progress = [&](const Progress&) { cancel.Cancel(); };
  Result<TotalRewardSolution> s = TotalRewardPolicyIteration(m, {}, &progress, &cancel);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kCancelled);
  EXPECT_EQ(s->iterations, 1);
  EXPECT_LT(s->evaluation_error_bound, 1.0);  // A share of the first Bellman residual.
  for (StateId st = 0; st < n; ++st) {
    ASSERT_GE(s->values[st], 10.0 - s->evaluation_error_bound - 1e-12) << st;
    ASSERT_LE(s->values[st], 19.0 + s->evaluation_error_bound + 1e-12) << st;
  }
}

// The solver of one policy's systems, on its own: through its factors, BiCGSTAB and
// Gauss-Seidel sweeps against Eigen's sparse LU on the assembled system, with the reported residual
// checked as a bound on the recomputed one.
struct PolicySystemFixture {
  explicit PolicySystemFixture(const Model& model) : m(model) {
    local.assign(m.num_states(), -1);
    rows.assign(m.num_states(), -1);
    for (StateId s = 0; s < m.num_states(); ++s) {
      if (m.terminal(s)) continue;
      local[s] = static_cast<int32_t>(states.size());
      states.push_back(s);
      rows[s] = m.row_begin(s);
    }
    const Eigen::MatrixXd w = SparseLuValuesAndSteps(m, rows);
    std::vector<Eigen::Triplet<double>> triplets;
    for (size_t i = 0; i < states.size(); ++i) {
      rewards.push_back(m.row_reward(rows[states[i]]));
      exact.push_back(w(states[i], 0));
      most_steps = std::max(most_steps, w(states[i], 1));
      triplets.emplace_back(i, i, 1.0);
      for (int64_t e = m.entry_begin(rows[states[i]]); e < m.entry_end(rows[states[i]]); ++e) {
        const int32_t j = local[m.entry_next(e)];
        if (j >= 0) triplets.emplace_back(i, j, -m.entry_probability(e));
      }
    }
    a.resize(states.size(), states.size());
    a.setFromTriplets(triplets.begin(), triplets.end());
  }
  // sup |b - (I - P) x|, recomputed by Eigen.
  double Residual(const std::vector<double>& x) const {
    const Eigen::Map<const Eigen::VectorXd> xv(x.data(), x.size());
    const Eigen::Map<const Eigen::VectorXd> bv(rewards.data(), rewards.size());
    return (bv - a * xv).lpNorm<Eigen::Infinity>();
  }
  const Model& m;
  std::vector<StateId> states;
  std::vector<int32_t> local;
  std::vector<RowId> rows;
  std::vector<double> rewards, exact;
  double most_steps = 0.0;
  Eigen::SparseMatrix<double> a;
};

// A chain with one action: from s, steps -2..+2 (weights 1, 2, 3, 2, 1, clipped at the ends)
// w.p. 0.99 and the goal w.p. 0.01; cost in [1, 2]. Banded, up to 100 expected steps.
Model LeakyChain(int n, uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.name = "leaky-chain";
  spec.objective = Objective::kMinimize;
  spec.action_names = {"step"};
  for (int s = 0; s <= n; ++s) {
    spec.AddState("s" + std::to_string(s), s == n);
    if (s == n) continue;
    spec.AddStateAction(0, 1.0 + unit(rng));
    spec.AddOutcome(n, 0.01);
    const double weight[5] = {1, 2, 3, 2, 1};
    for (int d = -2; d <= 2; ++d) {
      spec.AddOutcome(std::clamp(s + d, 0, n - 1), 0.99 * weight[d + 2] / 9.0);
    }
  }
  return testing::MustBuild(spec);
}

TEST(TotalRewardLargeTest, PolicySolvesAgreeWithSparseLu) {
  const std::function<bool()> never = [] { return false; };
  const Model chain = LeakyChain(4000, 5);
  const Model exits = RandomExits(1000, 5, Objective::kMinimize);  // The factors fill in.
  struct Case {
    const Model* model;
    double factor_work;  // Cap on the factorisation's multiply-adds; 0: no factors.
    bool sweeps_only;
    bool factored;  // Expected.
  };
  for (const Case& c : {Case{&chain, 1e8, false, true}, Case{&chain, 0, false, false},
                        Case{&chain, 0, true, false}, Case{&exits, 1e8, false, false},
                        Case{&exits, 1e10, false, true}, Case{&exits, 0, true, false}}) {
    SCOPED_TRACE(c.model->name() + " factor work " + std::to_string(c.factor_work) +
                 (c.sweeps_only ? " sweeps" : ""));
    PolicySystemFixture f(*c.model);
    internal::TotalPolicyMatrix p;
    p.Assign(*c.model, f.states, f.local, f.rows, 1);
    if (c.factor_work > 0) {
      EXPECT_OK(p.Factor(64e6, c.factor_work, internal::StopCheck(), 1));
    }
    EXPECT_EQ(p.factored(), c.factored);
    internal::TotalSolvePlan plan;
    plan.sweeps_only = c.sweeps_only;
    std::vector<double> x(f.states.size(), 0.0);
    const internal::TotalSolveResult r =
        internal::SolveTotalSystem(p, f.rewards, 1e-10, 1e6, 1, never, plan, x);
    EXPECT_TRUE(r.reached);
    EXPECT_FALSE(r.interrupted);
    EXPECT_LE(r.residual, std::max(1e-10, r.aim));
    EXPECT_LE(f.Residual(x), r.residual);
    // |x - x*| <= residual * max N (total_reward.h, Bounds), plus the reference's rounding.
    for (size_t i = 0; i < x.size(); ++i) {
      ASSERT_NEAR(x[i], f.exact[i], r.residual * f.most_steps + 1e-11 * std::fabs(f.exact[i]));
    }
  }
}

// An interruption ends a solve where it is; the residual it reports still bounds the true
// one. Polls are counted, not timed.
TEST(TotalRewardLargeTest, AnInterruptedPolicySolveReportsAnHonestResidual) {
  const Model chain = LeakyChain(4000, 9);
  PolicySystemFixture f(chain);
  {  // A factorisation stopped by its StopCheck leaves the policy unfactored.
    CancelToken cancelled;
    cancelled.Cancel();
    internal::StopCheck stop;
    stop.cancel = &cancelled;
    internal::TotalPolicyMatrix p;
    p.Assign(chain, f.states, f.local, f.rows, 1);
    EXPECT_EQ(p.Factor(64e6, 1e8, stop, 1).code(), StatusCode::kCancelled);
    EXPECT_FALSE(p.factored());
  }
  for (bool sweeps_only : {false, true}) {
    internal::TotalPolicyMatrix p;
    p.Assign(chain, f.states, f.local, f.rows, 1);
    internal::TotalSolvePlan plan;
    plan.sweeps_only = sweeps_only;
    int polls = 0;
    const std::function<bool()> after_three = [&] { return ++polls > 3; };
    std::vector<double> x(f.states.size(), 0.0);
    const internal::TotalSolveResult r =
        internal::SolveTotalSystem(p, f.rewards, 1e-12, 1e6, 1, after_three, plan, x);
    EXPECT_TRUE(r.interrupted);
    EXPECT_FALSE(r.reached);
    EXPECT_GT(r.residual, r.aim);
    EXPECT_LE(f.Residual(x), r.residual);
    EXPECT_LT(r.work, 100.0);
  }
}

// ---------------------------------------------------------------------------------------
// Limits, cancellation and options.

// A line of states 0..7 and a goal G. "walk" costs 1 and moves one state on (7 -> G); "taxi"
// costs 10 and goes to G. Minimising, walking from i costs 8 - i <= 8 < 10, and any policy
// taking the taxi at j >= i pays (j - i) + 10 > 8 - i, so V*(i) = 8 - i, all "walk".
Model TaxiLine() {
  SpecWriter w(0.9, Objective::kMinimize);
  std::vector<std::string> names;
  for (int i = 0; i < 8; ++i) names.push_back(std::to_string(i));
  names.push_back("G");
  std::vector<bool> terminal(9, false);
  terminal[8] = true;
  w.States(names, terminal);
  for (int i = 0; i < 8; ++i) {
    w.Action(names[i], "walk", {{names[i + 1], 1.0}}, 1.0);
    w.Action(names[i], "taxi", {{"G", 1.0}}, 10.0);
  }
  return w.Build();
}

TEST(TotalRewardTest, ProgressCancelAndLimits) {
  const Model m = TaxiLine();
  std::vector<Progress> seen;
  ProgressFn progress = [&](const Progress& p) { seen.push_back(p); };
  Result<TotalRewardSolution> s =
      TotalRewardPolicyIteration(m, TotalRewardOptions(), &progress, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  for (int i = 0; i < 8; ++i) {
    EXPECT_NEAR(s->values[i], 8.0 - i, 1e-12);
    EXPECT_EQ(s->best_row[i], Row(m, std::to_string(i), "walk"));
    EXPECT_NEAR(s->expected_steps[i], 8.0 - i, 1e-12);
  }
  // One report per improvement that changed the policy (the last one changes nothing).
  ASSERT_EQ(seen.size(), static_cast<size_t>(s->iterations - 1));
  for (size_t k = 0; k < seen.size(); ++k)
    EXPECT_EQ(seen[k].iteration, static_cast<int64_t>(k + 1));

  // Cancelled up front: one improvement, then the last evaluated policy is reported. Its
  // values are costs of proper policies, so they cannot undercut V*; no bound on V* is claimed.
  CancelToken cancel;
  cancel.Cancel();
  s = TotalRewardPolicyIteration(m, TotalRewardOptions(), nullptr, &cancel);
  ASSERT_OK(s);
  if (s->outcome != SolveOutcome::kConverged) {
    EXPECT_EQ(s->outcome, SolveOutcome::kCancelled);
    EXPECT_EQ(s->iterations, 1);
    EXPECT_TRUE(std::isnan(s->value_error_bound));
    EXPECT_TRUE(std::isnan(s->policy_loss_bound));
  }
  for (int i = 0; i < 8; ++i) {
    EXPECT_GE(s->values[i], 8.0 - i - 1e-9);
    EXPECT_TRUE(std::isfinite(s->expected_steps[i]));
  }

  TotalRewardOptions options;
  options.max_iterations = 2;
  s = TotalRewardPolicyIteration(m, options, nullptr, nullptr);
  ASSERT_OK(s);
  if (s->outcome != SolveOutcome::kConverged) {
    EXPECT_EQ(s->outcome, SolveOutcome::kIterationLimit);
    EXPECT_EQ(s->iterations, 2);
  }
  options = TotalRewardOptions();
  options.time_limit_seconds = 1e-9;
  s = TotalRewardPolicyIteration(m, options, nullptr, nullptr);
  ASSERT_OK(s);
  if (s->outcome != SolveOutcome::kConverged) {
    EXPECT_EQ(s->outcome, SolveOutcome::kTimeLimit);
  }
}

TEST(TotalRewardTest, OptionsOutOfBoundsAreRejected) {
  EXPECT_OK(CheckTotalRewardOptions(TotalRewardOptions()));
  struct Case {
    void (*spoil)(TotalRewardOptions&);
    const char* field;
  };
  for (const Case& c : std::vector<Case>{
           {[](TotalRewardOptions& o) { o.tolerance = 0.0; }, "tolerance"},
           {[](TotalRewardOptions& o) { o.tolerance = std::nan(""); }, "tolerance"},
           {[](TotalRewardOptions& o) { o.max_iterations = 0; }, "max_iterations"},
           {[](TotalRewardOptions& o) { o.time_limit_seconds = -1.0; }, "time_limit_seconds"},
           {[](TotalRewardOptions& o) { o.tie_tolerance = -1e-9; }, "tie_tolerance"},
           {[](TotalRewardOptions& o) { o.threads = 300; }, "threads"}}) {
    TotalRewardOptions options;
    c.spoil(options);
    const Status status = CheckTotalRewardOptions(options);
    EXPECT_EQ(status.code(), StatusCode::kInvalidArgument) << c.field;
    EXPECT_NE(status.message().find(c.field), std::string::npos) << status.message();
    Result<TotalRewardSolution> s =
        TotalRewardPolicyIteration(Boat(5.0), options, nullptr, nullptr);
    EXPECT_EQ(s.status().code(), StatusCode::kInvalidArgument) << c.field;
  }
}

}  // namespace
}  // namespace mdp
