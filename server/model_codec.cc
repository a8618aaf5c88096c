#include "server/model_codec.h"

#include <algorithm>
#include <array>
#include <cmath>
#include <limits>
#include <string>
#include <unordered_map>
#include <unordered_set>
#include <utility>

#include "server/model_arrays_codec.h"
#include "solver/validate.h"

namespace mdp::server {
namespace {

constexpr size_t kMaxNameLength = 256;
constexpr size_t kMaxModelNameLength = 200;
constexpr size_t kMaxDescriptionLength = 10000;
constexpr size_t kMaxUnitLength = 64;
constexpr double kMissing = std::numeric_limits<double>::quiet_NaN();

// Interns names met as references before (or without) their definition.
class NameTable {
 public:
  int32_t Intern(const std::string& name) {
    auto [it, inserted] = ids_.emplace(name, static_cast<int32_t>(names_.size()));
    if (inserted) names_.push_back(name);
    return it->second;
  }
  const std::string& name(int32_t id) const { return names_[id]; }
  size_t size() const { return names_.size(); }

 private:
  std::unordered_map<std::string, int32_t> ids_;
  std::vector<std::string> names_;
};

std::string TypeName(const Json& v) {
  if (v.is_number()) return "a number";
  if (v.is_string()) return "a string";
  if (v.is_boolean()) return "a boolean";
  if (v.is_null()) return "null";
  if (v.is_array()) return "an array";
  return "an object";
}


class Decoder {
 public:
  explicit Decoder(const DecodeLimits& limits) : limits_(limits) {}

  // Streaming hook: one element of /states. Returns false to stop reading.
  bool OnState(Json&& st, int64_t index) {
    const std::string ptr = "/states/" + std::to_string(index);
    if (index >= limits_.max_states) {
      Error(ptr, "the model has more than " + std::to_string(limits_.max_states) + " states");
      return false;
    }
    if (!st.is_object()) {
      Error(ptr, "a state must be an object, not " + TypeName(st));
      spec_.AddState("", false);
      return true;
    }
    CheckKeys(st, ptr, {"name", "description", "terminal", "actions"});
    std::string name;
    if (const Json* v = Field(st, ptr, "name", true)) ReadName(*v, ptr + "/name", &name);
    bool terminal = false;
    if (const Json* v = Field(st, ptr, "terminal", false)) {
      if (v->is_boolean()) {
        terminal = v->get<bool>();
      } else {
        Error(ptr + "/terminal", "must be true or false, not " + TypeName(*v));
      }
    }
    if (const Json* v = Field(st, ptr, "description", false)) {
      ReadText(*v, ptr + "/description", kMaxDescriptionLength, nullptr);
    }
    const StateId s = spec_.AddState(name, terminal);
    if (!name.empty()) defined_.emplace(name, s);
    if (const Json* actions = Field(st, ptr, "actions", false)) {
      if (!actions->is_array()) {
        Error(ptr + "/actions", "must be an array, not " + TypeName(*actions));
      } else if (static_cast<int64_t>(actions->size()) > limits_.max_actions_per_state) {
        Error(ptr + "/actions", "a state has more than " +
                                    std::to_string(limits_.max_actions_per_state) + " actions");
      } else {
        for (size_t k = 0; k < actions->size(); ++k) {
          if (!ReadStateAction((*actions)[k], ptr + "/actions/" + std::to_string(k))) return false;
        }
      }
    }
    return true;
  }

  void ReadRoot(const Json& root) {
    if (!root.is_object()) {
      Error("", "a model document must be a JSON object, not " + TypeName(root));
      catalogue_ok_ = false;
      return;
    }
    CheckKeys(root, "", {"format", "name", "description", "reward_unit", "objective",
                         "criterion", "actions", "states"});
    ReadFormat(root);
    if (const Json* v = Field(root, "", "name", true)) {
      if (ReadText(*v, "/name", kMaxModelNameLength, &spec_.name) && spec_.name.empty()) {
        Error("/name", "must not be empty");
      }
    }
    if (const Json* v = Field(root, "", "description", false)) {
      ReadText(*v, "/description", kMaxDescriptionLength, &spec_.description);
    }
    if (const Json* v = Field(root, "", "reward_unit", false)) {
      ReadText(*v, "/reward_unit", kMaxUnitLength, &spec_.reward_unit);
    }
    ReadObjective(root);
    ReadCriterion(root);
    ReadCatalogue(root);
    if (const Json* v = Field(root, "", "states", true)) {
      if (!v->is_array()) Error("/states", "must be an array, not " + TypeName(*v));
    }
  }

  // Maps the names met in states to catalogue and state indices.
  void Resolve() {
    ResolveTerminalValues();
    std::unordered_map<std::string_view, ActionId> catalogue;
    for (size_t a = 0; a < spec_.action_names.size(); ++a) {
      catalogue.emplace(spec_.action_names[a], static_cast<ActionId>(a));
    }
    for (StateId s = 0; s < spec_.num_states(); ++s) {
      for (SlotId slot = spec_.state_first_slot[s]; slot < spec_.state_first_slot[s + 1]; ++slot) {
        const std::string slot_ptr = "/states/" + std::to_string(s) + "/actions/" +
                                     std::to_string(slot - spec_.state_first_slot[s]);
        ResolveAction(slot, slot_ptr, catalogue);
        const OutcomeId first = spec_.slot_first_outcome[slot];
        for (OutcomeId o = first; o < spec_.slot_first_outcome[slot + 1]; ++o) {
          const int32_t ref = spec_.outcome_next[o];
          if (ref < 0) continue;
          auto it = defined_.find(next_refs_.name(ref));
          if (it != defined_.end()) {
            spec_.outcome_next[o] = it->second;
            continue;
          }
          spec_.outcome_next[o] = -1;
          Error(slot_ptr + "/outcomes/" + std::to_string(o - first) + "/next",
                "next state '" + next_refs_.name(ref) + "' is not defined");
        }
      }
    }
  }

  bool catalogue_ok() const { return catalogue_ok_; }
  ModelSpec& spec() { return spec_; }
  std::vector<DocumentIssue>& errors() { return errors_; }
  int64_t errors_not_listed() const { return errors_not_listed_; }

  void Error(std::string pointer, std::string message) {
    if (static_cast<int64_t>(errors_.size()) >= limits_.max_errors) {
      ++errors_not_listed_;
      return;
    }
    errors_.push_back({std::move(pointer), std::move(message)});
  }

 private:
  // Returns the member `key` of object `obj`, or null; reports it missing if `required`.
  const Json* Field(const Json& obj, const std::string& ptr, const char* key, bool required) {
    auto it = obj.find(key);
    if (it == obj.end()) {
      if (required) Error(ptr + "/" + key, "required field is missing");
      return nullptr;
    }
    return &*it;
  }

  void CheckKeys(const Json& obj, const std::string& ptr, std::initializer_list<const char*> keys) {
    for (auto it = obj.begin(); it != obj.end(); ++it) {
      const bool known = std::any_of(keys.begin(), keys.end(),
                                     [&](const char* k) { return it.key() == k; });
      if (!known) Error(ptr + "/" + EscapePointerToken(it.key()), "unknown field");
    }
  }

  // Reads a string of at most `max_length` bytes; stores it in *out if given.
  bool ReadText(const Json& v, const std::string& ptr, size_t max_length, std::string* out) {
    if (!v.is_string()) {
      Error(ptr, "must be a string, not " + TypeName(v));
      return false;
    }
    const std::string& s = v.get_ref<const std::string&>();
    if (CodePoints(s) > max_length) {
      Error(ptr, "is longer than " + std::to_string(max_length) + " characters");
      return false;
    }
    if (out != nullptr) *out = s;
    return true;
  }

  // Reads a state or action name: 1..256 characters, no control characters.
  bool ReadName(const Json& v, const std::string& ptr, std::string* out) {
    if (!ReadText(v, ptr, kMaxNameLength, out)) return false;
    if (out->empty()) {
      Error(ptr, "a name must not be empty");
      return false;
    }
    if (HasControlCharacter(*out)) {
      Error(ptr, "a name must not contain control characters");
      out->clear();
      return false;
    }
    return true;
  }

  // Reads a number; reports and returns NaN when it is not one.
  double ReadNumber(const Json& v, const std::string& ptr) {
    if (!v.is_number()) {
      Error(ptr, "must be a number, not " + TypeName(v));
      return kMissing;
    }
    return v.get<double>();
  }

  bool ReadStateAction(const Json& a, const std::string& ptr) {
    if (!a.is_object()) {
      Error(ptr, "a state action must be an object, not " + TypeName(a));
      spec_.AddStateAction(-1, 0.0);
      return true;
    }
    CheckKeys(a, ptr, {"action", "reward", "outcomes"});
    ActionId action = -1;
    if (const Json* v = Field(a, ptr, "action", true)) {
      std::string name;
      if (ReadName(*v, ptr + "/action", &name)) action = action_refs_.Intern(name);
    }
    double reward = 0.0;
    if (const Json* v = Field(a, ptr, "reward", false)) reward = ReadNumber(*v, ptr + "/reward");
    spec_.AddStateAction(action, reward);
    const Json* outcomes = Field(a, ptr, "outcomes", true);
    if (outcomes == nullptr) return true;
    if (!outcomes->is_array()) {
      Error(ptr + "/outcomes", "must be an array, not " + TypeName(*outcomes));
      return true;
    }
    if (static_cast<int64_t>(outcomes->size()) > limits_.max_outcomes_per_action) {
      Error(ptr + "/outcomes", "a state action has more than " +
                                   std::to_string(limits_.max_outcomes_per_action) + " outcomes");
      return true;
    }
    if (spec_.num_outcomes() + static_cast<int64_t>(outcomes->size()) > limits_.max_outcomes) {
      Error(ptr + "/outcomes",
            "the model has more than " + std::to_string(limits_.max_outcomes) + " outcomes");
      return false;
    }
    for (size_t j = 0; j < outcomes->size(); ++j) {
      ReadOutcome((*outcomes)[j], ptr + "/outcomes/" + std::to_string(j));
    }
    return true;
  }

  void ReadOutcome(const Json& o, const std::string& ptr) {
    if (!o.is_object()) {
      Error(ptr, "an outcome must be an object, not " + TypeName(o));
      spec_.AddOutcome(-1, kMissing, 0.0);
      return;
    }
    CheckKeys(o, ptr, {"next", "probability", "reward"});
    int32_t next = -1;
    if (const Json* v = Field(o, ptr, "next", true)) {
      std::string name;
      if (ReadName(*v, ptr + "/next", &name)) next = next_refs_.Intern(name);
    }
    double probability = kMissing;
    if (const Json* v = Field(o, ptr, "probability", true)) {
      probability = ReadNumber(*v, ptr + "/probability");
    }
    double reward = 0.0;
    if (const Json* v = Field(o, ptr, "reward", false)) reward = ReadNumber(*v, ptr + "/reward");
    spec_.AddOutcome(next, probability, reward);
  }

  void ReadFormat(const Json& root) {
    const Json* v = Field(root, "", "format", true);
    if (v == nullptr) return;
    if (!v->is_string()) {
      Error("/format", "must be a string, not " + TypeName(*v));
      return;
    }
    const std::string& f = v->get_ref<const std::string&>();
    if (f == kModelFormat) return;
    if (f.rfind("mdpserve/model@", 0) == 0) {
      Error("/format", "unsupported model format version '" + f + "'; this build reads " +
                           std::string(kModelFormat));
    } else {
      Error("/format", "must be '" + std::string(kModelFormat) + "'");
    }
  }

  void ReadObjective(const Json& root) {
    const Json* v = Field(root, "", "objective", true);
    if (v == nullptr) return;
    if (v->is_string() && *v == "maximize") {
      spec_.objective = Objective::kMaximize;
    } else if (v->is_string() && *v == "minimize") {
      spec_.objective = Objective::kMinimize;
    } else {
      Error("/objective", "must be \"maximize\" or \"minimize\"");
    }
  }

  void ReadCriterion(const Json& root) {
    const Json* c = Field(root, "", "criterion", true);
    if (c == nullptr) return;
    if (!c->is_object()) {
      Error("/criterion", "must be an object, not " + TypeName(*c));
      return;
    }
    const Json* kind = Field(*c, "/criterion", "kind", true);
    if (kind == nullptr) return;
    if (!kind->is_string()) {
      Error("/criterion/kind", "must be a string, not " + TypeName(*kind));
      return;
    }
    const std::string& k = kind->get_ref<const std::string&>();
    Criterion& criterion = spec_.criterion;
    if (k == "discounted") {
      CheckKeys(*c, "/criterion", {"kind", "discount"});
      criterion.kind = CriterionKind::kDiscounted;
      ReadDiscount(*c, /*required=*/true);
    } else if (k == "average") {
      CheckKeys(*c, "/criterion", {"kind"});
      criterion.kind = CriterionKind::kAverage;
      criterion.discount = 1.0;
    } else if (k == "total") {
      CheckKeys(*c, "/criterion", {"kind"});
      criterion.kind = CriterionKind::kTotal;
      criterion.discount = 1.0;
    } else if (k == "finite_horizon") {
      CheckKeys(*c, "/criterion", {"kind", "horizon", "discount", "terminal_values"});
      criterion.kind = CriterionKind::kFiniteHorizon;
      criterion.discount = 1.0;
      ReadDiscount(*c, /*required=*/false);
      ReadHorizon(*c);
      if (const Json* v = Field(*c, "/criterion", "terminal_values", false)) ReadTerminalValues(*v);
    } else {
      Error("/criterion/kind", "unknown criterion '" + k +
                                   "'; expected 'discounted', 'average', 'finite_horizon' or "
                                   "'total'");
    }
  }

  void ReadDiscount(const Json& c, bool required) {
    const Json* g = Field(c, "/criterion", "discount", required);
    if (g == nullptr) {
      discount_unreadable_ = required;
      return;
    }
    const double discount = ReadNumber(*g, "/criterion/discount");
    spec_.criterion.discount = std::isnan(discount) ? 0.0 : discount;
    if (std::isnan(discount)) discount_unreadable_ = true;
  }

  void ReadHorizon(const Json& c) {
    spec_.criterion.horizon = 1;  // A placeholder where it cannot be read (reported here).
    const Json* h = Field(c, "/criterion", "horizon", true);
    if (h == nullptr) return;
    const double horizon = ReadNumber(*h, "/criterion/horizon");
    if (std::isnan(horizon)) return;
    if (horizon != std::floor(horizon)) {
      Error("/criterion/horizon", "must be a whole number of periods");
      return;
    }
    // Out-of-range values are left for the validator, clamped so the cast is defined.
    spec_.criterion.horizon =
        static_cast<int64_t>(std::clamp(horizon, -1.0, static_cast<double>(kMaxHorizon) + 1));
  }

  // Keeps the named values until every state is known (Resolve maps them to indices).
  void ReadTerminalValues(const Json& v) {
    if (!v.is_object()) {
      Error("/criterion/terminal_values", "must be an object mapping state names to numbers, not " +
                                              TypeName(v));
      return;
    }
    for (auto it = v.begin(); it != v.end(); ++it) {
      const std::string ptr = "/criterion/terminal_values/" + EscapePointerToken(it.key());
      const double value = ReadNumber(it.value(), ptr);
      pending_terminal_values_.emplace_back(it.key(), std::isnan(value) ? 0.0 : value);
    }
    has_terminal_values_ = true;
  }

  void ResolveTerminalValues() {
    if (!has_terminal_values_) return;
    spec_.criterion.terminal_values.assign(spec_.state_names.size(), 0.0);
    for (const auto& [name, value] : pending_terminal_values_) {
      auto it = defined_.find(name);
      if (it == defined_.end()) {
        Error("/criterion/terminal_values/" + EscapePointerToken(name),
              "state '" + name + "' is not defined");
        continue;
      }
      spec_.criterion.terminal_values[it->second] = value;
    }
  }

  void ReadCatalogue(const Json& root) {
    const Json* v = Field(root, "", "actions", true);
    if (v == nullptr || !v->is_array()) {
      if (v != nullptr) Error("/actions", "must be an array, not " + TypeName(*v));
      catalogue_ok_ = false;
      return;
    }
    if (static_cast<int64_t>(v->size()) > limits_.max_catalogue) {
      Error("/actions", "more than " + std::to_string(limits_.max_catalogue) + " actions");
      catalogue_ok_ = false;
      return;
    }
    for (size_t a = 0; a < v->size(); ++a) {
      std::string name;
      if (!ReadName((*v)[a], "/actions/" + std::to_string(a), &name)) catalogue_ok_ = false;
      spec_.action_names.push_back(std::move(name));
    }
  }

  void ResolveAction(SlotId slot, const std::string& slot_ptr,
                     const std::unordered_map<std::string_view, ActionId>& catalogue) {
    const int32_t ref = spec_.slot_action[slot];
    if (ref < 0) return;
    auto it = catalogue.find(action_refs_.name(ref));
    if (it != catalogue.end()) {
      spec_.slot_action[slot] = it->second;
      return;
    }
    spec_.slot_action[slot] = -1;
    if (catalogue_ok_) {
      Error(slot_ptr + "/action",
            "action '" + action_refs_.name(ref) + "' is not in the model's action list");
    }
  }

 public:
  bool discount_unreadable() const { return discount_unreadable_; }

 private:
  const DecodeLimits& limits_;
  ModelSpec spec_;
  std::unordered_map<std::string, StateId> defined_;
  NameTable next_refs_;
  NameTable action_refs_;
  bool catalogue_ok_ = true;
  bool discount_unreadable_ = false;
  bool has_terminal_values_ = false;
  std::vector<std::pair<std::string, double>> pending_terminal_values_;
  std::vector<DocumentIssue> errors_;
  int64_t errors_not_listed_ = 0;
};

std::string LocationPointer(const ModelSpec& spec, const Location& where) {
  using F = Location::Field;
  const std::string state = "/states/" + std::to_string(where.state);
  const std::string slot = state + "/actions/" + std::to_string(where.slot);
  const std::string outcome = slot + "/outcomes/" + std::to_string(where.outcome);
  switch (where.field) {
    case F::kModel: return "";
    case F::kDiscount: return "/criterion/discount";
    case F::kCriterion: return "/criterion";
    case F::kHorizon: return "/criterion/horizon";
    case F::kTerminalValue:
      return "/criterion/terminal_values/" + EscapePointerToken(spec.state_names[where.state]);
    case F::kStates: return "/states";
    case F::kCatalogue: return "/actions";
    case F::kCatalogueEntry: return "/actions/" + std::to_string(where.action);
    case F::kState: return state;
    case F::kStateName: return state + "/name";
    case F::kStateActions: return state + "/actions";
    case F::kSlotAction: return slot + "/action";
    case F::kSlotReward: return slot + "/reward";
    case F::kSlotOutcomes: return slot + "/outcomes";
    case F::kOutcomeNext: return outcome + "/next";
    case F::kOutcomeProbability: return outcome + "/probability";
    case F::kOutcomeReward: return outcome + "/reward";
  }
  return "";
}

// True iff `pointer` or one of its ancestors (other than the whole document) already has a
// decoder error: the validator's finding there would repeat it.
bool AlreadyReported(const std::string& pointer, const std::unordered_set<std::string>& seen) {
  std::string p = pointer;
  while (!p.empty()) {
    if (seen.count(p)) return true;
    p.resize(p.rfind('/'));
  }
  return false;
}

SpecDecodeResult DecodeSpecWith(std::string_view text, const DecodeLimits& limits,
                                Decoder& decoder) {
  JsonReadOptions read;
  read.max_depth = limits.max_depth;
  read.max_array_items = std::max({limits.max_catalogue, limits.max_actions_per_state,
                                   limits.max_outcomes_per_action});
  read.stream_member = "states";
  read.max_streamed_items = limits.max_states + 1;
  read.on_element = [&decoder](Json&& st, int64_t i) {
    return decoder.OnState(std::move(st), i);
  };
  JsonReadResult parsed = ReadJson(text, read);
  SpecDecodeResult out;
  if (!parsed.errors.empty()) {
    // A document that cannot be read completely yields the reader's error and whatever the
    // decoder had found before it (e.g. the size cap that stopped reading).
    for (auto& e : parsed.errors) {
      if (e.message != "reading stopped") decoder.Error(e.pointer, e.message);
    }
    out.errors = std::move(decoder.errors());
    out.errors_not_listed = decoder.errors_not_listed();
    out.malformed = parsed.malformed;
    return out;
  }
  decoder.ReadRoot(parsed.root);
  decoder.Resolve();
  out.spec = std::move(decoder.spec());
  out.errors = std::move(decoder.errors());
  out.errors_not_listed = decoder.errors_not_listed();
  return out;
}


// True iff the validator's finding is about a placeholder the decoder left where it had
// already reported a problem (JSON cannot express NaN, and names and indices the decoder
// could not read are left empty or -1), or lies inside a place already reported.
bool RepeatsDecoderError(const ModelSpec& spec, const Finding& f,
                         const std::unordered_set<std::string>& reported, bool catalogue_ok,
                         bool discount_unreadable) {
  using F = Location::Field;
  const Location& w = f.where;
  auto outcome = [&]() { return spec.slot_first_outcome[spec.state_first_slot[w.state] + w.slot] + w.outcome; };
  auto slot = [&]() { return spec.state_first_slot[w.state] + w.slot; };
  switch (w.field) {
    case F::kOutcomeProbability:
      if (std::isnan(spec.outcome_probability[outcome()])) return true;
      break;
    case F::kOutcomeReward:
      if (std::isnan(spec.outcome_reward[outcome()])) return true;
      break;
    case F::kOutcomeNext:
      if (spec.outcome_next[outcome()] < 0) return true;
      break;
    case F::kSlotReward:
      if (std::isnan(spec.slot_reward[slot()])) return true;
      break;
    case F::kSlotAction:
      if (spec.slot_action[slot()] < 0 || !catalogue_ok) return true;
      break;
    case F::kStateName:
      if (spec.state_names[w.state].empty()) return true;
      break;
    case F::kCatalogueEntry:
      if (spec.action_names[w.action].empty()) return true;
      break;
    case F::kDiscount:
      if (discount_unreadable) return true;
      break;
    default:
      break;
  }
  return AlreadyReported(LocationPointer(spec, w), reported);
}

}  // namespace

// Number of Unicode code points in UTF-8 text (bytes that do not continue a sequence).
size_t CodePoints(std::string_view s) {
  return static_cast<size_t>(std::count_if(
      s.begin(), s.end(), [](char c) { return (static_cast<unsigned char>(c) & 0xC0) != 0x80; }));
}

// True iff `s` holds a C0 or C1 control character (U+0000..U+001F, U+007F..U+009F).
bool HasControlCharacter(std::string_view s) {
  for (size_t i = 0; i < s.size(); ++i) {
    const auto c = static_cast<unsigned char>(s[i]);
    if (c < 0x20 || c == 0x7f) return true;
    if (c == 0xC2 && i + 1 < s.size()) {
      const auto next = static_cast<unsigned char>(s[i + 1]);
      if (next >= 0x80 && next <= 0x9F) return true;
    }
  }
  return false;
}

SpecDecodeResult DecodeModelSpec(std::string_view text, const DecodeLimits& limits) {
  if (IsArraysModelDocument(text)) return DecodeArraysModelSpec(text, limits);
  Decoder decoder(limits);
  return DecodeSpecWith(text, limits, decoder);
}

ModelDecodeResult DecodeModel(std::string_view text, const DecodeLimits& limits,
                              const TextReleased& released) {
  // The compact encoding (api-schema/model-arrays.schema.json) is told by its `format`.
  if (IsArraysModelDocument(text)) return DecodeArraysModel(text, limits, released);
  ModelDecodeResult out;
  if (text.find_first_not_of(" \t\r\n") == std::string_view::npos) {
    out.errors.push_back({"", "the document is empty"});
    return out;
  }
  Decoder decoder(limits);
  SpecDecodeResult decoded = DecodeSpecWith(text, limits, decoder);
  if (released) released();  // The spec holds copies of everything it needs.
  out.errors = std::move(decoded.errors);
  out.errors_not_listed = decoded.errors_not_listed;
  out.malformed = decoded.malformed;
  const bool readable = out.errors.empty() || !decoded.spec.state_names.empty() ||
                        !decoded.spec.action_names.empty();
  std::optional<ValidSpecProof> proof;
  if (readable) {
    std::unordered_set<std::string> reported;
    for (const auto& e : out.errors) reported.insert(e.pointer);
    ValidateOptions options;
    options.max_errors = std::max<int64_t>(0, limits.max_errors - static_cast<int64_t>(out.errors.size()));
    options.max_warnings = limits.max_warnings;
    const ModelSpec& spec = decoded.spec;
    options.skip = [&](const Finding& f) {
      return f.severity == Finding::Severity::kError &&
             RepeatsDecoderError(spec, f, reported, decoder.catalogue_ok(),
                                 decoder.discount_unreadable());
    };
    ValidationReport report = Validate(spec, options);
    for (const Finding& f : report.errors) out.errors.push_back({LocationPointer(spec, f.where), f.message});
    out.errors_not_listed += report.errors_not_listed;
    for (const Finding& f : report.warnings) {
      out.warnings.push_back({LocationPointer(spec, f.where), f.message});
    }
    out.warnings_not_listed = report.warnings_not_listed;
    proof = std::move(report.proof);
  }
  if (!out.errors.empty() || out.errors_not_listed > 0) return out;
  // Compiles without validating again when Validate() just found no error at all.
  Result<Model> model = proof ? BuildModel(decoded.spec, *proof) : BuildModel(decoded.spec);
  if (!model.ok()) {
    out.errors.push_back({"", model.status().message()});
    return out;
  }
  out.model = std::move(*model);
  out.spec = std::move(decoded.spec);
  return out;
}

}  // namespace mdp::server
