// Tests server/model_arrays_codec.{h,cc}: the compact (arrays) encoding of the model document.
// The reference outside the codec is the object encoding: every demo model, rewritten into
// arrays by a converter written here (from the JSON, not from a ModelSpec), must decode to the
// identical ModelSpec and the identical canonical id. Then a table of broken documents, each
// with its pointer and message, and truncated or mangled text that must be refused cleanly.
#include "server/model_arrays_codec.h"

#include <gtest/gtest.h>

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <map>
#include <sstream>
#include <string>
#include <string_view>
#include <vector>

#include "server/canonical.h"
#include "server/json_reader.h"
#include "server/model_codec.h"
#include "tests/testing/documents.h"

namespace mdp::server {
namespace {

using test_documents::Describe;
using test_documents::HasIssue;
using OrderedJson = nlohmann::ordered_json;

// The repository root, from this file's path (CMake compiles it by its absolute path).
std::filesystem::path RepositoryRoot() {
  return std::filesystem::path(__FILE__).parent_path().parent_path().parent_path();
}

std::string ReadFile(const std::filesystem::path& path) {
  std::ifstream in(path, std::ios::binary);
  std::ostringstream text;
  text << in.rdbuf();
  return text.str();
}

// Rewrites an object-encoded model document (api-schema/model.schema.json) into the arrays
// encoding, following api-schema/README.md only. `Document` picks the member order:
// OrderedJson keeps the writer's order (format first), Json sorts the keys (format after
// actions, criterion and description, so detection must skip values to find it).
template <typename Document>
std::string ToArrays(std::string_view object_text) {
  const Document in = Document::parse(object_text);
  Document out;
  out["format"] = "mdpserve/model-arrays@1";
  for (const char* key :
       {"name", "description", "reward_unit", "objective", "criterion", "actions"}) {
    if (in.contains(key)) out[key] = in[key];
  }
  std::map<std::string, int64_t> catalogue, state_index;
  for (size_t a = 0; a < in["actions"].size(); ++a) {
    catalogue[in["actions"][a].template get<std::string>()] = a;
  }
  for (size_t s = 0; s < in["states"].size(); ++s) {
    state_index[in["states"][s]["name"].template get<std::string>()] = s;
  }
  Document columns = Document::object();
  for (const char* key : {"states", "terminal", "sa_state", "sa_action", "sa_reward", "sa_outcomes",
                          "next", "probability", "reward"}) {
    columns[key] = Document::array();
  }
  for (size_t s = 0; s < in["states"].size(); ++s) {
    const Document& state = in["states"][s];
    columns["states"].push_back(state["name"]);
    if (state.value("terminal", false)) columns["terminal"].push_back(s);
    for (const Document& row : state.value("actions", Document::array())) {
      columns["sa_state"].push_back(s);
      columns["sa_action"].push_back(catalogue.at(row["action"].template get<std::string>()));
      columns["sa_reward"].push_back(row.value("reward", Document(0)));
      columns["sa_outcomes"].push_back(row["outcomes"].size());
      for (const Document& o : row["outcomes"]) {
        columns["next"].push_back(state_index.at(o["next"].template get<std::string>()));
        columns["probability"].push_back(o["probability"]);
        columns["reward"].push_back(o.value("reward", Document(0)));
      }
    }
  }
  for (auto it = columns.begin(); it != columns.end(); ++it) out[it.key()] = it.value();
  return out.dump(1);
}

std::vector<std::filesystem::path> Examples() {
  std::vector<std::filesystem::path> out;
  const std::filesystem::path dir = RepositoryRoot() / "api-schema" / "examples";
  if (!std::filesystem::is_directory(dir)) return out;
  for (const auto& entry : std::filesystem::directory_iterator(dir)) {
    if (entry.path().extension() == ".json") out.push_back(entry.path());
  }
  std::sort(out.begin(), out.end());
  return out;
}

void ExpectSameSpec(const ModelSpec& a, const ModelSpec& b) {
  EXPECT_EQ(a.name, b.name);
  EXPECT_EQ(a.description, b.description);
  EXPECT_EQ(a.reward_unit, b.reward_unit);
  EXPECT_EQ(a.objective, b.objective);
  EXPECT_EQ(a.criterion.kind, b.criterion.kind);
  EXPECT_EQ(a.criterion.discount, b.criterion.discount);
  EXPECT_EQ(a.criterion.horizon, b.criterion.horizon);
  EXPECT_EQ(a.criterion.terminal_values, b.criterion.terminal_values);
  EXPECT_EQ(a.action_names, b.action_names);
  EXPECT_EQ(a.state_names, b.state_names);
  EXPECT_EQ(a.terminal, b.terminal);
  EXPECT_EQ(a.state_first_slot, b.state_first_slot);
  EXPECT_EQ(a.slot_action, b.slot_action);
  EXPECT_EQ(a.slot_reward, b.slot_reward);
  EXPECT_EQ(a.slot_first_outcome, b.slot_first_outcome);
  EXPECT_EQ(a.outcome_next, b.outcome_next);
  EXPECT_EQ(a.outcome_probability, b.outcome_probability);
  EXPECT_EQ(a.outcome_reward, b.outcome_reward);
}

TEST(ModelArraysCodecTest, TheDemoModelsAreFound) {
  EXPECT_GE(Examples().size(), 6u) << "no api-schema/examples under " << RepositoryRoot();
}

TEST(ModelArraysCodecTest, EveryDemoModelDecodesToTheSameSpecAndIdInBothEncodings) {
  for (const std::filesystem::path& path : Examples()) {
    SCOPED_TRACE(path.filename().string());
    const std::string object_text = ReadFile(path);
    ModelDecodeResult object = DecodeModel(object_text);
    ASSERT_TRUE(object.ok()) << Describe(object.errors);
    const std::string object_id = ModelId(EncodeCanonicalModel(object.spec));
    for (const std::string& arrays_text :
         {ToArrays<OrderedJson>(object_text), ToArrays<Json>(object_text)}) {
      ASSERT_TRUE(IsArraysModelDocument(arrays_text));
      ModelDecodeResult arrays = DecodeModel(arrays_text);
      ASSERT_TRUE(arrays.ok()) << Describe(arrays.errors);
      ExpectSameSpec(arrays.spec, object.spec);
      EXPECT_EQ(EncodeCanonicalModel(arrays.spec), EncodeCanonicalModel(object.spec));
      EXPECT_EQ(ModelId(EncodeCanonicalModel(arrays.spec)), object_id);
      EXPECT_EQ(arrays.warnings.size(), object.warnings.size()) << Describe(arrays.warnings);
      SpecDecodeResult spec_only = DecodeModelSpec(arrays_text);
      EXPECT_TRUE(spec_only.errors.empty()) << Describe(spec_only.errors);
      ExpectSameSpec(spec_only.spec, object.spec);
    }
  }
}

// The invented kiln of model_codec_test.cc in the arrays encoding: rows cold/fire, cold/rest,
// hot/fire, hot/rest; "cracked" is terminal. The base of every broken document below.
constexpr std::string_view kKiln = R"({
  "format": "mdpserve/model-arrays@1",
  "name": "Kiln",
  "reward_unit": "coins",
  "objective": "maximize",
  "criterion": {"kind": "discounted", "discount": 0.8},
  "actions": ["fire", "rest"],
  "states": ["cold", "hot", "cracked"],
  "terminal": [2],
  "sa_state": [0, 0, 1, 1],
  "sa_action": [0, 1, 0, 1],
  "sa_reward": [-2.0, 0, 0, 0],
  "sa_outcomes": [2, 1, 2, 1],
  "next": [1, 0, 0, 2, 1, 0],
  "probability": [0.75, 0.25, 1.0, 0.5, 0.5, 1.0],
  "reward": [1.0, 0, 0, 4.0, 3.0, 0.5]
})";

// The same kiln in the object encoding, written out by hand.
constexpr std::string_view kKilnObjects = R"({
  "format": "mdpserve/model@1", "name": "Kiln", "reward_unit": "coins",
  "objective": "maximize", "criterion": {"kind": "discounted", "discount": 0.8},
  "actions": ["fire", "rest"],
  "states": [
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
    {"name": "cracked", "terminal": true}]})";

// Replaces the only occurrence of `from` in `text`; false (and no change) unless it occurs
// exactly once.
bool ReplaceOnce(std::string& text, std::string_view from, std::string_view to) {
  const size_t at = text.find(from);
  if (at == std::string::npos || text.find(from, at + 1) != std::string::npos) return false;
  text.replace(at, from.size(), to);
  return true;
}

TEST(ModelArraysCodecTest, TheKilnMatchesItsObjectEncoding) {
  ModelDecodeResult arrays = DecodeModel(kKiln);
  ModelDecodeResult objects = DecodeModel(kKilnObjects);
  ASSERT_TRUE(arrays.ok()) << Describe(arrays.errors);
  ASSERT_TRUE(objects.ok()) << Describe(objects.errors);
  EXPECT_TRUE(arrays.warnings.empty()) << Describe(arrays.warnings);
  ExpectSameSpec(arrays.spec, objects.spec);
  EXPECT_EQ(ModelId(EncodeCanonicalModel(arrays.spec)),
            ModelId(EncodeCanonicalModel(objects.spec)));
  const Model& m = *arrays.model;
  EXPECT_EQ(m.num_states(), 3);
  EXPECT_EQ(m.num_rows(), 4);
  EXPECT_TRUE(m.terminal(2));
  // Expected rewards: -2 + 0.75 * 1 + 0.25 * 0 and 0.5 * 4 + 0.5 * 3.
  EXPECT_DOUBLE_EQ(m.row_reward(*m.FindRow(0, "fire")), -1.25);
  EXPECT_DOUBLE_EQ(m.row_reward(*m.FindRow(1, "fire")), 3.5);
}

TEST(ModelArraysCodecTest, OptionalColumnsDefaultAsInTheObjectEncoding) {
  // No rewards anywhere, no terminal list, whole numbers written as 1.0 in index columns,
  // state descriptions given (checked, then dropped like the object encoding's).
  constexpr std::string_view kBare = R"({"format": "mdpserve/model-arrays@1", "name": "Bare",
    "objective": "minimize", "criterion": {"kind": "average"}, "actions": ["go"],
    "states": ["a", "b"], "state_descriptions": ["the start", null],
    "sa_state": [0, 1.0], "sa_action": [0, 0], "sa_outcomes": [1, 2],
    "next": [1, 0, 1.0], "probability": [1, 0.5, 0.5]})";
  constexpr std::string_view kBareObjects = R"({"format": "mdpserve/model@1", "name": "Bare",
    "objective": "minimize", "criterion": {"kind": "average"}, "actions": ["go"],
    "states": [
      {"name": "a", "description": "the start", "actions": [
        {"action": "go", "outcomes": [{"next": "b", "probability": 1}]}]},
      {"name": "b", "actions": [{"action": "go", "outcomes": [
        {"next": "a", "probability": 0.5}, {"next": "b", "probability": 0.5}]}]}]})";
  ModelDecodeResult arrays = DecodeModel(kBare);
  ModelDecodeResult objects = DecodeModel(kBareObjects);
  ASSERT_TRUE(arrays.ok()) << Describe(arrays.errors);
  ASSERT_TRUE(objects.ok()) << Describe(objects.errors);
  ExpectSameSpec(arrays.spec, objects.spec);
}

TEST(ModelArraysCodecTest, FiniteHorizonTerminalValuesNameStates) {
  std::string text(kKiln);
  ASSERT_TRUE(ReplaceOnce(text, R"("discounted", "discount": 0.8)",
                          R"("finite_horizon", "horizon": 12, "terminal_values": {"hot": 2.5})"));
  std::string objects(kKilnObjects);
  ASSERT_TRUE(ReplaceOnce(objects, R"("discounted", "discount": 0.8)",
                          R"("finite_horizon", "horizon": 12, "terminal_values": {"hot": 2.5})"));
  ModelDecodeResult arrays = DecodeModel(text);
  ModelDecodeResult reference = DecodeModel(objects);
  ASSERT_TRUE(arrays.ok()) << Describe(arrays.errors);
  ASSERT_TRUE(reference.ok()) << Describe(reference.errors);
  ExpectSameSpec(arrays.spec, reference.spec);
  EXPECT_EQ(arrays.spec.criterion.terminal_values, (std::vector<double>{0.0, 2.5, 0.0}));
}

TEST(ModelArraysCodecTest, DetectionReadsOnlyTheTopLevelFormat) {
  EXPECT_TRUE(IsArraysModelDocument(kKiln));
  EXPECT_FALSE(IsArraysModelDocument(kKilnObjects));
  EXPECT_TRUE(
      IsArraysModelDocument(R"({"x": [1, {"y": "]"}], "format": "mdpserve/model-arrays@9"})"));
  EXPECT_TRUE(IsArraysModelDocument(R"({"format": "mdpserve\/model-arrays@1"})"));
  // The marker elsewhere than in the root's format member does not count.
  EXPECT_FALSE(IsArraysModelDocument(
      R"({"description": "mdpserve/model-arrays@1", "format": "mdpserve/model@1"})"));
  EXPECT_FALSE(IsArraysModelDocument(R"({"a": {"format": "mdpserve/model-arrays@1"}})"));
  EXPECT_FALSE(IsArraysModelDocument(R"(["mdpserve/model-arrays@1"])"));
  EXPECT_FALSE(IsArraysModelDocument(""));
  EXPECT_FALSE(IsArraysModelDocument(R"({"format": "mdpserve/model-arrays@1)"));
}

// A ring of 2^17 states with one action of 8 outcomes each (2^20 outcomes: large enough for
// DecodeArraysModel to compile on a second thread while it validates), in the arrays encoding
// and as a ModelSpec built directly. Outcome k of state s goes to state s + k (mod the ring).
constexpr int64_t kRingStates = int64_t{1} << 17;

std::string RingText(std::string_view first_probability) {
  std::string states, rows, actions, counts, next, probability;
  for (int64_t s = 0; s < kRingStates; ++s) {
    const std::string comma = s ? "," : "";
    states += comma + "\"s" + std::to_string(s) + "\"";
    rows += comma + std::to_string(s);
    actions += comma + "0";
    counts += comma + "8";
    for (int k = 0; k < 8; ++k) {
      next += (s || k ? "," : "") + std::to_string((s + k) % kRingStates);
      probability += (s || k ? "," : "");
      probability += s == 0 && k == 0 ? std::string(first_probability) : "0.125";
    }
  }
  return R"({"format": "mdpserve/model-arrays@1", "name": "Ring", "objective": "maximize",
    "criterion": {"kind": "discounted", "discount": 0.9}, "actions": ["spin"], "states": [)" +
         states + "], \"sa_state\": [" + rows + "], \"sa_action\": [" + actions +
         "], \"sa_outcomes\": [" + counts + "], \"next\": [" + next + "], \"probability\": [" +
         probability + "]}";
}

ModelSpec RingSpec() {
  ModelSpec spec;
  spec.name = "Ring";
  spec.criterion.discount = 0.9;
  spec.action_names = {"spin"};
  for (int64_t s = 0; s < kRingStates; ++s) {
    spec.AddState("s" + std::to_string(s));
    spec.AddStateAction(0);
    for (int k = 0; k < 8; ++k) spec.AddOutcome(static_cast<StateId>((s + k) % kRingStates), 0.125);
  }
  return spec;
}

TEST(ModelArraysCodecTest, ALargeModelDecodesAsItsDirectlyBuiltSpec) {
  ModelDecodeResult result = DecodeModel(RingText("0.125"));
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  EXPECT_EQ(result.model->num_outcomes_in_document(), int64_t{1} << 20);
  const ModelSpec direct = RingSpec();
  ExpectSameSpec(result.spec, direct);
  EXPECT_EQ(ModelId(EncodeCanonicalModel(result.spec)), ModelId(EncodeCanonicalModel(direct)));
}

TEST(ModelArraysCodecTest, ALargeInvalidModelIsRefusedWhileItCompiles) {
  ModelDecodeResult result = DecodeModel(RingText("0.5"));
  EXPECT_FALSE(result.ok());
  EXPECT_TRUE(HasIssue(result.errors, "/sa_outcomes/0", "sum to 1.375")) << Describe(result.errors);
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
  BadDocument row{std::move(name), std::string(kKiln), std::move(pointer), std::move(message), {}};
  row.tweak_applied = ReplaceOnce(row.text, from, to);
  return row;
}

BadDocument Capped(std::string name, DecodeLimits limits, std::string pointer,
                   std::string message) {
  return BadDocument{std::move(name), std::string(kKiln), std::move(pointer), std::move(message),
                     limits};
}

constexpr std::string_view kProbabilities = "[0.75, 0.25, 1.0, 0.5, 0.5, 1.0]";
constexpr std::string_view kNext = R"("next": [1, 0, 0, 2, 1, 0])";
constexpr std::string_view kCounts = "[2, 1, 2, 1]";

std::vector<BadDocument> ShapeRows() {
  return {
      Tweak("probability_shorter_than_next", kProbabilities, "[0.75, 0.25, 1.0, 0.5, 0.5]",
            "/probability", "has 5 items, but next has 6"),
      Tweak("reward_longer_than_next", "[1.0, 0, 0, 4.0, 3.0, 0.5]",
            "[1.0, 0, 0, 4.0, 3.0, 0.5, 0]", "/reward", "has 7 items, but next has 6"),
      Tweak("sa_action_longer_than_sa_state", "[0, 1, 0, 1]", "[0, 1, 0, 1, 0]", "/sa_action",
            "has 5 items, but sa_state has 4"),
      Tweak("descriptions_not_one_per_state", R"("terminal": [2],)",
            R"("terminal": [2], "state_descriptions": ["x"],)", "/state_descriptions",
            "has 1 items, but states has 3"),
      Tweak("counts_add_up_to_more_than_next", kCounts, "[2, 1, 2, 2]", "/sa_outcomes",
            "add up to 7 outcomes, but next has 6"),
      Tweak("negative_count", kCounts, "[2, -1, 2, 1]", "/sa_outcomes/1", "must not be negative"),
      Tweak("next_out_of_range", kNext, R"("next": [1, 0, 0, 7, 1, 0])", "/next/3",
            "state index 7 is out of range: there are 3 states"),
      Tweak("next_beyond_32_bits", kNext, R"("next": [1, 0, 0, 9999999999, 1, 0])", "/next/3",
            "index 9999999999 is out of range"),
      Tweak("sa_action_out_of_range", "[0, 1, 0, 1]", "[0, 2, 0, 1]", "/sa_action/1",
            "action index 2 is out of range: there are 2 catalogue actions"),
      Tweak("sa_state_out_of_range", "[0, 0, 1, 1]", "[0, 0, 1, 3]", "/sa_state/3",
            "state index 3 is out of range"),
      Tweak("sa_state_decreases", "[0, 0, 1, 1]", "[0, 1, 0, 1]", "/sa_state/2",
            "must not decrease"),
      Tweak("terminal_out_of_range", R"("terminal": [2])", R"("terminal": [3])", "/terminal/0",
            "out of range"),
      Tweak("terminal_listed_twice", R"("terminal": [2])", R"("terminal": [2, 2])", "/terminal/1",
            "increasing order, each once"),
      Tweak("index_with_a_fraction", "[0, 1, 0, 1]", "[0, 1, 0, 1.5]", "/sa_action/3",
            "must be a whole number"),
      Tweak("index_negative", kNext, R"("next": [1, 0, 0, -2, 1, 0])", "/next/3",
            "must not be negative"),
  };
}

std::vector<BadDocument> TypeAndMemberRows() {
  return {
      Tweak("probability_overflows", kProbabilities, "[0.75, 0.25, 1e999, 0.5, 0.5, 1.0]",
            "/probability/2", "'1e999' is too large for a double"),
      Tweak("reward_overflows_negative", "[1.0, 0, 0, 4.0, 3.0, 0.5]",
            "[1.0, 0, 0, -1e999, 3.0, 0.5]", "/reward/3", "too large for a double"),
      Tweak("probability_nan", kProbabilities, "[0.75, 0.25, NaN, 0.5, 0.5, 1.0]", "/probability/2",
            "malformed JSON"),
      Tweak("probability_as_string", kProbabilities, R"([0.75, "0.25", 1.0, 0.5, 0.5, 1.0])",
            "/probability/1", "must be a number, not a string"),
      Tweak("reward_null", "[-2.0, 0, 0, 0]", "[-2.0, null, 0, 0]", "/sa_reward/1",
            "must be a number, not null"),
      Tweak("sa_action_as_name", "[0, 1, 0, 1]", R"([0, "rest", 0, 1])", "/sa_action/1",
            "must be a number, not a string"),
      Tweak("states_not_an_array", R"(["cold", "hot", "cracked"])", R"("cold")", "/states",
            "must be an array, not a string"),
      Tweak("state_name_a_number", R"(["cold", "hot", "cracked"])", R"(["cold", 7, "cracked"])",
            "/states/1", "must be a string, not a number"),
      Tweak("state_name_empty", R"(["cold", "hot", "cracked"])", R"(["cold", "", "cracked"])",
            "/states/1", "must not be empty"),
      Tweak("state_name_with_control_character", R"("cracked"])", R"("crac\u0007ked"])",
            "/states/2", "control characters"),
      Tweak("state_description_a_number", R"("terminal": [2],)",
            R"("terminal": [2], "state_descriptions": [null, 5, null],)", "/state_descriptions/1",
            "must be a string or null, not a number"),
      Tweak("unknown_member", R"("terminal": [2])", R"("terminl": [2])", "/terminl",
            "unknown field"),
      Tweak("missing_next", std::string(kNext) + ",", "", "/next", "required field is missing"),
      Tweak("missing_name", R"("name": "Kiln",)", "", "/name", "required field is missing"),
      Tweak("duplicate_member", R"("terminal": [2])", R"("terminal": [2], "terminal": [1])",
            "/terminal", "duplicate key 'terminal'"),
      Tweak("duplicate_key_in_criterion", R"("discount": 0.8})",
            R"("discount": 0.8, "discount": 0.9})", "/criterion/discount",
            "duplicate key 'discount'"),
      Tweak("format_version_2", "model-arrays@1", "model-arrays@2", "/format",
            "unsupported compact model format"),
      Tweak("missing_comma_in_a_column", kProbabilities, "[0.75, 0.25 1.0, 0.5, 0.5, 1.0]",
            "/probability/2", "malformed JSON at line 15, column 30"),
      Tweak("bad_literal_in_a_column", kProbabilities, "[0.75, 0.25, tru, 0.5, 0.5, 1.0]",
            "/probability/2", "malformed JSON at line 15, column 31"),
      Tweak("leading_zero", kProbabilities, "[0.75, 0.25, 01, 0.5, 0.5, 1.0]", "/probability/2",
            "invalid number"),
      Tweak("malformed_header_member", R"("kind": "discounted")", R"("kind" "discounted")",
            "/criterion", "malformed JSON"),
      Tweak("a_second_object_after_the_first", "0.5]\n}", "0.5]\n} {}", "",
            "content after the end of the document"),
      Tweak("a_word_after_the_document", "0.5]\n}", "0.5]\n} x", "", "malformed JSON"),
      Tweak("a_second_document_after_the_first", "0.5]\n}", "0.5]\n} []", "", "malformed JSON"),
      Tweak("unclosed_root_object", "0.5]\n}", "0.5]\n", "", "brackets do not balance"),
  };
}

BadDocument TotalWithoutAGoal() {
  BadDocument row = Tweak("total_without_a_goal", R"("discounted", "discount": 0.8)", R"("total")",
                          "/criterion", "no state is terminal");
  row.tweak_applied = row.tweak_applied && ReplaceOnce(row.text, R"("terminal": [2],)", "");
  return row;
}

// Rules of Validate(), with their pointers mapped into the arrays.
std::vector<BadDocument> ValidationRows() {
  return {
      Tweak("probabilities_sum_to_0_95", kProbabilities, "[0.7, 0.25, 1.0, 0.5, 0.5, 1.0]",
            "/sa_outcomes/0", "sum to 0.95"),
      Tweak("probability_negative", kProbabilities, "[0.75, 0.25, 1.0, -0.5, 0.5, 1.0]",
            "/probability/3", "probability is negative"),
      Tweak("duplicate_state_name", R"(["cold", "hot", "cracked"])", R"(["cold", "hot", "cold"])",
            "/states/2", "duplicate state name 'cold'"),
      Tweak("action_twice_in_a_state", "[0, 1, 0, 1]", "[0, 0, 0, 1]", "/sa_action/1",
            "listed twice"),
      Tweak("terminal_state_with_actions", R"("terminal": [2])", R"("terminal": [1, 2])",
            "/sa_state/2", "a terminal state cannot have actions"),
      Tweak("nonterminal_state_without_actions", R"("terminal": [2],)", "", "/states/2",
            "needs at least one action"),
      Tweak("count_zero", kCounts, "[2, 0, 2, 2]", "/sa_outcomes/1", "at least one outcome"),
      Tweak("discount_one", R"("discount": 0.8)", R"("discount": 1)", "/criterion/discount",
            "at least 0 and below 1"),
      TotalWithoutAGoal(),
      Tweak("terminal_values_unknown_state", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "terminal_values": {"warm": 1})",
            "/criterion/terminal_values/warm", "state 'warm' is not defined"),
      Tweak("terminal_value_not_a_number", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "terminal_values": {"hot": true})",
            "/criterion/terminal_values/hot", "must be a number, not a boolean"),
      Tweak("terminal_values_not_an_object", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "terminal_values": [1])",
            "/criterion/terminal_values", "must be an object"),
      Tweak("terminal_value_at_an_absorbing_state", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "terminal_values": {"cracked": -5})",
            "/criterion/terminal_values/cracked", "value 0 at every stage"),
      Tweak("header_rules_are_the_object_encodings", R"("name": "Kiln")", R"("name": "")", "/name",
            "must not be empty"),
  };
}

std::vector<BadDocument> SizeCapRows() {
  DecodeLimits states, catalogue, per_state, per_action, total;
  states.max_states = 2;
  catalogue.max_catalogue = 1;
  per_state.max_actions_per_state = 1;
  per_action.max_outcomes_per_action = 1;
  total.max_outcomes = 5;
  // Levels: the root object 1, the criterion 2, its terminal values 3.
  BadDocument deep_header =
      Tweak("header_deeper_than_a_small_cap", R"("discounted", "discount": 0.8)",
            R"("finite_horizon", "horizon": 3, "terminal_values": {"hot": 1})",
            "/criterion/terminal_values", "deeper than 2 levels");
  deep_header.limits.max_depth = 2;
  const std::string deep = std::string(70, '[') + std::string(70, ']');
  return {
      deep_header,
      // Columns hold scalars: a nested element is a type error, skipped without recursion.
      Tweak("column_element_nested_70_deep", kProbabilities,
            "[0.75, " + deep + ", 1.0, 0.5, 0.5, 1.0]", "/probability/1",
            "must be a number, not an array"),
      Capped("too_many_states", states, "/states/2", "the model has more than 2 states"),
      Capped("too_many_catalogue_actions", catalogue, "/actions", "more than 1 actions"),
      Capped("too_many_actions_in_a_state", per_state, "/sa_state/1",
             "state 0 has more than 1 actions"),
      Capped("too_many_outcomes_in_a_state_action", per_action, "/sa_outcomes/0",
             "a state action has more than 1 outcomes"),
      Capped("too_many_outcomes_in_the_model", total, "/next/5",
             "the model has more than 5 outcomes"),
  };
}

std::vector<BadDocument> AllBadDocuments() {
  std::vector<BadDocument> rows;
  for (auto part : {ShapeRows(), TypeAndMemberRows(), ValidationRows(), SizeCapRows()}) {
    rows.insert(rows.end(), part.begin(), part.end());
  }
  return rows;
}

class BadArraysDocumentTest : public ::testing::TestWithParam<BadDocument> {};

TEST_P(BadArraysDocumentTest, IsRejectedWithPointerAndMessage) {
  const BadDocument& row = GetParam();
  ASSERT_TRUE(row.tweak_applied) << "the tweak's target is not unique in the base document";
  ModelDecodeResult result = DecodeModel(row.text, row.limits);
  EXPECT_FALSE(result.ok());
  EXPECT_FALSE(result.model.has_value());
  EXPECT_TRUE(HasIssue(result.errors, row.pointer, row.message))
      << "expected '" << row.pointer << "': ..." << row.message << "...; got"
      << Describe(result.errors);
}

// DecodeModel's `released` hook: a caller may free the text there, so nothing after it may
// read the text. Here the hook overwrites every byte instead (same size, no free), so a late
// read would change a name, a number or a message and the comparison would fail.
ModelDecodeResult DecodeReleasingText(std::string text, const DecodeLimits& limits,
                                      int* calls) {
  return DecodeModel(text, limits, [&text, calls] {
    ++*calls;
    std::fill(text.begin(), text.end(), '#');
  });
}

// Same outcome, findings (pointer and message) and canonical text.
void ExpectSameDecode(const ModelDecodeResult& got, const ModelDecodeResult& want) {
  EXPECT_EQ(got.ok(), want.ok());
  ASSERT_EQ(got.errors.size(), want.errors.size()) << Describe(got.errors);
  for (size_t i = 0; i < got.errors.size(); ++i) {
    EXPECT_EQ(got.errors[i].pointer, want.errors[i].pointer);
    EXPECT_EQ(got.errors[i].message, want.errors[i].message);
  }
  EXPECT_EQ(got.errors_not_listed, want.errors_not_listed);
  EXPECT_EQ(got.malformed, want.malformed);
  ASSERT_EQ(got.warnings.size(), want.warnings.size()) << Describe(got.warnings);
  for (size_t i = 0; i < got.warnings.size(); ++i) {
    EXPECT_EQ(got.warnings[i].pointer, want.warnings[i].pointer);
    EXPECT_EQ(got.warnings[i].message, want.warnings[i].message);
  }
  if (got.ok() && want.ok()) {
    EXPECT_EQ(EncodeCanonicalModel(got.spec), EncodeCanonicalModel(want.spec));
  }
}

TEST_P(BadArraysDocumentTest, GivesTheSameFindingsWhenTheTextIsReleasedOnceRead) {
  const BadDocument& row = GetParam();
  int calls = 0;
  ModelDecodeResult released = DecodeReleasingText(row.text, row.limits, &calls);
  EXPECT_LE(calls, 1);
  ExpectSameDecode(released, DecodeModel(row.text, row.limits));
}

TEST(ModelArraysCodecTest, EveryDemoModelDecodesTheSameWhenTheTextIsReleasedOnceRead) {
  for (const std::filesystem::path& path : Examples()) {
    SCOPED_TRACE(path.filename().string());
    const std::string object_text = ReadFile(path);
    for (const std::string& text : {object_text, ToArrays<OrderedJson>(object_text)}) {
      int calls = 0;
      ModelDecodeResult released = DecodeReleasingText(text, DecodeLimits{}, &calls);
      EXPECT_EQ(calls, 1);
      ASSERT_TRUE(released.ok()) << Describe(released.errors);
      ExpectSameDecode(released, DecodeModel(text));
    }
  }
}

TEST(ModelArraysCodecTest, InvalidObjectDocumentsDecodeTheSameWhenTheTextIsReleasedOnceRead) {
  // Findings of the object decoder and of Validate() after it, names quoted in messages.
  std::string unknown_next(kKilnObjects), bad_probability(kKilnObjects);
  ASSERT_TRUE(ReplaceOnce(unknown_next, R"({"next": "cracked")", R"({"next": "crackd")"));
  ASSERT_TRUE(ReplaceOnce(bad_probability, R"("probability": 0.25)", R"("probability": 0.5)"));
  for (const std::string& text : {unknown_next, bad_probability}) {
    int calls = 0;
    ModelDecodeResult released = DecodeReleasingText(text, DecodeLimits{}, &calls);
    EXPECT_EQ(calls, 1);
    EXPECT_FALSE(released.ok());
    EXPECT_FALSE(released.errors.empty());
    ExpectSameDecode(released, DecodeModel(text));
  }
}

INSTANTIATE_TEST_SUITE_P(ModelArraysCodecTest, BadArraysDocumentTest,
                         ::testing::ValuesIn(AllBadDocuments()),
                         [](const ::testing::TestParamInfo<BadDocument>& info) {
                           return info.param.name;
                         });

TEST(ModelArraysCodecTest, FindingsAreNotReportedTwice) {
  // 1e999 and an out-of-range next are the decoder's findings; Validate() would see a NaN and
  // a -1 there and must not report them again.
  std::string text(kKiln);
  ASSERT_TRUE(ReplaceOnce(text, kProbabilities, "[0.75, 0.25, 1e999, 0.5, 0.5, 1.0]"));
  ASSERT_TRUE(ReplaceOnce(text, kNext, R"("next": [1, 0, 0, 7, 1, 0])"));
  ModelDecodeResult result = DecodeModel(text);
  EXPECT_EQ(result.errors.size(), 2u) << Describe(result.errors);
  EXPECT_TRUE(HasIssue(result.errors, "/probability/2", "too large"));
  EXPECT_TRUE(HasIssue(result.errors, "/next/3", "out of range"));
}

TEST(ModelArraysCodecTest, ListsAtMostTheCapAndCountsTheRest) {
  std::string text(kKiln);
  std::string many = "[";
  for (int i = 0; i < 150; ++i) many += std::string(i ? "," : "") + "\"x\"";
  ASSERT_TRUE(ReplaceOnce(text, kProbabilities, many + "]"));
  std::string next = R"("next": [)";
  std::string counts = "[2, 1, 2, 145]";
  for (int i = 0; i < 150; ++i) next += std::string(i ? "," : "") + "0";
  ASSERT_TRUE(ReplaceOnce(text, kNext, next + "]"));
  ASSERT_TRUE(ReplaceOnce(text, kCounts, counts));
  ASSERT_TRUE(ReplaceOnce(text, "[1.0, 0, 0, 4.0, 3.0, 0.5]", "[]"));
  ModelDecodeResult result = DecodeModel(text);
  EXPECT_EQ(result.errors.size(), 100u);
  EXPECT_GE(result.errors_not_listed, 50) << Describe(result.errors);
}

TEST(ModelArraysCodecTest, WarningsPointIntoTheArrays) {
  std::string text(kKiln);
  // hot/fire: cracked 0.5, hot 0.5 -> cracked 0, hot 1 (an outcome of probability 0), and
  // nothing leads to "cracked" any more.
  ASSERT_TRUE(ReplaceOnce(text, kProbabilities, "[0.75, 0.25, 1.0, 0, 1, 1.0]"));
  ModelDecodeResult result = DecodeModel(text);
  ASSERT_TRUE(result.ok()) << Describe(result.errors);
  EXPECT_TRUE(HasIssue(result.warnings, "/probability/3", "probability 0"))
      << Describe(result.warnings);
}

// A valid document cut anywhere (or with one byte changed) is refused with an error, never a
// crash; only the whole text (up to trailing white space) decodes.
void ExpectRefusedCleanly(const std::string& text, size_t valid_prefix) {
  for (size_t n = 0; n <= text.size(); ++n) {
    const std::string prefix = text.substr(0, n);  // Its own allocation: ends vary in the page.
    ModelDecodeResult result = DecodeModel(prefix);
    if (n >= valid_prefix) {
      EXPECT_TRUE(result.ok()) << n << Describe(result.errors);
    } else {
      EXPECT_FALSE(result.ok()) << "prefix of " << n << " bytes was accepted";
      EXPECT_FALSE(result.errors.empty()) << "prefix of " << n << " bytes";
    }
  }
}

TEST(ModelArraysCodecTest, EveryPrefixOfTheKilnIsRefusedCleanly) {
  const std::string text(kKiln);
  ExpectRefusedCleanly(text, text.find_last_not_of(" \n") + 1);
}

TEST(ModelArraysCodecTest, EveryPrefixOfADemoModelIsRefusedCleanly) {
  const std::vector<std::filesystem::path> examples = Examples();
  ASSERT_FALSE(examples.empty());
  const std::string text = ToArrays<OrderedJson>(ReadFile(examples.front()));
  ExpectRefusedCleanly(text, text.find_last_not_of(" \n") + 1);
}

// Messages quote at most 40 bytes of a token; the cut used to split a UTF-8 sequence, and
// the answer holding the message could not be written as JSON (found by tests/fuzz).
TEST(ModelArraysCodecTest, AQuotedTokenIsNeverCutInsideACharacter) {
  std::string text(kKiln);
  // The quoted token is the raw one, with its opening '"': 39 bytes, then U+00E9 (2 bytes)
  // across the 40-byte cut.
  const std::string format = "mdpserve/model-arrays@2" + std::string(15, 'x') + "\xC3\xA9!";
  ASSERT_TRUE(ReplaceOnce(text, "mdpserve/model-arrays@1", format));
  const ModelDecodeResult result = DecodeModel(text);
  ASSERT_FALSE(result.ok());
  ASSERT_FALSE(result.errors.empty());
  EXPECT_EQ(result.errors[0].pointer, "/format");
  const std::string& message = result.errors[0].message;
  EXPECT_NE(message.find("'\"mdpserve/model-arrays@2" + std::string(15, 'x') + "...'"),
            std::string::npos)
      << message;
  EXPECT_EQ(EscapeInvalidUtf8(message), message);
}

TEST(ModelArraysCodecTest, MangledBytesNeverCrashTheDecoder) {
  const std::string base(kKiln);
  int refused = 0;
  for (size_t at = 0; at < base.size(); ++at) {
    for (char c : std::string_view("\"[]{},:-0e.\\ x\x01\xff")) {
      std::string text = base;
      text[at] = c;
      ModelDecodeResult result = DecodeModel(text);
      if (!result.ok()) {
        ++refused;
        EXPECT_FALSE(result.errors.empty() && result.errors_not_listed == 0) << text;
      }
    }
  }
  EXPECT_GT(refused, 0);
}

}  // namespace
}  // namespace mdp::server
