// Tests solver/validate.{h,cc}: every rule reports its location, all problems are collected,
// the cap holds, and warnings do not block.
#include "solver/validate.h"

#include <gtest/gtest.h>

#include <cmath>
#include <functional>
#include <limits>

#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using Field = Location::Field;
using testing::SpecWriter;

ModelSpec Base() {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"a", "b", "end"}, {false, false, true});
  w.Action("a", "go", {{"b", 0.5, 1.0}, {"end", 0.5, 0.0}});
  w.Action("a", "wait", {{"a", 1.0, 0.0}});
  w.Action("b", "go", {{"a", 1.0, 2.0}});
  return w.Spec();
}

bool Has(const std::vector<Finding>& findings, Field field, int64_t state, int64_t slot,
         int64_t outcome, const std::string& words) {
  for (const Finding& f : findings) {
    if (f.where.field == field && f.where.state == state && f.where.slot == slot &&
        f.where.outcome == outcome && f.message.find(words) != std::string::npos) {
      return true;
    }
  }
  return false;
}

TEST(ValidateTest, BaseModelIsValid) {
  const ValidationReport r = Validate(Base());
  EXPECT_TRUE(r.ok());
  EXPECT_TRUE(r.errors.empty());
}

struct BadCase {
  std::string name;
  std::function<void(ModelSpec&)> tweak;
  Field field;
  int64_t state, slot, outcome;
  std::string words;
};

class ValidateBadTest : public ::testing::TestWithParam<BadCase> {};

TEST_P(ValidateBadTest, ReportsTheProblemWhereItIs) {
  ModelSpec spec = Base();
  GetParam().tweak(spec);
  const ValidationReport r = Validate(spec);
  EXPECT_FALSE(r.ok());
  EXPECT_TRUE(Has(r.errors, GetParam().field, GetParam().state, GetParam().slot,
                  GetParam().outcome, GetParam().words))
      << (r.errors.empty() ? "no errors" : r.errors.front().message);
}

const double kNaN = std::numeric_limits<double>::quiet_NaN();
const double kInf = std::numeric_limits<double>::infinity();

INSTANTIATE_TEST_SUITE_P(
    Rules, ValidateBadTest,
    ::testing::Values(
        BadCase{"DiscountOne", [](ModelSpec& s) { s.criterion.discount = 1.0; }, Field::kDiscount,
                -1, -1, -1, "below 1"},
        BadCase{"DiscountNegative", [](ModelSpec& s) { s.criterion.discount = -0.1; },
                Field::kDiscount, -1, -1, -1, "at least 0"},
        BadCase{"DiscountNaN", [](ModelSpec& s) { s.criterion.discount = kNaN; },
                Field::kDiscount, -1, -1, -1, "discount"},
        BadCase{"NegativeProbability",
                [](ModelSpec& s) { s.outcome_probability[0] = -0.5; s.outcome_probability[1] = 1.5; },
                Field::kOutcomeProbability, 0, 0, 0, "negative"},
        BadCase{"ProbabilityAboveOne", [](ModelSpec& s) { s.outcome_probability[2] = 1.5; },
                Field::kOutcomeProbability, 0, 1, 0, "exceeds 1"},
        BadCase{"ProbabilityNaN", [](ModelSpec& s) { s.outcome_probability[1] = kNaN; },
                Field::kOutcomeProbability, 0, 0, 1, "finite"},
        BadCase{"ProbabilityInfinite", [](ModelSpec& s) { s.outcome_probability[1] = kInf; },
                Field::kOutcomeProbability, 0, 0, 1, "finite"},
        BadCase{"SumNotOne", [](ModelSpec& s) { s.outcome_probability[0] = 0.4; },
                Field::kSlotOutcomes, 0, 0, -1, "sum to 0.9"},
        BadCase{"RewardInfinite", [](ModelSpec& s) { s.outcome_reward[3] = kInf; },
                Field::kOutcomeReward, 1, 0, 0, "finite"},
        BadCase{"SlotRewardNaN", [](ModelSpec& s) { s.slot_reward[2] = kNaN; },
                Field::kSlotReward, 1, 0, -1, "finite"},
        BadCase{"UnknownNext", [](ModelSpec& s) { s.outcome_next[3] = 17; },
                Field::kOutcomeNext, 1, 0, 0, "does not exist"},
        BadCase{"UnknownAction", [](ModelSpec& s) { s.slot_action[2] = 9; },
                Field::kSlotAction, 1, 0, -1, "not in the model's action list"},
        BadCase{"ActionTwiceInState", [](ModelSpec& s) { s.slot_action[1] = s.slot_action[0]; },
                Field::kSlotAction, 0, 1, -1, "listed twice"},
        BadCase{"DuplicateStateName", [](ModelSpec& s) { s.state_names[1] = "a"; },
                Field::kStateName, 1, -1, -1, "duplicate state name 'a'"},
        BadCase{"EmptyStateName", [](ModelSpec& s) { s.state_names[1] = ""; },
                Field::kStateName, 1, -1, -1, "empty"},
        BadCase{"TerminalWithActions", [](ModelSpec& s) { s.terminal[0] = 1; },
                Field::kStateActions, 0, -1, -1, "terminal state cannot have actions"},
        BadCase{"NonTerminalWithoutActions", [](ModelSpec& s) { s.terminal[2] = 0; },
                Field::kStateActions, 2, -1, -1, "needs at least one action"},
        BadCase{"EmptyModel", [](ModelSpec& s) { s = ModelSpec(); s.action_names = {"x"}; },
                Field::kStates, -1, -1, -1, "no states"}),
    [](const ::testing::TestParamInfo<BadCase>& info) { return info.param.name; });

TEST(ValidateTest, DuplicateCatalogueActionIsAnError) {
  ModelSpec spec = Base();
  spec.action_names.push_back("go");
  const ValidationReport r = Validate(spec);
  ASSERT_FALSE(r.ok());
  EXPECT_EQ(r.errors.front().where.field, Field::kCatalogueEntry);
  EXPECT_EQ(r.errors.front().where.action, 2);
}

TEST(ValidateTest, CollectsEveryErrorNotJustTheFirst) {
  ModelSpec spec = Base();
  spec.criterion.discount = 2.0;
  spec.outcome_probability[2] = 0.5;
  spec.state_names[1] = "a";
  const ValidationReport r = Validate(spec);
  EXPECT_EQ(r.errors.size(), 3u);
}

TEST(ValidateTest, CapsTheListAndCountsTheRest) {
  ModelSpec spec = Base();
  for (int i = 0; i < 30; ++i) {
    spec.AddState("x" + std::to_string(i), false);  // 30 states without actions.
  }
  ValidateOptions options;
  options.max_errors = 10;
  const ValidationReport r = Validate(spec, options);
  EXPECT_EQ(r.errors.size(), 10u);
  EXPECT_EQ(r.errors_not_listed, 20);
  EXPECT_FALSE(r.ok());
}

TEST(ValidateTest, WarningsDoNotBlock) {
  ModelSpec spec = Base();
  spec.action_names.push_back("unused");
  spec.AddState("island", false);
  spec.AddStateAction(0, 0.0);
  spec.AddOutcome(0, 1.0, 0.0);
  spec.AddOutcome(1, 0.0, 0.0);
  const ValidationReport r = Validate(spec);
  EXPECT_TRUE(r.ok());
  EXPECT_TRUE(Has(r.warnings, Field::kState, 3, -1, -1, "no other state leads"));
  EXPECT_TRUE(Has(r.warnings, Field::kOutcomeProbability, 3, 0, 1, "probability 0"));
  bool unused = false;
  for (const Finding& f : r.warnings) unused |= f.where.field == Field::kCatalogueEntry;
  EXPECT_TRUE(unused);
}

}  // namespace
}  // namespace mdp
