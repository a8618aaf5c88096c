// Tests solver/model.{h,cc}: compiling a ModelSpec into CSR rows — order, merging of
// repeated next states, normalisation, expected rewards, lookups.
#include "solver/model.h"

#include <gtest/gtest.h>

#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::SpecWriter;

TEST(ModelTest, RowsFollowDocumentOrderAndMergeRepeatedNextStates) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"s", "t"}, {});
  // The same next state twice with different rewards: p(s', r | s, a).
  w.Action("s", "x", {{"t", 0.25, 4.0}, {"s", 0.5, 0.0}, {"t", 0.25, 8.0}}, 1.0);
  w.Action("s", "y", {{"s", 1.0, -1.0}});
  w.Action("t", "x", {{"t", 1.0, 0.0}});
  const Model m = w.Build();
  ASSERT_EQ(m.num_states(), 2);
  ASSERT_EQ(m.num_rows(), 3);
  EXPECT_EQ(m.row_begin(0), 0);
  EXPECT_EQ(m.row_end(0), 2);
  EXPECT_EQ(m.row_action_name(0), "x");
  EXPECT_EQ(m.row_action_name(1), "y");
  // Row 0: entries sorted by next state, t merged to 0.5.
  ASSERT_EQ(m.entry_end(0) - m.entry_begin(0), 2);
  EXPECT_EQ(m.entry_next(m.entry_begin(0)), 0);
  EXPECT_DOUBLE_EQ(m.entry_probability(m.entry_begin(0)), 0.5);
  EXPECT_EQ(m.entry_next(m.entry_begin(0) + 1), 1);
  EXPECT_DOUBLE_EQ(m.entry_probability(m.entry_begin(0) + 1), 0.5);
  // Expected reward: 1 + 0.25 * 4 + 0.5 * 0 + 0.25 * 8 = 4.
  EXPECT_DOUBLE_EQ(m.row_reward(0), 4.0);
  EXPECT_DOUBLE_EQ(m.row_reward(1), -1.0);
  EXPECT_EQ(m.num_outcomes_in_document(), 5);
  EXPECT_EQ(m.num_entries(), 4);
}

TEST(ModelTest, ProbabilitiesWithinToleranceAreScaledToSumToOne) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"s"}, {});
  w.Action("s", "x", {{"s", 0.3333333}, {"s", 0.3333333}, {"s", 0.3333333}});
  const Model m = w.Build();
  ASSERT_EQ(m.num_entries(), 1);
  EXPECT_NEAR(m.entry_probability(0), 1.0, 1e-15);
}

TEST(ModelTest, LookupsByName) {
  SpecWriter w(0.9, Objective::kMinimize);
  w.States({"alpha", "beta"}, {false, true});
  w.Action("alpha", "go", {{"beta", 1.0, 3.0}});
  const Model m = w.Build();
  EXPECT_EQ(m.FindState("beta"), std::optional<StateId>(1));
  EXPECT_FALSE(m.FindState("gamma").has_value());
  EXPECT_EQ(m.FindRow(0, "go"), std::optional<RowId>(0));
  EXPECT_FALSE(m.FindRow(0, "stay").has_value());
  EXPECT_FALSE(m.FindRow(1, "go").has_value());
  EXPECT_TRUE(m.terminal(1));
  EXPECT_EQ(m.objective(), Objective::kMinimize);
  EXPECT_GT(m.ByteSize(), 0);
}

TEST(ModelTest, InvalidSpecIsRefusedWithAReason) {
  SpecWriter w(1.5, Objective::kMaximize);
  w.States({"s"}, {});
  w.Action("s", "x", {{"s", 1.0}});
  Result<Model> m = BuildModel(w.Spec());
  ASSERT_FALSE(m.ok());
  EXPECT_EQ(m.status().code(), StatusCode::kInvalidArgument);
  EXPECT_NE(m.status().message().find("discount"), std::string::npos);
}

}  // namespace
}  // namespace mdp
