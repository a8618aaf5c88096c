// Tests solver/model.{h,cc}: compiling a ModelSpec into CSR rows — order, merging of
// repeated next states, normalisation, expected rewards, lookups — and building from
// Validate()'s proof (solver/validate.h) without validating twice.
#include "solver/model.h"

#include <gtest/gtest.h>

#include <string>
#include <vector>

#include "solver/validate.h"
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

TEST(ModelTest, ValidateGivesAProofOnlyWhenItFindsNoErrorAtAll) {
  SpecWriter good(0.9, Objective::kMaximize);
  good.States({"s"}, {});
  good.Action("s", "x", {{"s", 1.0}});
  const ModelSpec spec = good.Spec();
  const ValidationReport report = Validate(spec);
  ASSERT_TRUE(report.proof.has_value());
  EXPECT_TRUE(report.proof->Covers(spec));
  Result<Model> built = BuildModel(spec, *report.proof);
  ASSERT_OK(built);
  EXPECT_EQ(built->num_rows(), 1);

  SpecWriter bad(1.5, Objective::kMaximize);
  bad.States({"s"}, {});
  bad.Action("s", "x", {{"s", 1.0}});
  const ModelSpec invalid = bad.Spec();
  EXPECT_FALSE(Validate(invalid).proof.has_value());
  // An error that `skip` drops is neither listed nor proof of validity.
  ValidateOptions skip_all;
  skip_all.skip = [](const Finding&) { return true; };
  const ValidationReport skipped = Validate(invalid, skip_all);
  EXPECT_TRUE(skipped.ok());
  EXPECT_FALSE(skipped.proof.has_value());
}

TEST(ModelTest, AProofDoesNotCoverAnotherOrAResizedSpec) {
  SpecWriter good(0.9, Objective::kMaximize);
  good.States({"s"}, {});
  good.Action("s", "x", {{"s", 1.0}});
  const ModelSpec spec = good.Spec();
  const ValidationReport report = Validate(spec);
  ASSERT_TRUE(report.proof.has_value());

  // Another (invalid) spec shown the valid one's proof is validated, and refused.
  SpecWriter bad(0.9, Objective::kMaximize);
  bad.States({"s"}, {});
  bad.Action("s", "x", {{"s", 0.5}});
  const ModelSpec invalid = bad.Spec();
  EXPECT_FALSE(report.proof->Covers(invalid));
  Result<Model> refused = BuildModel(invalid, *report.proof);
  ASSERT_FALSE(refused.ok());
  EXPECT_EQ(refused.status().code(), StatusCode::kInvalidArgument);

  // The same object after an outcome was appended: no longer covered.
  ModelSpec grown = good.Spec();
  const ValidationReport grown_report = Validate(grown);
  ASSERT_TRUE(grown_report.proof.has_value());
  grown.AddOutcome(0, 0.5);
  EXPECT_FALSE(grown_report.proof->Covers(grown));
  EXPECT_FALSE(BuildModel(grown, *grown_report.proof).ok());
}

TEST(ModelTest, FindStateFindsEveryNameOfALargeModel) {
  SpecWriter w(0.9, Objective::kMaximize);
  std::vector<std::string> names;
  for (int i = 0; i < 5000; ++i) names.push_back("state-" + std::to_string(i * 7919 % 5000));
  w.States(names, {});
  for (const std::string& name : names) w.Action(name, "stay", {{name, 1.0}});
  const Model m = w.Build();
  for (StateId s = 0; s < m.num_states(); ++s) {
    ASSERT_EQ(m.FindState(names[s]), std::optional<StateId>(s)) << names[s];
  }
  EXPECT_FALSE(m.FindState("state-5000").has_value());
  EXPECT_FALSE(m.FindState("").has_value());
}

}  // namespace
}  // namespace mdp
