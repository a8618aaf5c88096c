// Tests solver/solution.{h,cc}: Q-table, optimal action sets and ties, the deterministic
// tie-break, the uniform optimal policy, action gaps and the smallest-gap list.
#include "solver/solution.h"

#include <gtest/gtest.h>

#include <cmath>
#include <vector>

#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::kAllMethods;
using testing::MustSolve;

using testing::SpecWriter;

// "stay" earns 1 forever (1 / (1 - g)); "leave" earns 5 once into a terminal state. At
// g = 0.8 both are worth 5 exactly (closed form), a tie the floating-point sum 1/(1-0.8)
// = 5.000000000000001 does not reproduce bit for bit.
Model StayOrLeave(double g) {
  SpecWriter w(g, Objective::kMaximize);
  w.States({"here", "gone"}, {false, true});
  w.Action("here", "stay", {{"here", 1.0, 1.0}});
  w.Action("here", "leave", {{"gone", 1.0, 5.0}});
  return w.Build();
}


// One state that pays -1 and stays, at g = 0.9999: V* = -1 / (1 - g) (closed form, the
// geometric series). From any iterate v, Finalize's values are T(T v) = V* + g^2 (v - V*)
// and its bound is g^2 |T v - v| / (1 - g) = g^2 |v - V*|: the contraction bound is exactly
// tight here, so rounding alone decides whether the computed bound covers the computed
// values. Iterates far from V* (the discounted oracle fuzz target met one near 2e8, where
// the bound fell 8e-5 short) must still be covered, which needs the rounding allowance.
TEST(SolutionTest, BoundsCoverTheirOwnRoundingWhereTheyAreTight) {
  SpecWriter w(0.9999, Objective::kMaximize);
  w.States({"here"}, {false});
  w.Action("here", "stay", {{"here", 1.0, -1.0}});
  const Model m = w.Build();
  const long double g = m.discount();
  const long double v_star = -1.0L / (1.0L - g);
  int checked = 0;
  for (double base : {2.1e8, -3.7e7, 5.5e5, 1e12}) {
    for (int k = 0; k < 200; ++k) {
      const std::vector<double> v = {base * (1.0 + 1e-3 * k)};
      Solution s;
      Finalize(m, v, SolveOptions{}, s);
      const long double error = std::fabs(static_cast<long double>(s.values[0]) - v_star);
      ASSERT_LE(error, static_cast<long double>(s.value_error_bound))
          << "v = " << v[0] << ", values = " << s.values[0];
      ASSERT_LE(std::fabs(static_cast<long double>(s.q[0]) - v_star),
                static_cast<long double>(s.q_error_bound));
      ++checked;
    }
  }
  EXPECT_EQ(checked, 800);
}

TEST(SolutionTest, ExactTieIsReportedWithBothActions) {
  const Model m = StayOrLeave(0.8);
  for (Method method : {Method::kValueIteration, Method::kGaussSeidel, Method::kPolicyIteration,
                        Method::kModifiedPolicyIteration}) {
    SCOPED_TRACE(std::string(MethodName(method)));
    const Solution s = MustSolve(m, method);
    EXPECT_NEAR(s.values[0], 5.0, 1e-9);
    EXPECT_EQ(s.OptimalCount(m, 0), 2);
    EXPECT_EQ(s.tied_states, 1);
    // Deterministic tie-break: the first optimal action in document order.
    EXPECT_EQ(m.row_action_name(s.best_row[0]), "stay");
    EXPECT_LT(s.action_gap[0], 1e-9);
  }
}

TEST(SolutionTest, ClearWinnerHasOneOptimalActionAndTheRightGap) {
  // g = 0.9: stay is worth 10, leave 5; gap 5.
  const Solution s = MustSolve(StayOrLeave(0.9));
  const Model m = StayOrLeave(0.9);
  EXPECT_EQ(s.OptimalCount(m, 0), 1);
  EXPECT_EQ(m.row_action_name(s.best_row[0]), "stay");
  EXPECT_NEAR(s.action_gap[0], 5.0, 1e-9);
  EXPECT_EQ(s.tied_states, 0);
  // g = 0.75: staying forever is worth 4, leaving 5, so V = 5; Q(stay) = 1 + 0.75 * 5.
  const Model m2 = StayOrLeave(0.75);
  const Solution s2 = MustSolve(m2);
  EXPECT_EQ(m2.row_action_name(s2.best_row[0]), "leave");
  EXPECT_NEAR(s2.action_gap[0], 5.0 - (1.0 + 0.75 * 5.0), 1e-9);
}

TEST(SolutionTest, TerminalStatesHaveValueZeroAndNoAction) {
  const Model m = StayOrLeave(0.9);
  const Solution s = MustSolve(m);
  EXPECT_EQ(s.values[1], 0.0);
  EXPECT_EQ(s.best_row[1], -1);
  EXPECT_TRUE(std::isnan(s.action_gap[1]));
}

TEST(SolutionTest, SingleActionStateHasNoGap) {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"only"}, {});
  w.Action("only", "wait", {{"only", 1.0, 2.0}});
  const Model m = w.Build();
  const Solution s = MustSolve(m);
  EXPECT_NEAR(s.values[0], 4.0, 1e-12);
  EXPECT_TRUE(std::isnan(s.action_gap[0]));
  EXPECT_EQ(s.OptimalCount(m, 0), 1);
}

TEST(SolutionTest, QTableIsOneStepLookaheadOfValues) {
  const Model m = testing::MustBuild(testing::RandomSpec(7, {}));
  const Solution s = MustSolve(m);
  for (StateId st = 0; st < m.num_states(); ++st) {
    for (RowId r = m.row_begin(st); r < m.row_end(st); ++r) {
      double expected = m.row_reward(r);
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        expected += m.discount() * m.entry_probability(e) * s.values[m.entry_next(e)];
      }
      // Q is built from V1 and values = max Q = T V1, so they differ by the bound at most.
      EXPECT_NEAR(s.q[r], expected, 1e-8);
    }
  }
}

TEST(SolutionTest, UniformOptimalPolicySplitsTies) {
  const Model m = StayOrLeave(0.8);
  const Solution s = MustSolve(m);
  const Policy p = UniformOptimalPolicy(m, s);
  EXPECT_DOUBLE_EQ(p.row_probability[0], 0.5);
  EXPECT_DOUBLE_EQ(p.row_probability[1], 0.5);
  EXPECT_OK(CheckPolicy(m, p));
  const Policy greedy = GreedyPolicy(m, s);
  EXPECT_DOUBLE_EQ(greedy.row_probability[0], 1.0);
  EXPECT_DOUBLE_EQ(greedy.row_probability[1], 0.0);
}

TEST(SolutionTest, LooseSolveWidensTheTieToleranceToCoverItsError) {
  // A solve stopped early has a large bound; the tie tolerance grows with it so that no
  // truly optimal action is left out.
  const Model m = StayOrLeave(0.9);
  SolveOptions options;
  options.method = Method::kValueIteration;
  options.max_iterations = 3;
  Result<Solution> s = Solve(m, options);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kIterationLimit);
  EXPECT_GE(s->tie_tolerance, 2.0 * s->q_error_bound);
  // After 3 sweeps from 0 the values are far from optimal (10): the bound must say so.
  EXPECT_GE(s->value_error_bound, std::fabs(10.0 - s->values[0]));
}

TEST(SolutionTest, SmallestGapsSkipsTiedAndSingleActionStates) {
  SpecWriter w(0.8, Objective::kMaximize);
  w.States({"tied", "near", "far", "solo", "end"}, {false, false, false, false, true});
  w.Action("tied", "stay", {{"tied", 1.0, 1.0}});
  w.Action("tied", "leave", {{"end", 1.0, 5.0}});
  w.Action("near", "x", {{"end", 1.0, 3.0}});
  w.Action("near", "y", {{"end", 1.0, 3.25}});
  w.Action("far", "x", {{"end", 1.0, 0.0}});
  w.Action("far", "y", {{"end", 1.0, 7.0}});
  w.Action("solo", "x", {{"end", 1.0, 1.0}});
  const Model m = w.Build();
  const Solution s = MustSolve(m);
  const auto gaps = SmallestGaps(m, s, 10);
  ASSERT_EQ(gaps.size(), 2u);
  EXPECT_EQ(m.state_name(gaps[0].first), "near");
  EXPECT_NEAR(gaps[0].second, 0.25, 1e-12);
  EXPECT_EQ(m.state_name(gaps[1].first), "far");
  EXPECT_EQ(SmallestGaps(m, s, 1).size(), 1u);
}

}  // namespace
}  // namespace mdp
