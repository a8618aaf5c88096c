// Tests solver/compare.{h,cc}: changes between two solutions of one model or of two revisions,
// matched by state and action names.
#include "solver/compare.h"

#include <gtest/gtest.h>

#include "solver/solver.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::MustSolve;
using testing::SpecWriter;

// "stay" earns 1 forever, "leave" earns 5 once (closed form: V = max(1 / (1 - g), 5)).
SpecWriter StayOrLeave(double g) {
  SpecWriter w(g, Objective::kMaximize);
  w.States({"here", "gone"}, {false, true});
  w.Action("here", "stay", {{"here", 1.0, 1.0}});
  w.Action("here", "leave", {{"gone", 1.0, 5.0}});
  return w;
}

TEST(CompareTest, ASolutionComparedWithItselfHasNoChanges) {
  const Model m = testing::MustBuild(testing::RandomSpec(5, {}));
  const Solution s = MustSolve(m);
  const ComparisonReport r = CompareSolutions(m, s, m, s, CompareOptions{});
  EXPECT_EQ(r.common_states, m.num_states());
  EXPECT_EQ(r.optimal_set_changed_count, 0);
  EXPECT_EQ(r.pick_changed_count, 0);
  EXPECT_EQ(r.value_changed_count, 0);
  EXPECT_EQ(r.max_abs_value_difference, 0.0);
  EXPECT_TRUE(r.only_in_a.empty() && r.only_in_b.empty());
  EXPECT_TRUE(r.same_objective && r.same_discount);
}

TEST(CompareTest, ARevisionThatFlipsTheDecisionIsReported) {
  // At g = 0.9 staying is worth 10; at g = 0.75 leaving (5) beats staying (4).
  const Model a = StayOrLeave(0.9).Build();
  const Model b = StayOrLeave(0.75).Build();
  const ComparisonReport r =
      CompareSolutions(a, MustSolve(a), b, MustSolve(b), CompareOptions{});
  EXPECT_FALSE(r.same_discount);
  EXPECT_EQ(r.optimal_set_changed_count, 1);
  EXPECT_EQ(r.pick_changed_count, 1);
  EXPECT_EQ(r.value_changed_count, 1);
  ASSERT_EQ(r.optimal_set_changes.size(), 1u);
  const StateComparison& c = r.optimal_set_changes[0];
  EXPECT_EQ(c.state, "here");
  EXPECT_EQ(c.pick_a, "stay");
  EXPECT_EQ(c.pick_b, "leave");
  EXPECT_NEAR(c.value_a, 10.0, 1e-9);
  EXPECT_NEAR(c.value_b, 5.0, 1e-9);
  EXPECT_NEAR(r.max_abs_value_difference, 5.0, 1e-9);
  EXPECT_NEAR(r.mean_abs_value_difference, 2.5, 1e-9);  // "gone" is 0 in both.
  ASSERT_FALSE(r.largest_value_changes.empty());
  EXPECT_EQ(r.largest_value_changes[0].state, "here");
}

TEST(CompareTest, AddedRemovedStatesAndChangedActionsAreCounted) {
  SpecWriter wa(0.9, Objective::kMaximize);
  wa.States({"s", "old", "end"}, {false, false, true});
  wa.Action("s", "go", {{"end", 1.0, 1.0}});
  wa.Action("old", "go", {{"end", 1.0, 1.0}});
  SpecWriter wb(0.9, Objective::kMaximize);
  wb.States({"s", "new", "end"}, {false, false, true});
  wb.Action("s", "go", {{"end", 1.0, 1.0}});
  wb.Action("s", "wait", {{"s", 1.0, 0.0}});
  wb.Action("new", "go", {{"end", 1.0, 1.0}});
  const Model a = wa.Build();
  const Model b = wb.Build();
  const ComparisonReport r = CompareSolutions(a, MustSolve(a), b, MustSolve(b), CompareOptions{});
  EXPECT_EQ(r.common_states, 2);
  EXPECT_EQ(r.only_in_a, std::vector<std::string>{"old"});
  EXPECT_EQ(r.only_in_b, std::vector<std::string>{"new"});
  EXPECT_EQ(r.actions_changed_count, 1);
  EXPECT_EQ(r.optimal_set_changed_count, 0);  // "go" stays the only optimal action in "s".
}

TEST(CompareTest, DifferencesWithinTheSolveErrorAreNotChanges) {
  // Two loose solves of one model differ, but never by more than their combined bounds.
  const Model m = testing::MustBuild(testing::RandomSpec(8, {}));
  const Solution loose_vi = MustSolve(m, Method::kValueIteration, 1e-2);
  const Solution loose_mpi = MustSolve(m, Method::kModifiedPolicyIteration, 1e-2);
  const ComparisonReport r = CompareSolutions(m, loose_vi, m, loose_mpi, CompareOptions{});
  EXPECT_GT(r.max_abs_value_difference, 0.0);
  EXPECT_EQ(r.value_changed_count, 0);
  EXPECT_LE(r.max_abs_value_difference, r.value_margin);
}

TEST(CompareTest, ListsAreCappedButCountsAreComplete) {
  SpecWriter wa(0.5, Objective::kMaximize);
  SpecWriter wb(0.5, Objective::kMaximize);
  std::vector<std::string> names_a, names_b;
  for (int i = 0; i < 20; ++i) {
    names_a.push_back("a" + std::to_string(i));
    names_b.push_back("b" + std::to_string(i));
  }
  wa.States(names_a, {});
  wb.States(names_b, {});
  for (const auto& n : names_a) wa.Action(n, "x", {{n, 1.0, 1.0}});
  for (const auto& n : names_b) wb.Action(n, "x", {{n, 1.0, 1.0}});
  const Model a = wa.Build();
  const Model b = wb.Build();
  CompareOptions options;
  options.max_listed = 5;
  const ComparisonReport r = CompareSolutions(a, MustSolve(a), b, MustSolve(b), options);
  EXPECT_EQ(r.only_in_a.size(), 5u);
  EXPECT_EQ(r.only_in_a_count, 20);
  EXPECT_EQ(r.only_in_b_count, 20);
  EXPECT_EQ(r.common_states, 0);
}

}  // namespace
}  // namespace mdp
