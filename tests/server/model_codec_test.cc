// Tests server/model_codec.{h,cc}: DecodeModel and DecodeModelSpec on valid model documents
// and on a table of broken ones, each rejected with a JSON Pointer and a plain message.
#include "server/model_codec.h"
#include "tests/testing/documents.h"

#include <gtest/gtest.h>

#include <cmath>
#include <optional>
#include <ostream>
#include <set>
#include <string>
#include <string_view>
#include <vector>

namespace mdp::server {
namespace {

using test_documents::kGreenhouse;
using test_documents::HasIssue;
using test_documents::Describe;

// An invented kiln: firing a cold kiln heats it; firing a hot one earns more but may crack
// it; resting cools it. The base of every broken document below.
constexpr std::string_view kKilnHead = R"({
  "format": "mdpserve/model@1",
  "name": "Kiln",
  "reward_unit": "coins",
  "objective": "maximize",
  "criterion": {"kind": "discounted", "discount": 0.8},
  "actions": ["fire", "rest"],
)";
constexpr std::string_view kKilnStates = R"(  "states": [
    {"name": "cold", "actions": [
      {"action": "fire", "reward": -2.0, "outcomes": [
        {"next": "hot", "probability": 0.75, "reward": 1.0},
        {"next": "cold", "probability": 0.25}]},
      {"action": "rest", "outcomes": [{"next": "cold", "probability": 1.0}]}]},
    {"name": "hot", "actions": [
      {"action": "fire", "outcomes": [
        {"next": "cracked", "probability": 0.5, "reward": 4.0},
        {"next": "hot", "probability": 0.5, "reward": 3.0}]},
      {"action": "rest", "outcomes": [{"next": "cold", "probability": 1.0, "reward": 0.5}]}]},
    {"name": "cracked", "terminal": true}
  ]
})";

std::string Kiln() { return std::string(kKilnHead) + std::string(kKilnStates); }

// Replaces the only occurrence of `from` in `text`; false (and no change) unless it occurs
// exactly once.
bool ReplaceOnce(std::string& text, std::string_view from, std::string_view to) {
  const size_t at = text.find(from);
  if (at == std::string::npos || text.find(from, at + 1) != std::string::npos) return false;
  text.replace(at, from.size(), to);
  return true;
}



std::set<std::string> Pointers(const std::vector<DocumentIssue>& issues) {
  std::set<std::string> out;
  for (const DocumentIssue& i : issues) out.insert(i.pointer);
  return out;
}

TEST(ModelCodecTest, TotalCriterionNeedsAGoalState) {
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"("discounted", "discount": 0.8)", R"("total")"));
  ASSERT_TRUE(DecodeModel(text).ok());  // "cracked" is terminal: a goal.
  ASSERT_TRUE(ReplaceOnce(text, R"({"name": "cracked", "terminal": true})",
                          R"({"name": "cracked", "actions": [
                              {"action": "rest", "outcomes": [{"next": "cold", "probability": 1}]}]})"));
  ModelDecodeResult result = DecodeModel(text);
  EXPECT_FALSE(result.ok());
  EXPECT_TRUE(HasIssue(result.errors, "/criterion", "no state is terminal")) << Describe(result.errors);
}

TEST(ModelCodecTest, CriteriaDecodeWithTheirParameters) {
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"("discounted", "discount": 0.8)",
                          R"("finite_horizon", "horizon": 12, "terminal_values": {"hot": 2.5})"));
  ModelDecodeResult fh = DecodeModel(text);
  ASSERT_TRUE(fh.ok()) << Describe(fh.errors);
  const Criterion& c = fh.model->criterion();
  EXPECT_EQ(c.kind, CriterionKind::kFiniteHorizon);
  EXPECT_EQ(c.horizon, 12);
  EXPECT_DOUBLE_EQ(c.discount, 1.0);  // The default for a finite horizon.
  ASSERT_EQ(c.terminal_values.size(), 3u);
  EXPECT_DOUBLE_EQ(c.terminal_values[0], 0.0);
  EXPECT_DOUBLE_EQ(c.terminal_values[1], 2.5);
  text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"("discounted", "discount": 0.8)", R"("average")"));
  ModelDecodeResult average = DecodeModel(text);
  ASSERT_TRUE(average.ok()) << Describe(average.errors);
  EXPECT_EQ(average.model->criterion().kind, CriterionKind::kAverage);
}

TEST(ModelCodecTest, KilnDecodesWithSizesNamesAndFlags) {
  ModelDecodeResult result = DecodeModel(Kiln());
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  EXPECT_TRUE(result.errors.empty());
  EXPECT_TRUE(result.warnings.empty()) << Describe(result.warnings);
  const Model& m = *result.model;
  EXPECT_EQ(m.name(), "Kiln");
  EXPECT_EQ(m.reward_unit(), "coins");
  EXPECT_EQ(m.objective(), Objective::kMaximize);
  EXPECT_EQ(m.criterion().kind, CriterionKind::kDiscounted);
  EXPECT_DOUBLE_EQ(m.discount(), 0.8);
  ASSERT_EQ(m.num_states(), 3);
  EXPECT_EQ(m.num_actions(), 2);
  EXPECT_EQ(m.num_rows(), 4);
  EXPECT_EQ(m.num_entries(), 6);
  EXPECT_EQ(m.num_outcomes_in_document(), 6);
  EXPECT_EQ(m.state_name(0), "cold");
  EXPECT_EQ(m.state_name(1), "hot");
  EXPECT_EQ(m.state_name(2), "cracked");
  EXPECT_FALSE(m.terminal(0));
  EXPECT_FALSE(m.terminal(1));
  EXPECT_TRUE(m.terminal(2));
  EXPECT_EQ(m.row_end(2) - m.row_begin(2), 0);
  EXPECT_EQ(m.row_action_name(m.row_begin(0)), "fire");
  EXPECT_EQ(m.row_action_name(m.row_begin(0) + 1), "rest");
  // Expected rewards: -2 + 0.75 * 1 + 0.25 * 0 and 0.5 * 4 + 0.5 * 3.
  EXPECT_DOUBLE_EQ(m.row_reward(*m.FindRow(0, "fire")), -1.25);
  EXPECT_DOUBLE_EQ(m.row_reward(*m.FindRow(1, "fire")), 3.5);
  EXPECT_DOUBLE_EQ(m.row_reward(*m.FindRow(1, "rest")), 0.5);
}

TEST(ModelCodecTest, MinimizeObjectiveIsRead) {
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"("maximize")", R"("minimize")"));
  ModelDecodeResult result = DecodeModel(text);
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  EXPECT_EQ(result.model->objective(), Objective::kMinimize);
}

TEST(ModelCodecTest, RepeatedNextStatesMergeIntoOneEntryWithTheExpectedReward) {
  constexpr std::string_view kOrchard = R"({
    "format": "mdpserve/model@1", "name": "Orchard", "objective": "maximize",
    "criterion": {"kind": "discounted", "discount": 0.5}, "actions": ["shake"],
    "states": [
      {"name": "tree", "actions": [{"action": "shake", "reward": 1.25, "outcomes": [
        {"next": "basket", "probability": 0.3, "reward": 10.0},
        {"next": "tree", "probability": 0.2},
        {"next": "basket", "probability": 0.5, "reward": -2.0}]}]},
      {"name": "basket", "terminal": true}]})";
  ModelDecodeResult result = DecodeModel(kOrchard);
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  const Model& m = *result.model;
  EXPECT_EQ(m.num_outcomes_in_document(), 3);
  ASSERT_EQ(m.num_rows(), 1);
  ASSERT_EQ(m.entry_end(0) - m.entry_begin(0), 2);
  // Entries are sorted by next state: tree (0) then basket (1) with 0.3 + 0.5.
  const int64_t e = m.entry_begin(0);
  EXPECT_EQ(m.entry_next(e), 0);
  EXPECT_NEAR(m.entry_probability(e), 0.2, 1e-15);
  EXPECT_EQ(m.entry_next(e + 1), 1);
  EXPECT_NEAR(m.entry_probability(e + 1), 0.8, 1e-15);
  // 1.25 + 0.3 * 10 + 0.2 * 0 + 0.5 * (-2) = 3.25.
  EXPECT_NEAR(m.row_reward(0), 3.25, 1e-12);
}

TEST(ModelCodecTest, ProbabilitiesWithinToleranceAreScaledToSumToOne) {
  std::string text = Kiln();
  // 0.7499995 + 0.25 is 5e-7 short of 1: inside the 1e-6 tolerance.
  ASSERT_TRUE(ReplaceOnce(text, R"("probability": 0.75)", R"("probability": 0.7499995)"));
  ModelDecodeResult result = DecodeModel(text);
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  const Model& m = *result.model;
  const RowId row = *m.FindRow(0, "fire");
  double sum = 0.0;
  for (int64_t e = m.entry_begin(row); e < m.entry_end(row); ++e) sum += m.entry_probability(e);
  EXPECT_NEAR(sum, 1.0, 1e-15);
}

TEST(ModelCodecTest, ProbabilitiesJustOutsideToleranceAreRejected) {
  std::string text = Kiln();
  // 0.750002 + 0.25 is 2e-6 above 1.
  ASSERT_TRUE(ReplaceOnce(text, R"("probability": 0.75)", R"("probability": 0.750002)"));
  ModelDecodeResult result = DecodeModel(text);
  EXPECT_FALSE(result.ok());
  EXPECT_TRUE(HasIssue(result.errors, "/states/0/actions/0/outcomes", "sum to 1.000002"))
      << Describe(result.errors);
}

TEST(ModelCodecTest, StatesBeforeActionsInKeyOrderStillResolve) {
  constexpr std::string_view kReversed = R"({
    "states": [
      {"name": "idle", "actions": [
        {"action": "start", "outcomes": [{"next": "busy", "probability": 1}]},
        {"action": "nap", "outcomes": [{"next": "idle", "probability": 1}]}]},
      {"name": "busy", "actions": [
        {"action": "nap", "reward": 2, "outcomes": [{"next": "idle", "probability": 1}]}]}],
    "actions": ["nap", "start"],
    "criterion": {"discount": 0.9, "kind": "discounted"},
    "objective": "maximize",
    "name": "Reversed",
    "format": "mdpserve/model@1"})";
  ModelDecodeResult result = DecodeModel(kReversed);
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  const Model& m = *result.model;
  ASSERT_EQ(m.num_rows(), 3);
  // Rows keep document order; their actions are catalogue indices (nap 0, start 1).
  EXPECT_EQ(m.row_action(0), 1);
  EXPECT_EQ(m.row_action(1), 0);
  EXPECT_EQ(m.row_action(2), 0);
  EXPECT_EQ(m.entry_next(m.entry_begin(0)), *m.FindState("busy"));
  EXPECT_DOUBLE_EQ(m.row_reward(*m.FindRow(1, "nap")), 2.0);
}

TEST(ModelCodecTest, TerminalStateMayGiveAnEmptyActionList) {
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"("terminal": true})", R"("terminal": true, "actions": []})"));
  ModelDecodeResult result = DecodeModel(text);
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  EXPECT_TRUE(result.model->terminal(2));
}

TEST(ModelCodecTest, NamesCountCharactersNotBytes) {
  // 256 two-byte characters: 512 bytes, within the 256-character limit.
  std::string long_name;
  for (int i = 0; i < 256; ++i) long_name += "\xC3\xA9";  // U+00E9.
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"({"name": "cracked")", R"({"name": ")" + long_name + "\""));
  ASSERT_TRUE(ReplaceOnce(text, R"({"next": "cracked")", R"({"next": ")" + long_name + "\""));
  ModelDecodeResult result = DecodeModel(text);
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  EXPECT_EQ(result.model->state_name(2), long_name);
}

// One broken document: how it was made and what DecodeModel must say about it.
struct BadDocument {
  std::string name;
  std::string text;
  std::string pointer;
  std::string message;  // A part of the expected message.
  DecodeLimits limits;
  bool tweak_applied = true;  // False if the tweak's target is not unique in the base.
};

void PrintTo(const BadDocument& row, std::ostream* os) { *os << row.name; }

BadDocument Tweak(std::string name, std::string_view from, std::string_view to, std::string pointer,
                  std::string message) {
  BadDocument row{std::move(name), Kiln(), std::move(pointer), std::move(message), {}};
  row.tweak_applied = ReplaceOnce(row.text, from, to);
  return row;
}

BadDocument Whole(std::string name, std::string text, std::string pointer, std::string message) {
  return BadDocument{std::move(name), std::move(text), std::move(pointer), std::move(message), {}};
}

BadDocument Capped(std::string name, DecodeLimits limits, std::string pointer,
                   std::string message) {
  return BadDocument{std::move(name), Kiln(), std::move(pointer), std::move(message), limits};
}

// Pointer to where the 64-level nesting cap stops a deep array under /reward_unit: the root
// object is level 1, so 63 arrays open and the 64th is refused.
std::string DeepPointer() {
  std::string out = "/reward_unit";
  for (int i = 0; i < 63; ++i) out += "/0";
  return out;
}

std::vector<BadDocument> SyntaxAndHeaderRows() {
  const std::string deep = std::string(65, '[') + std::string(65, ']');
  return {
      Tweak("missing_comma", R"("name": "Kiln",)", R"("name": "Kiln")", "/name", "line 4, column"),
      Whole("empty_text", "", "", "the document is empty"),
      Whole("root_is_array", "[" + Kiln() + "]", "", "must be a JSON object, not an array"),
      Tweak("duplicate_key", R"("objective": "maximize",)",
            R"("objective": "maximize", "objective": "minimize",)", "/objective",
            "duplicate key 'objective'"),
      Tweak("duplicate_key_in_state", R"({"name": "hot", )", R"({"name": "hot", "name": "warm", )",
            "/states/1/name", "duplicate key 'name'"),
      Tweak("nesting_deeper_than_64", R"("coins")", deep, DeepPointer(), "deeper than 64 levels"),
      Tweak("missing_format", R"("format": "mdpserve/model@1",)", "", "/format",
            "required field is missing"),
      Tweak("format_version_2", "model@1", "model@2", "/format",
            "unsupported model format version"),
      Tweak("format_of_another_kind", "mdpserve/model@1", "mdpserve/policy@1", "/format",
            "must be 'mdpserve/model@1'"),
      Tweak("missing_name", R"("name": "Kiln",)", "", "/name", "required field is missing"),
      Tweak("empty_model_name", R"("name": "Kiln")", R"("name": "")", "/name", "must not be empty"),
      Tweak("unknown_top_level_field", R"("objective": "maximize",)",
            R"("objective": "maximize", "colour": "teal",)", "/colour", "unknown field"),
      Tweak("objective_maximise", R"("maximize")", R"("maximise")", "/objective",
            R"("maximize" or "minimize")"),
      Tweak("average_takes_no_discount", R"("discounted")", R"("average")",
            "/criterion/discount", "unknown field"),
      Tweak("total_takes_no_discount", R"("discounted")", R"("total")", "/criterion/discount",
            "unknown field"),
      Tweak("horizon_missing", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "discount": 0.8)", "/criterion/horizon",
            "required field is missing"),
      Tweak("horizon_zero", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 0)", "/criterion/horizon", "from 1 to 1000000"),
      Tweak("horizon_fractional", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 2.5)", "/criterion/horizon", "whole number"),
      Tweak("horizon_as_string", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": "12")", "/criterion/horizon",
            "must be a number, not a string"),
      Tweak("horizon_too_long", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 1e9)", "/criterion/horizon", "from 1 to 1000000"),
      Tweak("finite_horizon_discount_above_one", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "discount": 1.5)", "/criterion/discount",
            "between 0 and 1"),
      Tweak("terminal_values_unknown_state", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "terminal_values": {"warm": 1})",
            "/criterion/terminal_values/warm", "state 'warm' is not defined"),
      Tweak("terminal_value_not_a_number", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "terminal_values": {"hot": true})",
            "/criterion/terminal_values/hot", "must be a number, not a boolean"),
      Tweak("terminal_value_at_an_absorbing_state", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "terminal_values": {"cracked": -5})",
            "/criterion/terminal_values/cracked", "value 0 at every stage"),
      Tweak("terminal_values_not_an_object", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "terminal_values": [1, 2])",
            "/criterion/terminal_values", "must be an object"),

      Tweak("criterion_kind_unknown", R"("discounted")", R"("sideways")", "/criterion/kind",
            "unknown criterion 'sideways'"),
      Tweak("discount_one", "0.8}", "1.0}", "/criterion/discount", "at least 0 and below 1"),
      Tweak("discount_negative", "0.8}", "-0.5}", "/criterion/discount", "at least 0 and below 1"),
      Tweak("discount_as_string", "0.8}", R"("0.8"})", "/criterion/discount",
            "must be a number, not a string"),
      Tweak("discount_missing", R"(, "discount": 0.8)", "", "/criterion/discount",
            "required field is missing"),
      Tweak("catalogue_not_an_array", R"(["fire", "rest"])", R"("fire")", "/actions",
            "must be an array, not a string"),
      Tweak("duplicate_catalogue_action", R"(["fire", "rest"])", R"(["fire", "rest", "fire"])",
            "/actions/2", "duplicate action name 'fire'"),
  };
}

std::vector<BadDocument> StateRows() {
  const std::string cold_rest = R"("rest", "outcomes": [{"next": "cold", "probability": 1.0}]})";
  return {
      Whole("states_empty", std::string(kKilnHead) + R"(  "states": []})", "/states",
            "the model has no states"),
      Whole("states_missing", std::string(kKilnHead) + R"(  "description": "no states"})",
            "/states", "required field is missing"),
      Tweak("state_not_an_object", R"({"name": "cracked", "terminal": true})", R"("cracked")",
            "/states/2", "a state must be an object, not a string"),
      Tweak("duplicate_state_name", R"({"name": "hot")", R"({"name": "cold")", "/states/1/name",
            "duplicate state name 'cold'"),
      Tweak("terminal_not_boolean", R"("terminal": true)", R"("terminal": "yes")",
            "/states/2/terminal", "must be true or false"),
      Tweak("nonterminal_without_actions", R"({"name": "cracked", "terminal": true})",
            R"({"name": "cracked"})", "/states/2/actions", "needs at least one action"),
      Tweak("terminal_with_actions", R"({"name": "hot", )", R"({"name": "hot", "terminal": true, )",
            "/states/1/actions", "a terminal state cannot have actions"),
      Tweak("name_with_control_character", R"({"name": "cracked")", R"({"name": "crac\u0007ked")",
            "/states/2/name", "must not contain control characters"),
      Tweak("name_with_c1_control_character", R"({"name": "cracked")",
            R"({"name": "crac\u0085ked")", "/states/2/name", "must not contain control characters"),
      Tweak("name_longer_than_256", R"({"name": "cracked")",
            R"({"name": ")" + std::string(257, 'k') + "\"", "/states/2/name",
            "longer than 256 characters"),
      Tweak("action_not_in_catalogue", cold_rest,
            R"("sleep", "outcomes": [{"next": "cold", "probability": 1.0}]})",
            "/states/0/actions/1/action", "'sleep' is not in the model's action list"),
      Tweak("action_twice_in_state", cold_rest,
            R"("fire", "outcomes": [{"next": "cold", "probability": 1.0}]})",
            "/states/0/actions/1/action", "'fire' is listed twice"),
      Tweak("reward_null", R"("reward": -2.0)", R"("reward": null)", "/states/0/actions/0/reward",
            "must be a number, not null"),
      Tweak("outcomes_empty", R"([{"next": "cold", "probability": 1.0, "reward": 0.5}])", "[]",
            "/states/1/actions/1/outcomes", "at least one outcome"),
  };
}

std::vector<BadDocument> OutcomeRows() {
  const std::string p = "/states/0/actions/0/outcomes/0/probability";
  const std::string second = R"({"next": "cold", "probability": 0.25})";
  return {
      Tweak("next_names_unknown_state", R"({"next": "hot", "probability": 0.75)",
            R"({"next": "warm", "probability": 0.75)", "/states/0/actions/0/outcomes/0/next",
            "next state 'warm' is not defined"),
      Tweak("probability_negative", "0.75", "-0.1", p, "probability is negative"),
      Tweak("probability_above_one", "0.75", "1.5", p, "probability exceeds 1"),
      // nlohmann refuses a literal that overflows a double: a read error where it stands.
      Tweak("probability_overflows", "0.75", "1e999", p, "number overflow parsing '1e999'"),
      Tweak("probability_as_string", "0.75", R"("0.75")", p, "must be a number, not a string"),
      Tweak("probabilities_sum_to_0_9", "0.75", "0.65", "/states/0/actions/0/outcomes",
            "sum to 0.9,"),
      Tweak("outcome_missing_probability", second, R"({"next": "cold"})",
            "/states/0/actions/0/outcomes/1/probability", "required field is missing"),
      Tweak("probability_misspelt", second, R"({"next": "cold", "probabilty": 0.25})",
            "/states/0/actions/0/outcomes/1/probabilty", "unknown field"),
  };
}

std::vector<BadDocument> SizeCapRows() {
  DecodeLimits states, catalogue, per_state, per_action, total, depth;
  states.max_states = 2;
  catalogue.max_catalogue = 1;
  per_state.max_actions_per_state = 1;
  per_action.max_outcomes_per_action = 1;
  total.max_outcomes = 3;  // State 0 holds 3; the next state action would make 5.
  depth.max_depth = 3;     // Root, states, a state: its actions list is the 4th level.
  return {
      Capped("too_many_states", states, "/states/2", "more than 2 states"),
      Capped("too_many_catalogue_actions", catalogue, "/actions", "more than 1 actions"),
      Capped("too_many_actions_in_a_state", per_state, "/states/0/actions", "more than 1 actions"),
      Capped("too_many_outcomes_in_a_state_action", per_action, "/states/0/actions/0/outcomes",
             "more than 1 outcomes"),
      Capped("too_many_outcomes_in_the_model", total, "/states/1/actions/0/outcomes",
             "the model has more than 3 outcomes"),
      Capped("nesting_deeper_than_a_small_cap", depth, "/states/0/actions", "deeper than 3 levels"),
  };
}

std::vector<BadDocument> AllBadDocuments() {
  std::vector<BadDocument> rows;
  for (auto part : {SyntaxAndHeaderRows(), StateRows(), OutcomeRows(), SizeCapRows()}) {
    rows.insert(rows.end(), part.begin(), part.end());
  }
  return rows;
}

class BadDocumentTest : public ::testing::TestWithParam<BadDocument> {};

TEST_P(BadDocumentTest, IsRejectedWithPointerAndMessage) {
  const BadDocument& row = GetParam();
  ASSERT_TRUE(row.tweak_applied) << "the tweak's target is not unique in the base document";
  ModelDecodeResult result = DecodeModel(row.text, row.limits);
  EXPECT_FALSE(result.ok());
  EXPECT_FALSE(result.model.has_value());
  EXPECT_TRUE(HasIssue(result.errors, row.pointer, row.message))
      << "expected '" << row.pointer << "': ..." << row.message << "...; got"
      << Describe(result.errors);
}

INSTANTIATE_TEST_SUITE_P(ModelCodecTest, BadDocumentTest, ::testing::ValuesIn(AllBadDocuments()),
                         [](const ::testing::TestParamInfo<BadDocument>& info) {
                           return info.param.name;
                         });

TEST(ModelCodecTest, TheBaseOfTheTableIsValid) {
  ModelDecodeResult result = DecodeModel(Kiln());
  EXPECT_TRUE(result.ok()) << Describe(result.errors);
  EXPECT_GE(AllBadDocuments().size(), 25u);
}

TEST(ModelCodecTest, ReportsEveryIndependentProblem) {
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"("maximize")", R"("maximise")"));
  ASSERT_TRUE(ReplaceOnce(text, R"({"name": "hot", )", R"({"name": "hot", "colour": "red", )"));
  ASSERT_TRUE(ReplaceOnce(text, R"({"next": "cold", "probability": 0.25})",
                          R"({"next": "warm", "probability": 0.25})"));
  ModelDecodeResult result = DecodeModel(text);
  EXPECT_FALSE(result.ok());
  EXPECT_EQ(Pointers(result.errors), (std::set<std::string>{"/objective", "/states/1/colour",
                                                            "/states/0/actions/0/outcomes/1/next"}))
      << Describe(result.errors);
  EXPECT_EQ(result.errors.size(), 3u) << Describe(result.errors);
  EXPECT_EQ(result.errors_not_listed, 0);
}

// 75 states in a ring, each with one state action whose two outcomes have probabilities
// -0.5 and 1.5: every row sums to 1, and 150 probabilities are out of range.
std::string RingOfBadProbabilities() {
  constexpr int kStates = 75;
  std::string states;
  for (int i = 0; i < kStates; ++i) {
    const std::string self = "\"s" + std::to_string(i) + "\"";
    const std::string next = "\"s" + std::to_string((i + 1) % kStates) + "\"";
    states += std::string(i == 0 ? "" : ",\n") + R"({"name": )" + self +
              R"(, "actions": [{"action": "go", "outcomes": [{"next": )" + self +
              R"(, "probability": -0.5}, {"next": )" + next + R"(, "probability": 1.5}]}]})";
  }
  return R"({"format": "mdpserve/model@1", "name": "Ring", "objective": "minimize",
    "criterion": {"kind": "discounted", "discount": 0.9}, "actions": ["go"],
    "states": [)" +
         states + "]}";
}

TEST(ModelCodecTest, ListsAtMostOneHundredErrorsAndCountsTheRest) {
  ModelDecodeResult result = DecodeModel(RingOfBadProbabilities());
  EXPECT_FALSE(result.ok());
  ASSERT_EQ(result.errors.size(), 100u);
  EXPECT_EQ(result.errors_not_listed, 50);
  EXPECT_EQ(result.errors.front().pointer, "/states/0/actions/0/outcomes/0/probability");
  EXPECT_EQ(result.errors.back().pointer, "/states/49/actions/0/outcomes/1/probability");
}

TEST(ModelCodecTest, ErrorCapComesFromTheLimits) {
  DecodeLimits limits;
  limits.max_errors = 7;
  ModelDecodeResult result = DecodeModel(RingOfBadProbabilities(), limits);
  EXPECT_FALSE(result.ok());
  EXPECT_EQ(result.errors.size(), 7u);
  EXPECT_EQ(result.errors_not_listed, 143);
}

// Problems the decoder reports (a probability given as a string) must not be counted again
// by the validator, listed or not.
TEST(ModelCodecTest, DecoderErrorsAreNotCountedTwice) {
  std::string text = RingOfBadProbabilities();
  std::string strings;
  for (size_t at = 0; (at = text.find("-0.5", at)) != std::string::npos;) {
    text.replace(at, 4, "\"0.25\"");
  }
  for (size_t at = 0; (at = text.find("1.5", at)) != std::string::npos;) {
    text.replace(at, 3, "\"0.75\"");
  }
  ModelDecodeResult result = DecodeModel(text);
  EXPECT_FALSE(result.ok());
  EXPECT_EQ(result.errors.size(), 100u);
  EXPECT_EQ(result.errors_not_listed, 50);  // 150 string probabilities in all.
  for (const auto& e : result.errors) {
    EXPECT_NE(e.message.find("must be a number"), std::string::npos) << e.pointer;
  }
}

TEST(ModelCodecTest, MixedDecoderAndValidatorErrorsAreCountedOnce) {
  // First 30 states: string probabilities (decoder); the other 45: out of range (validator).
  std::string text = RingOfBadProbabilities();
  size_t at = 0;
  for (int replaced = 0; replaced < 30; ++replaced) {
    at = text.find("-0.5", at);
    text.replace(at, 4, "\"0.25\"");
    at = text.find("1.5", at);
    text.replace(at, 3, "\"0.75\"");
  }
  ModelDecodeResult result = DecodeModel(text);
  EXPECT_EQ(result.errors.size() + result.errors_not_listed, 150u);
}

TEST(ModelCodecTest, WarningsLeaveTheModelUsable) {
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"(["fire", "rest"])", R"(["fire", "rest", "polish"])"));
  ASSERT_TRUE(ReplaceOnce(text, R"({"next": "cold", "probability": 0.25})",
                          R"({"next": "cold", "probability": 0.25},
                             {"next": "cracked", "probability": 0})"));
  ASSERT_TRUE(ReplaceOnce(text, R"({"name": "cracked", "terminal": true})",
                          R"({"name": "cracked", "terminal": true},
                             {"name": "attic", "actions": [{"action": "rest",
                               "outcomes": [{"next": "cold", "probability": 1}]}]})"));
  ModelDecodeResult result = DecodeModel(text);
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  EXPECT_EQ(result.model->num_states(), 4);
  EXPECT_TRUE(HasIssue(result.warnings, "/states/3", "no other state leads to this state"))
      << Describe(result.warnings);
  EXPECT_TRUE(HasIssue(result.warnings, "/actions/2", "'polish' is not available in any state"))
      << Describe(result.warnings);
  EXPECT_TRUE(
      HasIssue(result.warnings, "/states/0/actions/0/outcomes/2/probability", "probability 0"))
      << Describe(result.warnings);
  EXPECT_EQ(result.warnings.size(), 3u) << Describe(result.warnings);
}

TEST(ModelCodecTest, PointersEscapeTildeAndSlashInKeys) {
  std::string text = Kiln();
  ASSERT_TRUE(
      ReplaceOnce(text, R"("objective": "maximize",)", R"("objective": "maximize", "a/b~c": 1,)"));
  ASSERT_TRUE(ReplaceOnce(text, R"({"name": "hot", )", R"({"name": "hot", "~/": 2, )"));
  ModelDecodeResult result = DecodeModel(text);
  EXPECT_FALSE(result.ok());
  EXPECT_TRUE(HasIssue(result.errors, "/a~1b~0c", "unknown field")) << Describe(result.errors);
  EXPECT_TRUE(HasIssue(result.errors, "/states/1/~0~1", "unknown field"))
      << Describe(result.errors);
}

TEST(ModelCodecTest, DecodeModelSpecKeepsTheDocumentAsWritten) {
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"({"next": "cold", "probability": 0.25})",
                          R"({"next": "hot", "probability": 0.25, "reward": 7})"));
  SpecDecodeResult decoded = DecodeModelSpec(text);
  ASSERT_TRUE(decoded.errors.empty()) << Describe(decoded.errors);
  const ModelSpec& spec = decoded.spec;
  EXPECT_EQ(spec.name, "Kiln");
  EXPECT_EQ(spec.num_states(), 3);
  EXPECT_EQ(spec.num_slots(), 4);
  // The two outcomes to "hot" stay apart; nothing is merged or scaled.
  ASSERT_EQ(spec.num_outcomes(), 6);
  EXPECT_EQ(spec.outcome_next[0], 1);
  EXPECT_EQ(spec.outcome_next[1], 1);
  EXPECT_EQ(spec.outcome_probability[0], 0.75);
  EXPECT_EQ(spec.outcome_reward[1], 7.0);
  EXPECT_EQ(spec.slot_action[0], 0);
  EXPECT_EQ(spec.slot_action[1], 1);
  EXPECT_EQ(spec.slot_reward[0], -2.0);
  EXPECT_EQ(spec.terminal, (std::vector<uint8_t>{0, 0, 1}));
}

TEST(ModelCodecTest, DecodeModelSpecLeavesModelRulesToDecodeModel) {
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, "0.75", "0.65"));
  SpecDecodeResult spec_only = DecodeModelSpec(text);
  EXPECT_TRUE(spec_only.errors.empty()) << Describe(spec_only.errors);
  EXPECT_EQ(spec_only.spec.outcome_probability[0], 0.65);
  ModelDecodeResult full = DecodeModel(text);
  EXPECT_TRUE(HasIssue(full.errors, "/states/0/actions/0/outcomes", "sum to 0.9,"))
      << Describe(full.errors);
}

TEST(ModelCodecTest, DecodeModelSpecReportsTheDecodersOwnFindings) {
  std::string text = Kiln();
  ASSERT_TRUE(ReplaceOnce(text, R"("reward": -2.0)", R"("reward": "lots")"));
  SpecDecodeResult decoded = DecodeModelSpec(text);
  EXPECT_TRUE(HasIssue(decoded.errors, "/states/0/actions/0/reward", "must be a number"))
      << Describe(decoded.errors);
}

}  // namespace
}  // namespace mdp::server
