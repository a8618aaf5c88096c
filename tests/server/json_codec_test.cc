// Tests server/json_codec.{h,cc}: decoding candidate values and policies against a model,
// and encoding solutions, verification and evaluation reports and issue lists.
#include "server/json_codec.h"

#include <gtest/gtest.h>

#include <cmath>
#include <string>
#include <string_view>
#include <vector>

#include "server/model_codec.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/documents.h"

namespace mdp::server {
namespace {

using test_documents::kGreenhouse;
using test_documents::HasIssue;
using test_documents::Describe;



// Two equally good ways to the same end: a tie in state "fork".
constexpr std::string_view kFork = R"({
  "format": "mdpserve/model@1", "name": "Fork", "objective": "maximize",
  "criterion": {"kind": "discounted", "discount": 0.9}, "actions": ["left", "right"],
  "states": [
    {"name": "fork", "actions": [
      {"action": "left", "reward": 1, "outcomes": [{"next": "end", "probability": 1}]},
      {"action": "right", "reward": 1, "outcomes": [{"next": "end", "probability": 1}]}]},
    {"name": "end", "terminal": true}]})";



class JsonCodecTest : public ::testing::Test {
 protected:
  static constexpr StateId kDry = 0, kWet = 1, kSeedling = 2, kDone = 3;

  void SetUp() override {
    ModelDecodeResult decoded = DecodeModel(kGreenhouse);
    ASSERT_TRUE(decoded.ok()) << Describe(decoded.errors);
    model_ = std::move(*decoded.model);
  }

  // Solves the greenhouse with default options.
  Solution SolveGreenhouse() {
    Result<Solution> solution = Solve(model_, SolveOptions{});
    EXPECT_OK(solution);
    return solution.ok() ? *std::move(solution) : Solution{};
  }

  Model model_;
};

TEST_F(JsonCodecTest, DecodeValuesReadsAValuesDocument) {
  Decoded<std::vector<double>> values = DecodeValues(model_, R"({
      "format": "mdpserve/values@1",
      "values": {"wet": 10, "dry": 4.5, "seedling": -1, "done": 0}})");
  ASSERT_TRUE(values.ok()) << Describe(values.errors);
  EXPECT_EQ(values.value, (std::vector<double>{4.5, 10.0, -1.0, 0.0}));
}

TEST_F(JsonCodecTest, DecodeValuesLetsTerminalStatesBeOmitted) {
  Decoded<std::vector<double>> values =
      DecodeValues(model_, R"({"values": {"wet": 1, "dry": 2, "seedling": 3}})");
  ASSERT_TRUE(values.ok()) << Describe(values.errors);
  EXPECT_EQ(values.value[kDone], 0.0);
}

TEST_F(JsonCodecTest, DecodeValuesAcceptsASolutionDocument) {
  const Solution solution = SolveGreenhouse();
  const std::string text = EncodeSolution(model_, solution, SolutionDetail::kFull).dump();
  Decoded<std::vector<double>> values = DecodeValues(model_, text);
  ASSERT_TRUE(values.ok()) << Describe(values.errors);
  EXPECT_EQ(values.value, solution.values);
}

TEST_F(JsonCodecTest, DecodeValuesReportsUnknownAndMissingStates) {
  Decoded<std::vector<double>> values =
      DecodeValues(model_, R"({"values": {"dry": 4, "attic": 1}})");
  EXPECT_FALSE(values.ok());
  EXPECT_TRUE(HasIssue(values.errors, "/values/attic", "no state 'attic'"))
      << Describe(values.errors);
  EXPECT_TRUE(HasIssue(values.errors, "/values", "no entry for state 'wet'"))
      << Describe(values.errors);
  EXPECT_TRUE(HasIssue(values.errors, "/values", "no entry for state 'seedling'"))
      << Describe(values.errors);
  EXPECT_EQ(values.errors.size(), 3u) << Describe(values.errors);
}

TEST_F(JsonCodecTest, DecodeValuesRejectsBadEntries) {
  Decoded<std::vector<double>> values =
      DecodeValues(model_, R"({"values": {"dry": "four", "wet": null, "seedling": 4, "done": 2}})");
  EXPECT_FALSE(values.ok());
  EXPECT_TRUE(HasIssue(values.errors, "/values/dry", "finite number")) << Describe(values.errors);
  EXPECT_TRUE(HasIssue(values.errors, "/values/wet", "finite number")) << Describe(values.errors);
  EXPECT_TRUE(HasIssue(values.errors, "/values/done", "terminal state's value is 0"))
      << Describe(values.errors);
}

TEST_F(JsonCodecTest, DecodeValuesRejectsOtherDocuments) {
  Decoded<std::vector<double>> wrong_format = DecodeValues(
      model_, R"({"format": "mdpserve/policy@1", "values": {"dry": 1, "wet": 1, "seedling": 1}})");
  EXPECT_TRUE(HasIssue(wrong_format.errors, "/format", "must be 'mdpserve/values@1'"))
      << Describe(wrong_format.errors);
  Decoded<std::vector<double>> no_member = DecodeValues(model_, R"({"policy": {}})");
  EXPECT_TRUE(HasIssue(no_member.errors, "/values", "required field is missing"))
      << Describe(no_member.errors);
  Decoded<std::vector<double>> not_object = DecodeValues(model_, "[1, 2]");
  EXPECT_TRUE(HasIssue(not_object.errors, "", "must be a JSON object"))
      << Describe(not_object.errors);
  Decoded<std::vector<double>> malformed = DecodeValues(model_, "{\"values\": {\"dry\" 4}}");
  // The pointer says where the reader stood: after the key "dry".
  EXPECT_TRUE(HasIssue(malformed.errors, "/values/dry", "line 1, column 19"))
      << Describe(malformed.errors);
}

TEST_F(JsonCodecTest, DecodePolicyReadsDeterministicEntries) {
  Decoded<Policy> policy = DecodePolicy(model_, R"({
      "format": "mdpserve/policy@1",
      "policy": {"dry": "wait", "wet": "harvest", "seedling": "grow"}})");
  ASSERT_TRUE(policy.ok()) << Describe(policy.errors);
  // The terminal state "done" is omitted and takes no row.
  EXPECT_EQ(policy.value.row_probability, (std::vector<double>{0, 1, 1, 0, 1}));
}

TEST_F(JsonCodecTest, DecodePolicyReadsStochasticEntries) {
  Decoded<Policy> policy = DecodePolicy(model_, R"({"policy": {
      "dry": {"water": 0.25, "wait": 0.75}, "wet": {"harvest": 1}, "seedling": "grow"}})");
  ASSERT_TRUE(policy.ok()) << Describe(policy.errors);
  EXPECT_EQ(policy.value.row_probability, (std::vector<double>{0.25, 0.75, 1, 0, 1}));
}

TEST_F(JsonCodecTest, DecodePolicyAcceptsASolutionDocument) {
  const Solution solution = SolveGreenhouse();
  const std::string text = EncodeSolution(model_, solution, SolutionDetail::kSummary).dump();
  Decoded<Policy> policy = DecodePolicy(model_, text);
  ASSERT_TRUE(policy.ok()) << Describe(policy.errors);
  EXPECT_EQ(policy.value.row_probability, GreedyPolicy(model_, solution).row_probability);
  EXPECT_EQ(policy.value.row_probability, (std::vector<double>{1, 0, 1, 0, 1}));
}

TEST_F(JsonCodecTest, DecodePolicyReportsUnknownStatesAndActions) {
  Decoded<Policy> policy = DecodePolicy(model_, R"({"policy": {
      "dry": "harvest", "wet": {"dance": 1}, "seedling": "grow", "attic": "wait",
      "x/y~": "wait"}})");
  EXPECT_FALSE(policy.ok());
  EXPECT_TRUE(HasIssue(policy.errors, "/policy/dry", "'harvest' is not available"))
      << Describe(policy.errors);
  EXPECT_TRUE(HasIssue(policy.errors, "/policy/wet/dance", "'dance' is not available"))
      << Describe(policy.errors);
  EXPECT_TRUE(HasIssue(policy.errors, "/policy/attic", "no state 'attic'"))
      << Describe(policy.errors);
  EXPECT_TRUE(HasIssue(policy.errors, "/policy/x~1y~0", "no state 'x/y~'"))
      << Describe(policy.errors);
}

TEST_F(JsonCodecTest, DecodePolicyReportsMissingStates) {
  Decoded<Policy> policy = DecodePolicy(model_, R"({"policy": {"dry": "water"}})");
  EXPECT_FALSE(policy.ok());
  EXPECT_TRUE(HasIssue(policy.errors, "/policy", "no entry for state 'wet'"))
      << Describe(policy.errors);
  EXPECT_TRUE(HasIssue(policy.errors, "/policy", "no entry for state 'seedling'"))
      << Describe(policy.errors);
  EXPECT_EQ(policy.errors.size(), 2u) << Describe(policy.errors);
}

TEST_F(JsonCodecTest, DecodePolicyRejectsAnEntryForATerminalState) {
  Decoded<Policy> policy = DecodePolicy(model_, R"({"policy": {
      "dry": "water", "wet": "harvest", "seedling": "grow", "done": "wait"}})");
  EXPECT_TRUE(HasIssue(policy.errors, "/policy/done", "terminal")) << Describe(policy.errors);
}

TEST_F(JsonCodecTest, DecodePolicyChecksStochasticProbabilities) {
  Decoded<Policy> short_sum = DecodePolicy(model_, R"({"policy": {
      "dry": {"water": 0.5, "wait": 0.4}, "wet": "harvest", "seedling": "grow"}})");
  EXPECT_TRUE(HasIssue(short_sum.errors, "/policy", "state 'dry': action probabilities sum to 0.9"))
      << Describe(short_sum.errors);
  Decoded<Policy> out_of_range = DecodePolicy(model_, R"({"policy": {
      "dry": {"water": 1.5, "wait": -0.5}, "wet": "harvest", "seedling": "grow"}})");
  EXPECT_TRUE(HasIssue(out_of_range.errors, "/policy/dry/water", "between 0 and 1"))
      << Describe(out_of_range.errors);
  EXPECT_TRUE(HasIssue(out_of_range.errors, "/policy/dry/wait", "between 0 and 1"))
      << Describe(out_of_range.errors);
  // 5e-7 short of 1 is within the 1e-6 tolerance.
  Decoded<Policy> close = DecodePolicy(model_, R"({"policy": {
      "dry": {"water": 0.5, "wait": 0.4999995}, "wet": "harvest", "seedling": "grow"}})");
  EXPECT_TRUE(close.ok()) << Describe(close.errors);
}

TEST_F(JsonCodecTest, EncodeSolutionMatchesTheSolution) {
  const Solution sol = SolveGreenhouse();
  ASSERT_EQ(sol.values.size(), 4u);
  const Json doc = EncodeSolution(model_, sol, SolutionDetail::kFull);
  EXPECT_EQ(doc["format"], "mdpserve/solution@1");
  EXPECT_EQ(doc["model"]["name"], "Greenhouse");
  EXPECT_EQ(doc["model"]["states"], 4);
  EXPECT_EQ(doc["model"]["actions"], 4);
  EXPECT_EQ(doc["model"]["state_actions"], 5);
  EXPECT_EQ(doc["model"]["outcomes"], 7);
  EXPECT_EQ(doc["model"]["reward_unit"], "baskets");
  EXPECT_EQ(doc["objective"], "maximize");
  EXPECT_EQ(doc["criterion"]["kind"], "discounted");
  EXPECT_EQ(doc["criterion"]["discount"], 0.5);
  EXPECT_EQ(doc["method"], "policy_iteration");
  EXPECT_EQ(doc["outcome"], "converged");
  EXPECT_EQ(doc["options"]["tolerance"], sol.options.tolerance);
  EXPECT_EQ(doc["options"]["linear_solver"], "auto");
  EXPECT_EQ(doc["iterations"], sol.iterations);
  EXPECT_EQ(doc["sweeps"], sol.sweeps);
  EXPECT_EQ(doc["residual"], sol.residual);
  EXPECT_EQ(doc["value_error_bound"], sol.value_error_bound);
  EXPECT_EQ(doc["q_error_bound"], sol.q_error_bound);
  EXPECT_EQ(doc["policy_loss_bound"], sol.policy_loss_bound);
  EXPECT_EQ(doc["tie_tolerance"], sol.tie_tolerance);
  EXPECT_EQ(doc["tied_states"], 0);
  EXPECT_NEAR(doc["values"]["dry"].get<double>(), 4.0, 1e-9);
  EXPECT_NEAR(doc["values"]["wet"].get<double>(), 10.0, 1e-9);
  EXPECT_NEAR(doc["values"]["seedling"].get<double>(), 4.0, 1e-9);
  EXPECT_EQ(doc["values"]["done"], 0.0);
  EXPECT_EQ(doc["policy"], Json({{"dry", "water"}, {"wet", "harvest"}, {"seedling", "grow"}}));
  ASSERT_EQ(doc["smallest_gaps"].size(), 2u);
  EXPECT_EQ(doc["smallest_gaps"][0]["state"], "dry");
  EXPECT_NEAR(doc["smallest_gaps"][0]["gap"].get<double>(), 2.0, 1e-9);
  EXPECT_EQ(doc["smallest_gaps"][1]["state"], "wet");
  EXPECT_NEAR(doc["smallest_gaps"][1]["gap"].get<double>(), 6.5, 1e-9);
}

TEST_F(JsonCodecTest, EncodeSolutionStateTableMatchesTheSolution) {
  const Solution sol = SolveGreenhouse();
  ASSERT_EQ(sol.q.size(), 5u);
  const Json doc = EncodeSolution(model_, sol, SolutionDetail::kFull);
  const Json& states = doc["states"];
  ASSERT_EQ(states.size(), 4u);
  for (StateId s = 0; s < model_.num_states(); ++s) {
    SCOPED_TRACE(model_.state_name(s));
    EXPECT_EQ(states[s]["state"], model_.state_name(s));
    EXPECT_EQ(states[s]["terminal"], model_.terminal(s));
    EXPECT_EQ(states[s]["value"], sol.values[s]);
    EXPECT_EQ(states[s]["q"].size(), static_cast<size_t>(model_.row_end(s) - model_.row_begin(s)));
    for (RowId r = model_.row_begin(s); r < model_.row_end(s); ++r) {
      EXPECT_EQ(states[s]["q"][model_.row_action_name(r)], sol.q[r]);
    }
  }
  EXPECT_NEAR(states[kDry]["q"]["wait"].get<double>(), 2.0, 1e-9);
  EXPECT_NEAR(states[kWet]["q"]["wait"].get<double>(), 3.5, 1e-9);
  EXPECT_EQ(states[kDry]["action"], "water");
  EXPECT_EQ(states[kDry]["optimal_actions"], Json::array({"water"}));
  EXPECT_NEAR(states[kDry]["action_gap"].get<double>(), 2.0, 1e-9);
  EXPECT_NEAR(states[kWet]["action_gap"].get<double>(), 6.5, 1e-9);
  EXPECT_TRUE(states[kDone]["action"].is_null());
  EXPECT_EQ(states[kDone]["q"], Json::object());
}

TEST_F(JsonCodecTest, NanActionGapIsEncodedAsNull) {
  const Solution sol = SolveGreenhouse();
  ASSERT_EQ(sol.action_gap.size(), 4u);
  ASSERT_TRUE(std::isnan(sol.action_gap[kSeedling]));  // One action only.
  ASSERT_TRUE(std::isnan(sol.action_gap[kDone]));      // Terminal.
  const Json doc = EncodeSolution(model_, sol, SolutionDetail::kFull);
  EXPECT_TRUE(doc["states"][kSeedling]["action_gap"].is_null());
  EXPECT_TRUE(doc["states"][kDone]["action_gap"].is_null());
  EXPECT_EQ(Json::parse(doc.dump())["states"][kSeedling]["action_gap"], nullptr);
}

TEST_F(JsonCodecTest, EncodeSolutionSummaryHasNoStateTable) {
  const Solution sol = SolveGreenhouse();
  const Json doc = EncodeSolution(model_, sol, SolutionDetail::kSummary);
  EXPECT_FALSE(doc.contains("states"));
  EXPECT_TRUE(doc.contains("values"));
  EXPECT_TRUE(doc.contains("policy"));
}

TEST(JsonCodecTieTest, TiedActionsAreListedTogether) {
  ModelDecodeResult decoded = DecodeModel(kFork);
  ASSERT_TRUE(decoded.ok()) << Describe(decoded.errors);
  const Model& m = *decoded.model;
  Result<Solution> sol = Solve(m, SolveOptions{});
  ASSERT_OK(sol);
  const Json doc = EncodeSolution(m, *sol, SolutionDetail::kFull);
  EXPECT_FALSE(doc["model"].contains("reward_unit"));
  EXPECT_EQ(doc["tied_states"], 1);
  EXPECT_EQ(doc["states"][0]["optimal_actions"], Json::array({"left", "right"}));
  EXPECT_EQ(doc["states"][0]["action"], "left");  // First in document order.
  EXPECT_EQ(doc["states"][0]["action_gap"], 0.0);
  EXPECT_EQ(doc["smallest_gaps"], Json::array());  // Tied states are left out.
}

TEST_F(JsonCodecTest, EncodeValuesReportNamesTheWorstStates) {
  ValuesReport report =
      VerifyValues(model_, std::vector<double>{4.5, 10.0, 4.0, 0.0}, VerifyOptions{});
  const Json doc = EncodeValuesReport(model_, report);
  EXPECT_EQ(doc["format"], "mdpserve/verification@1");
  EXPECT_EQ(doc["kind"], "values");
  EXPECT_EQ(doc["verdict"], "fail");
  EXPECT_EQ(doc["max_residual"], report.max_residual);
  ASSERT_FALSE(doc["worst_states"].empty());
  // (T V)(dry) = max(-1 + 0.5 * 10, 0.5 * (0.5 * 4.5 + 0.5 * 4)) = 4: residual 0.5.
  EXPECT_EQ(doc["worst_states"][0]["state"], "dry");
  EXPECT_NEAR(doc["worst_states"][0]["residual"].get<double>(), 0.5, 1e-12);
  EXPECT_NEAR(doc["worst_states"][0]["backup"].get<double>(), 4.0, 1e-12);
}

TEST_F(JsonCodecTest, EncodePolicyReportListsSuboptimalChoices) {
  const Solution sol = SolveGreenhouse();
  Decoded<Policy> policy =
      DecodePolicy(model_, R"({"policy": {"dry": "wait", "wet": "harvest", "seedling": "grow"}})");
  ASSERT_TRUE(policy.ok()) << Describe(policy.errors);
  Result<PolicyReport> report = VerifyPolicy(model_, policy.value, sol, VerifyOptions{});
  ASSERT_OK(report);
  const Json doc = EncodePolicyReport(model_, *report);
  EXPECT_EQ(doc["kind"], "policy");
  EXPECT_EQ(doc["verdict"], "fail");
  ASSERT_EQ(doc["suboptimal_states"].size(), 1u);
  EXPECT_EQ(doc["suboptimal_states"][0]["state"], "dry");
  EXPECT_EQ(doc["suboptimal_states"][0]["chosen"], Json::array({"wait"}));
  EXPECT_EQ(doc["suboptimal_states"][0]["optimal_actions"], Json::array({"water"}));
  // Under "wait": V(dry) = 0.5 * (0.5 V(dry) + 0.5 (2 + 0.5 V(dry))), so V(dry) = 0.8.
  EXPECT_NEAR(doc["values"]["dry"].get<double>(), 0.8, 1e-9);
  EXPECT_NEAR(doc["max_loss"].get<double>(), 3.2, 1e-9);
}

TEST_F(JsonCodecTest, EncodeEvaluationGivesThePolicyValues) {
  Decoded<Policy> policy =
      DecodePolicy(model_, R"({"policy": {"dry": "wait", "wet": "harvest", "seedling": "grow"}})");
  ASSERT_TRUE(policy.ok()) << Describe(policy.errors);
  Result<PolicyValues> values = EvaluatePolicy(model_, policy.value, EvaluateOptions{});
  ASSERT_OK(values);
  const Json doc = EncodeEvaluation(model_, *values);
  EXPECT_EQ(doc["format"], "mdpserve/evaluation@1");
  EXPECT_NEAR(doc["values"]["dry"].get<double>(), 0.8, 1e-9);
  EXPECT_NEAR(doc["values"]["seedling"].get<double>(), 2.4, 1e-9);
  EXPECT_NEAR(doc["values"]["wet"].get<double>(), 10.0, 1e-9);
  EXPECT_EQ(doc["residual"], values->residual);
}

TEST_F(JsonCodecTest, EncodeSimulationListsTheMostVisitedStatesAndTheRest) {
  SimulationReport report;
  report.episodes = 3;
  report.total_steps = 10;
  report.visits = {2, 5, 3, 0};  // dry, wet, seedling, done.
  report.visit_frequency = {0.2, 0.5, 0.3, 0.0};
  report.quantiles = {{0.5, 1.0}};
  SimulateOptions options;
  options.start = {{kDry, 0.5}, {kWet, 0.25}, {kDry, 0.25}};
  const Json doc = EncodeSimulation(model_, options, report, 2);
  EXPECT_EQ(doc["format"], "mdpserve/simulation@1");
  EXPECT_EQ(doc["options"]["start"], Json({{"dry", 0.75}, {"wet", 0.25}}));
  EXPECT_EQ(doc["visits"]["states_visited"], 3);
  ASSERT_EQ(doc["visits"]["most_visited"].size(), 2u);
  EXPECT_EQ(doc["visits"]["most_visited"][0]["state"], "wet");
  EXPECT_EQ(doc["visits"]["most_visited"][1]["state"], "seedling");
  EXPECT_DOUBLE_EQ(doc["visits"]["unlisted_frequency"].get<double>(), 0.2);
}

TEST_F(JsonCodecTest, EncodeSimulationWritesNullForUndefinedStatistics) {
  SimulationReport report;
  report.outcome = SimulationOutcome::kCancelled;
  report.mean = report.std_dev = report.ci_low = report.ci_high = std::nan("");
  report.quantiles = {{0.5, std::nan("")}};
  report.visits.assign(model_.num_states(), 0);
  report.visit_frequency.assign(model_.num_states(), 0.0);
  SimulateOptions options;
  options.start = {{kDry, 1.0}};
  const Json doc = EncodeSimulation(model_, options, report);
  EXPECT_EQ(doc["outcome"], "cancelled");
  EXPECT_TRUE(doc["return"]["mean"].is_null());
  EXPECT_TRUE(doc["return"]["confidence_interval"]["low"].is_null());
  EXPECT_TRUE(doc["return"]["quantiles"][0]["value"].is_null());
  EXPECT_EQ(doc["visits"]["most_visited"], Json::array());
  EXPECT_EQ(doc["visits"]["unlisted_frequency"], 0.0);
}

TEST_F(JsonCodecTest, DecodeStartDistributionReadsStatesAndProbabilities) {
  Decoded<std::vector<StartWeight>> start = DecodeStartDistribution(
      model_, R"({"format": "mdpserve/start@1", "start": {"wet": 0.75, "done": 0.25}})");
  ASSERT_TRUE(start.ok()) << Describe(start.errors);
  ASSERT_EQ(start.value.size(), 2u);
  double wet = 0.0;
  for (const StartWeight& w : start.value) wet += w.state == kWet ? w.probability : 0.0;
  EXPECT_EQ(wet, 0.75);
}

TEST_F(JsonCodecTest, DecodeStartDistributionReportsWhereItIsWrong) {
  Decoded<std::vector<StartWeight>> bad = DecodeStartDistribution(
      model_, R"({"start": {"attic": 0.5, "dry": 1.5, "wet": "half"}})");
  EXPECT_TRUE(HasIssue(bad.errors, "/start/attic", "no state 'attic'")) << Describe(bad.errors);
  EXPECT_TRUE(HasIssue(bad.errors, "/start/dry", "between 0 and 1")) << Describe(bad.errors);
  EXPECT_TRUE(HasIssue(bad.errors, "/start/wet", "between 0 and 1")) << Describe(bad.errors);
  Decoded<std::vector<StartWeight>> empty = DecodeStartDistribution(model_, R"({"start": {}})");
  EXPECT_TRUE(HasIssue(empty.errors, "/start", "at least one state")) << Describe(empty.errors);
  Decoded<std::vector<StartWeight>> short_sum =
      DecodeStartDistribution(model_, R"({"start": {"dry": 0.5}})");
  EXPECT_TRUE(HasIssue(short_sum.errors, "/start", "sum to 0.5")) << Describe(short_sum.errors);
  Decoded<std::vector<StartWeight>> format = DecodeStartDistribution(
      model_, R"({"format": "mdpserve/policy@1", "start": {"dry": 1}})");
  EXPECT_TRUE(HasIssue(format.errors, "/format", "mdpserve/start@1")) << Describe(format.errors);
}

TEST(JsonCodecIssuesTest, EncodeIssuesListsErrorsWarningsAndTheRest) {
  const Json doc = EncodeIssues(
      {{"/objective", "must be \"maximize\" or \"minimize\""}, {"", "the document is empty"}},
      {{"/states/3", "no other state leads to this state"}}, 12);
  EXPECT_EQ(doc, Json::parse(R"({
      "format": "mdpserve/errors@1",
      "errors": [{"pointer": "/objective", "message": "must be \"maximize\" or \"minimize\""},
                 {"pointer": "", "message": "the document is empty"}],
      "warnings": [{"pointer": "/states/3", "message": "no other state leads to this state"}],
      "truncated": 12})"));
}

TEST(JsonCodecIssuesTest, EncodeIssuesWithNothingToSayHasEmptyLists) {
  const Json doc = EncodeIssues({}, {}, 0);
  EXPECT_EQ(doc["errors"], Json::array());
  EXPECT_EQ(doc["warnings"], Json::array());
  EXPECT_EQ(doc["truncated"], 0);
}

}  // namespace
}  // namespace mdp::server
