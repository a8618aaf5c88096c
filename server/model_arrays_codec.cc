#include "server/model_arrays_codec.h"

#include <simdjson.h>

#include <algorithm>
#include <array>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <limits>
#include <new>
#include <optional>
#include <string>
#include <unordered_map>
#include <unordered_set>
#include <utility>
#include <vector>

#include "solver/validate.h"

namespace mdp::server {
namespace {

namespace od = simdjson::ondemand;
using simdjson::error_code;
using simdjson::SUCCESS;

constexpr size_t kMaxNameLength = 256;
constexpr size_t kMaxDescriptionLength = 10000;
constexpr double kUnread = std::numeric_limits<double>::quiet_NaN();
constexpr int64_t kMaxIndex = std::numeric_limits<int32_t>::max();
constexpr std::string_view kArraysFormatFamily = "mdpserve/model-arrays@";

// ---------------------------------------------------------------------------------------------
// Detection: a scan of the top-level object that stops at its "format" member.

class FormatScanner {
 public:
  explicit FormatScanner(std::string_view text) : text_(text) {}

  // The raw text of the root's "format" string (escapes undecoded), or nullopt.
  std::optional<std::string> Format() {
    SkipSpace();
    if (!Take('{')) return std::nullopt;
    while (true) {
      SkipSpace();
      std::string_view key;
      if (!String(&key)) return std::nullopt;
      SkipSpace();
      if (!Take(':')) return std::nullopt;
      SkipSpace();
      if (Unescaped(key) == "format") {
        std::string_view value;
        if (!String(&value)) return std::nullopt;
        return Unescaped(value);
      }
      if (!SkipValue()) return std::nullopt;
      SkipSpace();
      if (!Take(',')) return std::nullopt;
    }
  }

 private:
  void SkipSpace() {
    while (pos_ < text_.size() && (text_[pos_] == ' ' || text_[pos_] == '\t' ||
                                   text_[pos_] == '\n' || text_[pos_] == '\r')) {
      ++pos_;
    }
  }
  bool Take(char c) {
    if (pos_ >= text_.size() || text_[pos_] != c) return false;
    ++pos_;
    return true;
  }
  // Reads a string literal; *raw is its content between the quotes.
  bool String(std::string_view* raw) {
    if (!Take('"')) return false;
    const size_t begin = pos_;
    while (pos_ < text_.size()) {
      const void* quote = std::memchr(text_.data() + pos_, '"', text_.size() - pos_);
      if (quote == nullptr) return false;
      size_t at = static_cast<const char*>(quote) - text_.data();
      size_t backslashes = 0;
      while (at - backslashes > begin && text_[at - backslashes - 1] == '\\') ++backslashes;
      pos_ = at + 1;
      if (backslashes % 2 == 0) {
        *raw = text_.substr(begin, at - begin);
        return true;
      }
    }
    return false;
  }
  // Skips one value of any kind (brackets counted, strings skipped whole).
  bool SkipValue() {
    int64_t depth = 0;
    while (pos_ < text_.size()) {
      const char c = text_[pos_];
      if (c == '"') {
        std::string_view ignored;
        if (!String(&ignored)) return false;
        if (depth == 0) return true;
      } else if (c == '[' || c == '{') {
        ++depth;
        ++pos_;
      } else if (c == ']' || c == '}') {
        if (depth == 0) return true;  // The end of the root object: a scalar ended here.
        ++pos_;
        if (--depth == 0) return true;
      } else if (depth == 0 && (c == ',' || c == ' ' || c == '\t' || c == '\n' || c == '\r')) {
        return true;
      } else {
        ++pos_;
      }
    }
    return false;
  }
  // Decodes JSON escapes of a short string; longer or undecodable text is returned as is.
  static std::string Unescaped(std::string_view raw) {
    if (raw.find('\\') == std::string_view::npos || raw.size() > 1024) return std::string(raw);
    Json decoded = Json::parse("\"" + std::string(raw) + "\"", nullptr, false);
    return decoded.is_string() ? decoded.get<std::string>() : std::string(raw);
  }

  std::string_view text_;
  size_t pos_ = 0;
};

// ---------------------------------------------------------------------------------------------
// The members of an arrays document.

// clang-format off
// In kMemberNames order: the header, then the columns per state, per row, per outcome.
enum class Member {
  kFormat, kName, kDescription, kRewardUnit, kObjective, kCriterion, kActions,
  kStates, kStateDescriptions, kTerminal,
  kSaState, kSaAction, kSaReward, kSaOutcomes,
  kNext, kProbability, kReward,
};
// clang-format on
constexpr int kMemberCount = 17;
constexpr std::array<std::string_view, kMemberCount> kMemberNames = {
    "format",      "name",      "description", "reward_unit",        "objective",
    "criterion",   "actions",   "states",      "state_descriptions", "terminal",
    "sa_state",    "sa_action", "sa_reward",   "sa_outcomes",        "next",
    "probability", "reward"};

int Index(Member m) { return static_cast<int>(m); }
std::string_view NameOf(Member m) { return kMemberNames[Index(m)]; }

std::optional<Member> MemberNamed(std::string_view key) {
  for (int i = 0; i < kMemberCount; ++i) {
    if (kMemberNames[i] == key) return static_cast<Member>(i);
  }
  return std::nullopt;
}

std::string Pointer(Member m) { return "/" + std::string(NameOf(m)); }
std::string Pointer(Member m, int64_t index) { return Pointer(m) + "/" + std::to_string(index); }

std::string JsonTypeName(od::json_type type) {
  switch (type) {
    case od::json_type::array:
      return "an array";
    case od::json_type::object:
      return "an object";
    case od::json_type::number:
      return "a number";
    case od::json_type::string:
      return "a string";
    case od::json_type::boolean:
      return "a boolean";
    case od::json_type::null:
      return "null";
  }
  return "a value";
}

std::string NlohmannTypeName(const Json& v) {
  if (v.is_number()) return "a number";
  if (v.is_string()) return "a string";
  if (v.is_boolean()) return "a boolean";
  if (v.is_null()) return "null";
  if (v.is_array()) return "an array";
  return "an object";
}

// Plain words for simdjson's errors on malformed text.
std::string SyntaxProblem(error_code e) {
  switch (e) {
    case simdjson::TAPE_ERROR:
      return "unexpected character, or a missing comma, colon or bracket";
    case simdjson::INCOMPLETE_ARRAY_OR_OBJECT:
      return "brackets do not balance (an array or object is not closed), or something "
             "follows the root object's closing '}'";
    case simdjson::UNCLOSED_STRING:
      return "a string is not closed";
    case simdjson::UTF8_ERROR:
      return "the text is not valid UTF-8";
    case simdjson::STRING_ERROR:
      return "a string has an invalid escape sequence";
    case simdjson::UNESCAPED_CHARS:
      return "a string contains an unescaped control character";
    case simdjson::DEPTH_ERROR:
      return "nesting is too deep";
    case simdjson::EMPTY:
      return "the document is empty";
    case simdjson::N_ATOM_ERROR:
    case simdjson::T_ATOM_ERROR:
    case simdjson::F_ATOM_ERROR:
      return "invalid literal";
    case simdjson::NUMBER_ERROR:
      return "invalid number";
    default:
      return simdjson::error_message(e);
  }
}

// "line L, column C" (1-based) of byte `offset` in `text`.
std::string LineColumn(std::string_view text, size_t offset) {
  offset = std::min(offset, text.size());
  const int64_t line = 1 + std::count(text.begin(), text.begin() + offset, '\n');
  const size_t line_start = text.rfind('\n', offset == 0 ? 0 : offset - 1);
  const size_t column =
      line_start == std::string_view::npos || offset == 0 ? offset + 1 : offset - line_start;
  return "line " + std::to_string(line) + ", column " + std::to_string(column);
}

// Rewrites "at line L, column C" in a message about `piece` (a copy of text[offset...] behind
// `prefix_size` bytes of wrapping) as the position in `text`.
std::string RebaseLocation(std::string message, std::string_view text, size_t offset,
                           size_t prefix_size) {
  const size_t at = message.find("at line ");
  if (at == std::string::npos) return message;
  size_t line = 0, column = 0;
  int consumed = 0;
  if (std::sscanf(message.c_str() + at, "at line %zu, column %zu%n", &line, &column, &consumed) !=
          2 ||
      line == 0) {
    return message;
  }
  size_t absolute = offset;  // Walk the piece's lines over the text itself.
  for (size_t l = 1; l < line; ++l) absolute = text.find('\n', absolute) + 1;
  absolute += line == 1 ? column - std::min(column, prefix_size + 1) : column - 1;
  return message.replace(at, static_cast<size_t>(consumed), "at " + LineColumn(text, absolute));
}

// True iff `token` is a number as JSON's grammar writes one.
bool IsJsonNumberSyntax(std::string_view token) {
  size_t i = 0;
  auto digits = [&]() {
    const size_t start = i;
    while (i < token.size() && token[i] >= '0' && token[i] <= '9') ++i;
    return i > start;
  };
  if (i < token.size() && token[i] == '-') ++i;
  if (i < token.size() && token[i] == '0') {
    ++i;
  } else if (!digits()) {
    return false;
  }
  if (i < token.size() && token[i] == '.') {
    ++i;
    if (!digits()) return false;
  }
  if (i < token.size() && (token[i] == 'e' || token[i] == 'E')) {
    ++i;
    if (i < token.size() && (token[i] == '+' || token[i] == '-')) ++i;
    if (!digits()) return false;
  }
  return i == token.size();
}

std::string_view Trimmed(std::string_view token) {
  while (!token.empty() && std::strchr(" \t\r\n", token.back()) != nullptr) token.remove_suffix(1);
  return token;
}

// The first 40 bytes of a token, quoted; a cut never splits a UTF-8 sequence (the `format`
// string is quoted too, and a split sequence made the answer invalid JSON).
std::string Quoted(std::string_view token) {
  size_t keep = std::min<size_t>(token.size(), 40);
  const auto continuation = [&](size_t i) {
    return (static_cast<unsigned char>(token[i]) & 0xC0) == 0x80;
  };
  while (keep > 0 && keep < token.size() && continuation(keep)) --keep;
  return "'" + std::string(token.substr(0, keep)) + (keep < token.size() ? "...'" : "'");
}

// ---------------------------------------------------------------------------------------------
// The decoder: reads every member with simdjson, then checks how the arrays fit together and
// fills the ModelSpec. Header members are decoded by the object decoder's own rules.

class ArraysDecoder {
 public:
  explicit ArraysDecoder(const DecodeLimits& limits) : limits_(limits) {}

  // Reads the document iterated from `buffer`; false iff reading stopped (malformed text, a
  // size cap, a duplicate key). Positions in messages are offsets into `buffer`.
  bool Read(od::document& doc, std::string_view buffer);
  // Decodes the header members, checks lengths and indices and fills the spec; false iff
  // a header member stopped reading. REQUIRES: Read() returned true, `buffer` still alive.
  bool Assemble();

  ModelSpec& spec() { return spec_; }
  std::vector<DocumentIssue>& errors() { return errors_; }
  int64_t errors_not_listed() const { return errors_not_listed_; }
  bool malformed() const { return malformed_; }
  bool shape_ok() const { return shape_ok_; }
  bool catalogue_ok() const { return catalogue_ok_; }

  void Error(std::string pointer, std::string message) {
    if (static_cast<int64_t>(errors_.size()) >= limits_.max_errors) {
      ++errors_not_listed_;
      return;
    }
    errors_.push_back({std::move(pointer), std::move(message)});
  }

 private:
  // Reports an element's problem; builds the message only when it will be listed.
  template <typename MakeMessage>
  void ElementError(Member m, int64_t index, MakeMessage make_message) {
    if (static_cast<int64_t>(errors_.size()) >= limits_.max_errors) {
      ++errors_not_listed_;
      return;
    }
    errors_.push_back({Pointer(m, index), make_message()});
  }

  bool Stop(std::string pointer, std::string message) {
    Error(std::move(pointer), std::move(message));
    return false;
  }

  bool Malformed(error_code e, std::string pointer) {
    malformed_ = true;
    std::string where;
    const char* at = nullptr;
    // Errors found before iterating (unbalanced brackets) stand at offset 0: not a location.
    if (doc_ != nullptr && doc_->current_location().get(at) == SUCCESS && at > text_.data() &&
        at <= text_.data() + text_.size()) {
      where = " at " + LineColumn(text_, static_cast<size_t>(at - text_.data()));
    }
    return Stop(std::move(pointer), "malformed JSON" + where + ": " + SyntaxProblem(e));
  }

  bool ReadMember(std::string_view key, od::value& value);
  bool CaptureHeader(Member m, od::value& value);
  bool ReadStates(od::value& value);
  bool ReadStateDescriptions(od::value& value);
  bool ReadIndices(Member m, od::value& value, int64_t cap, std::vector<int32_t>& out);
  bool ReadCounts(od::value& value);
  bool ReadNumbers(Member m, od::value& value, int64_t cap, std::vector<double>& out);

  template <typename Column, typename ReadElement>
  bool ForEachElement(Member m, od::value& value, int64_t cap, Column& column, ReadElement read);
  size_t SizeHint(Member m) const;
  double BadNumber(Member m, int64_t index, od::value& item);
  int64_t BadIndex(Member m, int64_t index, od::value& item);
  bool TypeError(Member m, int64_t index, od::value& item, std::string_view expected);

  bool DecodeHeader();
  Json TakeTerminalValues(Json& criterion);
  void ResolveTerminalValues(const Json& terminal_values);
  bool ColumnsPresent();
  void CheckLength(Member m, size_t size, Member reference, size_t expected, const char* per);
  void CheckStateIndices();
  void CheckTerminals();
  void CheckRowIndices();
  void CheckCounts();
  void Build();

  std::string_view text_;
  const DecodeLimits& limits_;
  od::document* doc_ = nullptr;
  ModelSpec spec_;
  std::array<bool, kMemberCount> seen_{};
  std::array<bool, kMemberCount> read_ok_{};  // Present and an array (columns) or captured.
  std::array<std::string_view, kMemberCount> header_text_{};
  int64_t state_descriptions_ = 0;
  std::vector<int32_t> terminal_;
  std::vector<int32_t> sa_state_;
  std::vector<int64_t> sa_outcomes_;
  bool malformed_ = false;
  bool shape_ok_ = true;
  bool catalogue_ok_ = true;
  std::vector<DocumentIssue> errors_;
  int64_t errors_not_listed_ = 0;
};

bool ArraysDecoder::Read(od::document& doc, std::string_view buffer) {
  text_ = buffer;
  doc_ = &doc;
  od::object root;
  error_code e = doc.get_object().get(root);
  if (e == simdjson::INCORRECT_TYPE) {
    od::json_type type{};
    const std::string kind = doc.type().get(type) == SUCCESS ? JsonTypeName(type) : "a scalar";
    return Stop("", "a model document must be a JSON object, not " + kind);
  }
  if (e) return Malformed(e, "");
  for (auto field : root) {
    std::string_view key;
    if ((e = field.unescaped_key().get(key))) return Malformed(e, "");
    od::value value;
    if ((e = field.value().get(value))) return Malformed(e, "/" + EscapePointerToken(key));
    if (!ReadMember(key, value)) return false;
  }
  doc_ = nullptr;  // Locations of later findings are not the iterator's.
  const char* rest = nullptr;
  if (doc.current_location().get(rest) == SUCCESS) {
    malformed_ = true;
    return Stop("", "malformed JSON at " + LineColumn(text_, rest - text_.data()) +
                        ": content after the end of the document");
  }
  return true;
}

bool ArraysDecoder::ReadMember(std::string_view key, od::value& value) {
  const std::optional<Member> m = MemberNamed(key);
  if (!m) {
    Error("/" + EscapePointerToken(key), "unknown field");
    return true;  // simdjson skips the value.
  }
  if (seen_[Index(*m)]) return Stop(Pointer(*m), "duplicate key '" + std::string(key) + "'");
  seen_[Index(*m)] = true;
  const int64_t slot_cap = limits_.max_outcomes;  // Each state action has an outcome.
  switch (*m) {
    case Member::kStates:
      return ReadStates(value);
    case Member::kStateDescriptions:
      return ReadStateDescriptions(value);
    case Member::kTerminal:
      return ReadIndices(*m, value, limits_.max_states, terminal_);
    case Member::kSaState:
      return ReadIndices(*m, value, slot_cap, sa_state_);
    case Member::kSaAction:
      return ReadIndices(*m, value, slot_cap, spec_.slot_action);
    case Member::kSaReward:
      return ReadNumbers(*m, value, slot_cap, spec_.slot_reward);
    case Member::kSaOutcomes:
      return ReadCounts(value);
    case Member::kNext:
      return ReadIndices(*m, value, limits_.max_outcomes, spec_.outcome_next);
    case Member::kProbability:
      return ReadNumbers(*m, value, limits_.max_outcomes, spec_.outcome_probability);
    case Member::kReward:
      return ReadNumbers(*m, value, limits_.max_outcomes, spec_.outcome_reward);
    default:
      return CaptureHeader(*m, value);
  }
}

// Keeps the text of a header member; DecodeHeader() reads it once the document is read.
bool ArraysDecoder::CaptureHeader(Member m, od::value& value) {
  od::json_type type{};
  error_code e = value.type().get(type);
  std::string_view raw;
  if (!e && type == od::json_type::array) {
    od::array array;
    if (!(e = value.get_array().get(array))) e = array.raw_json().get(raw);
  } else if (!e && type == od::json_type::object) {
    od::object object;
    if (!(e = value.get_object().get(object))) e = object.raw_json().get(raw);
  } else if (!e) {
    raw = value.raw_json_token();
  }
  if (e) return Malformed(e, Pointer(m));
  header_text_[Index(m)] = raw;
  read_ok_[Index(m)] = true;
  return true;
}

// What exceeding the length cap of member `m` means.
std::string CapMessage(Member m, int64_t cap) {
  const std::string limit = " more than " + std::to_string(cap);
  switch (m) {
    case Member::kStates:
    case Member::kStateDescriptions:
    case Member::kTerminal:
      return "the model has" + limit + " states";
    case Member::kNext:
    case Member::kProbability:
    case Member::kReward:
      return "the model has" + limit + " outcomes";
    default:
      return "the model has" + limit + " state actions (each has an outcome)";
  }
}

// Calls read(item, index) for every element of the array `value`, member `m`, which fill
// `column`; stops reading the document at element `cap` (a size cap). Returns false iff
// reading stopped.
template <typename Column, typename ReadElement>
bool ArraysDecoder::ForEachElement(Member m, od::value& value, int64_t cap, Column& column,
                                   ReadElement read) {
  od::array array;
  error_code e = value.get_array().get(array);
  if (e == simdjson::INCORRECT_TYPE) {
    od::json_type type{};
    if ((e = value.type().get(type))) return Malformed(e, Pointer(m));
    Error(Pointer(m), "must be an array, not " + JsonTypeName(type));
    return true;
  }
  if (e) return Malformed(e, Pointer(m));
  // A column of the same group read before gives the length to expect: sizing the column
  // once saves copying and page-faulting about twice its size while it grows. (Counting the
  // elements first would cost about as much as the growth it saves.)
  column.reserve(std::min(SizeHint(m), static_cast<size_t>(cap)));
  int64_t index = 0;
  for (auto element : array) {
    od::value item;
    if ((e = element.get(item))) return Malformed(e, Pointer(m, index));
    if (index >= cap) return Stop(Pointer(m, index), CapMessage(m, cap));
    if (!read(item, index)) return false;
    ++index;
  }
  read_ok_[Index(m)] = true;
  return true;
}

// The longest column read so far among those that must have as many items as `m`'s.
size_t ArraysDecoder::SizeHint(Member m) const {
  switch (m) {
    case Member::kStates:
    case Member::kStateDescriptions:
      return std::max(spec_.state_names.size(), static_cast<size_t>(state_descriptions_));
    case Member::kSaState:
    case Member::kSaAction:
    case Member::kSaReward:
    case Member::kSaOutcomes:
      return std::max({sa_state_.size(), spec_.slot_action.size(), spec_.slot_reward.size(),
                       sa_outcomes_.size()});
    case Member::kNext:
    case Member::kProbability:
    case Member::kReward:
      return std::max({spec_.outcome_next.size(), spec_.outcome_probability.size(),
                       spec_.outcome_reward.size()});
    default:
      return 0;
  }
}

// Reports an element that is not of the expected type; false iff its text is malformed.
bool ArraysDecoder::TypeError(Member m, int64_t index, od::value& item, std::string_view expected) {
  od::json_type type{};
  if (error_code e = item.type().get(type)) return Malformed(e, Pointer(m, index));
  const std::string_view token = Trimmed(item.raw_json_token());
  const bool bad_literal =
      (type == od::json_type::boolean && token != "true" && token != "false") ||
      (type == od::json_type::null && token != "null");
  if (bad_literal) return Malformed(simdjson::T_ATOM_ERROR, Pointer(m, index));
  if (type == od::json_type::number && !IsJsonNumberSyntax(token)) {
    return Malformed(simdjson::NUMBER_ERROR, Pointer(m, index));
  }
  ElementError(m, index,
               [&] { return "must be " + std::string(expected) + ", not " + JsonTypeName(type); });
  return true;
}

// The slow path of a number element: reports it and returns NaN (which Validate would
// otherwise report again; DecodeArraysModel skips findings at reported pointers).
double ArraysDecoder::BadNumber(Member m, int64_t index, od::value& item) {
  od::json_type type{};
  if (error_code e = item.type().get(type)) {
    Malformed(e, Pointer(m, index));
    return kUnread;
  }
  if (type != od::json_type::number) {
    TypeError(m, index, item, "a number");
    return kUnread;
  }
  const std::string_view token = Trimmed(item.raw_json_token());
  if (!IsJsonNumberSyntax(token)) {
    Malformed(simdjson::NUMBER_ERROR, Pointer(m, index));
    return kUnread;
  }
  ElementError(m, index, [&] {
    return "must be a finite number; " + Quoted(token) + " is too large for a double";
  });
  return kUnread;
}

// The slow path of an index element: a number with a zero fraction ("3.0") is an index too.
// Returns the index, or -1 after reporting why it is not one.
int64_t ArraysDecoder::BadIndex(Member m, int64_t index, od::value& item) {
  double d = 0;
  if (item.get_double().get(d) != SUCCESS) {
    BadNumber(m, index, item);
    return -1;
  }
  if (d < 0) {
    ElementError(m, index, [&] {
      return "must not be negative, got " + Quoted(Trimmed(item.raw_json_token()));
    });
  } else if (d != std::floor(d)) {
    ElementError(m, index, [&] {
      return "must be a whole number (an index), got " + Quoted(Trimmed(item.raw_json_token()));
    });
  } else if (d > static_cast<double>(kMaxIndex)) {
    ElementError(m, index, [&] {
      return "index " + Quoted(Trimmed(item.raw_json_token())) + " is out of range";
    });
  } else {
    return static_cast<int64_t>(d);
  }
  return -1;
}

bool ArraysDecoder::ReadIndices(Member m, od::value& value, int64_t cap,
                                std::vector<int32_t>& out) {
  return ForEachElement(m, value, cap, out, [&](od::value& item, int64_t i) {
    uint64_t u = 0;
    int64_t index = -1;
    if (item.get_uint64().get(u) == SUCCESS) {
      if (u <= static_cast<uint64_t>(kMaxIndex)) {
        index = static_cast<int64_t>(u);
      } else {
        ElementError(m, i, [&] { return "index " + std::to_string(u) + " is out of range"; });
      }
    } else {
      index = BadIndex(m, i, item);
    }
    out.push_back(static_cast<int32_t>(index));
    return !malformed_;
  });
}

bool ArraysDecoder::ReadCounts(od::value& value) {
  const Member m = Member::kSaOutcomes;
  return ForEachElement(
      m, value, limits_.max_outcomes, sa_outcomes_, [&](od::value& item, int64_t i) {
        uint64_t u = 0;
        int64_t count = -1;
        if (item.get_uint64().get(u) == SUCCESS && u <= static_cast<uint64_t>(kMaxIndex)) {
          count = static_cast<int64_t>(u);
        } else {
          count = BadIndex(m, i, item);
        }
        if (count > limits_.max_outcomes_per_action) {
          ElementError(m, i, [&] {
            return "a state action has more than " +
                   std::to_string(limits_.max_outcomes_per_action) + " outcomes";
          });
          count = -1;
        }
        if (count < 0) shape_ok_ = false;
        sa_outcomes_.push_back(count);
        return !malformed_;
      });
}

bool ArraysDecoder::ReadNumbers(Member m, od::value& value, int64_t cap, std::vector<double>& out) {
  return ForEachElement(m, value, cap, out, [&](od::value& item, int64_t i) {
    double d = 0;
    if (item.get_double().get(d) != SUCCESS) d = BadNumber(m, i, item);
    out.push_back(d);
    return !malformed_;
  });
}

bool ArraysDecoder::ReadStates(od::value& value) {
  const Member m = Member::kStates;
  spec_.state_names.clear();
  return ForEachElement(
      m, value, limits_.max_states, spec_.state_names, [&](od::value& item, int64_t i) {
        std::string_view name;
        const error_code e = item.get_string().get(name);
        if (e == simdjson::INCORRECT_TYPE) {
          name = {};
          if (!TypeError(m, i, item, "a string")) return false;
        } else if (e) {
          return Malformed(e, Pointer(m, i));
        } else if (name.empty()) {
          ElementError(m, i, [] { return "a name must not be empty"; });
        } else if (CodePoints(name) > kMaxNameLength) {
          ElementError(m, i, [] {
            return "is longer than " + std::to_string(kMaxNameLength) + " characters";
          });
          name = {};
        } else if (HasControlCharacter(name)) {
          ElementError(m, i, [] { return "a name must not contain control characters"; });
          name = {};
        }
        spec_.state_names.emplace_back(name);
        return true;
      });
}

bool ArraysDecoder::ReadStateDescriptions(od::value& value) {
  const Member m = Member::kStateDescriptions;
  std::vector<char> unused;  // Descriptions are checked, not kept (the canonical form has none).
  return ForEachElement(m, value, limits_.max_states, unused, [&](od::value& item, int64_t i) {
    ++state_descriptions_;
    bool is_null = false;
    if (item.is_null().get(is_null) == SUCCESS && is_null) return true;
    std::string_view text;
    const error_code e = item.get_string().get(text);
    if (e == simdjson::INCORRECT_TYPE) return TypeError(m, i, item, "a string or null");
    if (e) return Malformed(e, Pointer(m, i));
    if (CodePoints(text) > kMaxDescriptionLength) {
      ElementError(m, i, [] {
        return "is longer than " + std::to_string(kMaxDescriptionLength) + " characters";
      });
    }
    return true;
  });
}

// ---------------------------------------------------------------------------------------------
// Assembly.

bool ArraysDecoder::Assemble() {
  if (!DecodeHeader()) {
    shape_ok_ = false;
    return false;
  }
  if (!ColumnsPresent()) {
    shape_ok_ = false;
    return true;
  }
  const size_t states = spec_.state_names.size();
  const size_t rows = sa_state_.size();
  const size_t outcomes = spec_.outcome_next.size();
  if (seen_[Index(Member::kStateDescriptions)]) {
    CheckLength(Member::kStateDescriptions, state_descriptions_, Member::kStates, states, "state");
  }
  CheckLength(Member::kSaAction, spec_.slot_action.size(), Member::kSaState, rows, "state action");
  CheckLength(Member::kSaOutcomes, sa_outcomes_.size(), Member::kSaState, rows, "state action");
  if (seen_[Index(Member::kSaReward)]) {
    CheckLength(Member::kSaReward, spec_.slot_reward.size(), Member::kSaState, rows,
                "state action");
  }
  CheckLength(Member::kProbability, spec_.outcome_probability.size(), Member::kNext, outcomes,
              "outcome");
  if (seen_[Index(Member::kReward)]) {
    CheckLength(Member::kReward, spec_.outcome_reward.size(), Member::kNext, outcomes, "outcome");
  }
  CheckStateIndices();
  CheckRowIndices();
  CheckCounts();
  if (shape_ok_) Build();
  return true;
}

// Header members go through the object decoder (DecodeModelSpec) as a document with no
// states, so their rules and messages are the object encoding's, at the same pointers.
// terminal_values name states, which that document lacks: they are resolved here.
bool ArraysDecoder::DecodeHeader() {
  const std::string_view format = Trimmed(header_text_[Index(Member::kFormat)]);
  if (!seen_[Index(Member::kFormat)]) {
    Error("/format", "required field is missing");
  } else if (format != "\"" + std::string(kModelArraysFormat) + "\"") {
    Error("/format", "unsupported compact model format " + Quoted(format) + "; this build reads '" +
                         std::string(kModelArraysFormat) + "' (and '" + std::string(kModelFormat) +
                         "')");
  }
  Json header = {{"format", kModelFormat}, {"states", Json::array()}};
  JsonReadOptions read;
  read.max_depth = limits_.max_depth;
  read.max_array_items = limits_.max_catalogue + 1;
  for (Member m : {Member::kName, Member::kDescription, Member::kRewardUnit, Member::kObjective,
                   Member::kCriterion, Member::kActions}) {
    if (!seen_[Index(m)]) continue;
    // Read as {"member": value}, so that depths and pointers count from the document's root.
    const std::string_view raw = header_text_[Index(m)];
    const std::string prefix = "{\"" + std::string(NameOf(m)) + "\":";
    JsonReadResult parsed = ReadJson(prefix + std::string(raw) + "}", read);
    if (!parsed.errors.empty()) {
      // Like the object decoder, a member that cannot be read completely stops reading.
      const size_t offset = static_cast<size_t>(raw.data() - text_.data());
      for (const DocumentIssue& e : parsed.errors) {
        Error(e.pointer, RebaseLocation(e.message, text_, offset, prefix.size()));
      }
      malformed_ = parsed.malformed;
      return false;
    }
    header[std::string(NameOf(m))] = std::move(parsed.root[NameOf(m)]);
  }
  Json terminal_values;
  if (auto it = header.find("criterion"); it != header.end())
    terminal_values = TakeTerminalValues(*it);
  SpecDecodeResult decoded =
      DecodeModelSpec(header.dump(-1, ' ', false, Json::error_handler_t::replace), limits_);
  for (DocumentIssue& e : decoded.errors) {
    if (e.pointer == "/actions") catalogue_ok_ = false;  // Not a list: indices mean nothing.
    Error(std::move(e.pointer), std::move(e.message));
  }
  errors_not_listed_ += decoded.errors_not_listed;
  if (!seen_[Index(Member::kActions)]) catalogue_ok_ = false;
  spec_.name = std::move(decoded.spec.name);
  spec_.description = std::move(decoded.spec.description);
  spec_.reward_unit = std::move(decoded.spec.reward_unit);
  spec_.objective = decoded.spec.objective;
  spec_.criterion = std::move(decoded.spec.criterion);
  spec_.action_names = std::move(decoded.spec.action_names);
  if (!terminal_values.is_null()) ResolveTerminalValues(terminal_values);
  return true;
}

// Removes a finite-horizon criterion's terminal_values (resolved against the states later).
Json ArraysDecoder::TakeTerminalValues(Json& criterion) {
  if (!criterion.is_object()) return nullptr;
  auto kind = criterion.find("kind");
  auto values = criterion.find("terminal_values");
  if (kind == criterion.end() || *kind != "finite_horizon" || values == criterion.end()) {
    return nullptr;
  }
  Json taken = std::move(*values);
  criterion.erase(values);
  if (!taken.is_object()) {
    Error("/criterion/terminal_values",
          "must be an object mapping state names to numbers, not " + NlohmannTypeName(taken));
    return nullptr;
  }
  return taken;
}

void ArraysDecoder::ResolveTerminalValues(const Json& terminal_values) {
  std::unordered_map<std::string_view, StateId> index;
  if (!terminal_values.empty()) {
    index.reserve(spec_.state_names.size());
    for (StateId s = 0; s < spec_.num_states(); ++s) index.emplace(spec_.state_names[s], s);
  }
  spec_.criterion.terminal_values.assign(spec_.state_names.size(), 0.0);
  for (auto it = terminal_values.begin(); it != terminal_values.end(); ++it) {
    const std::string ptr = "/criterion/terminal_values/" + EscapePointerToken(it.key());
    double value = 0.0;
    if (it.value().is_number()) {
      value = it.value().get<double>();
    } else {
      Error(ptr, "must be a number, not " + NlohmannTypeName(it.value()));
    }
    auto found = index.find(it.key());
    if (found == index.end() || it.key().empty()) {
      Error(ptr, "state '" + it.key() + "' is not defined");
      continue;
    }
    spec_.criterion.terminal_values[found->second] = value;
  }
}

// True iff every required column was read as an array.
bool ArraysDecoder::ColumnsPresent() {
  bool ok = true;
  for (Member m : {Member::kStates, Member::kSaState, Member::kSaAction, Member::kSaOutcomes,
                   Member::kNext, Member::kProbability}) {
    if (!seen_[Index(m)]) Error(Pointer(m), "required field is missing");
    ok = ok && read_ok_[Index(m)];
  }
  for (Member m :
       {Member::kStateDescriptions, Member::kTerminal, Member::kSaReward, Member::kReward}) {
    ok = ok && (!seen_[Index(m)] || read_ok_[Index(m)]);
  }
  return ok;
}

void ArraysDecoder::CheckLength(Member m, size_t size, Member reference, size_t expected,
                                const char* per) {
  if (size == expected) return;
  shape_ok_ = false;
  Error(Pointer(m), "has " + std::to_string(size) + " items, but " +
                        std::string(NameOf(reference)) + " has " + std::to_string(expected) +
                        ": both have one item per " + per);
}

// "state index 7 is out of range: there are 3 states (indices 0 to 2)".
std::string OutOfRange(const char* what, int64_t index, int64_t count, const char* things) {
  std::string out = std::string(what) + " index " + std::to_string(index) +
                    " is out of range: there are " + std::to_string(count) + " " + things;
  if (count > 0) out += " (indices 0 to " + std::to_string(count - 1) + ")";
  return out;
}

// sa_state: in range and non-decreasing, at most max_actions_per_state rows per state.
void ArraysDecoder::CheckStateIndices() {
  CheckTerminals();
  const int64_t states = spec_.num_states();
  int64_t previous = 0;
  int64_t run = 0;
  for (size_t k = 0; k < sa_state_.size(); ++k) {
    const int64_t s = sa_state_[k];
    if (s < 0) {
      shape_ok_ = false;  // Reported as it was read.
    } else if (s >= states) {
      shape_ok_ = false;
      ElementError(Member::kSaState, k, [&] { return OutOfRange("state", s, states, "states"); });
    } else if (s < previous) {
      shape_ok_ = false;
      ElementError(Member::kSaState, k, [&] {
        return "state index " + std::to_string(s) + " comes after " + std::to_string(previous) +
               ": the rows of a state must be contiguous and in state order (sa_state must not "
               "decrease)";
      });
    } else {
      run = s == previous && k > 0 ? run + 1 : 1;
      previous = s;
      if (run == limits_.max_actions_per_state + 1) {
        shape_ok_ = false;
        ElementError(Member::kSaState, k, [&] {
          return "state " + std::to_string(s) + " has more than " +
                 std::to_string(limits_.max_actions_per_state) + " actions";
        });
      }
    }
  }
}

// terminal: state indices in increasing order, each once.
void ArraysDecoder::CheckTerminals() {
  const int64_t states = spec_.num_states();
  int64_t previous = -1;
  for (size_t k = 0; k < terminal_.size(); ++k) {
    const int64_t s = terminal_[k];
    if (s < 0) {
      shape_ok_ = false;
    } else if (s >= states) {
      shape_ok_ = false;
      ElementError(Member::kTerminal, k, [&] { return OutOfRange("state", s, states, "states"); });
    } else if (s <= previous) {
      shape_ok_ = false;
      ElementError(Member::kTerminal, k, [&] {
        return "state index " + std::to_string(s) + " comes after " + std::to_string(previous) +
               ": list terminal states in increasing order, each once";
      });
    } else {
      previous = s;
    }
  }
}

// sa_action and next: out-of-range indices become -1 (reported), as the object decoder leaves
// unknown names; Validate's findings there are then skipped as repeats.
void ArraysDecoder::CheckRowIndices() {
  const int64_t actions = static_cast<int64_t>(spec_.action_names.size());
  for (size_t k = 0; k < spec_.slot_action.size(); ++k) {
    int32_t& a = spec_.slot_action[k];
    if (a < 0 || a < actions) continue;
    if (catalogue_ok_) {
      ElementError(Member::kSaAction, k,
                   [&] { return OutOfRange("action", a, actions, "catalogue actions"); });
    }
    a = -1;
  }
  const int64_t states = spec_.num_states();
  for (size_t o = 0; o < spec_.outcome_next.size(); ++o) {
    int32_t& next = spec_.outcome_next[o];
    if (next < states) continue;
    ElementError(Member::kNext, o, [&] { return OutOfRange("state", next, states, "states"); });
    next = -1;
  }
}

// sa_outcomes: the counts must add up to the number of outcomes.
void ArraysDecoder::CheckCounts() {
  if (!shape_ok_) return;
  int64_t total = 0;
  for (int64_t c : sa_outcomes_) total += c;
  if (total == static_cast<int64_t>(spec_.outcome_next.size())) return;
  shape_ok_ = false;
  Error(Pointer(Member::kSaOutcomes), "the counts add up to " + std::to_string(total) +
                                          " outcomes, but next has " +
                                          std::to_string(spec_.outcome_next.size()) + " items");
}

void ArraysDecoder::Build() {
  const size_t states = spec_.state_names.size();
  spec_.terminal.assign(states, 0);
  for (int32_t s : terminal_) spec_.terminal[s] = 1;
  spec_.state_first_slot.assign(states + 1, 0);
  for (int32_t s : sa_state_) ++spec_.state_first_slot[s + 1];
  for (size_t s = 0; s < states; ++s) spec_.state_first_slot[s + 1] += spec_.state_first_slot[s];
  spec_.slot_first_outcome.resize(sa_outcomes_.size() + 1);
  spec_.slot_first_outcome[0] = 0;
  for (size_t k = 0; k < sa_outcomes_.size(); ++k) {
    spec_.slot_first_outcome[k + 1] = spec_.slot_first_outcome[k] + sa_outcomes_[k];
  }
  if (!seen_[Index(Member::kSaReward)]) spec_.slot_reward.assign(sa_state_.size(), 0.0);
  if (!seen_[Index(Member::kReward)]) spec_.outcome_reward.assign(spec_.outcome_next.size(), 0.0);
  std::vector<int32_t>().swap(sa_state_);
  std::vector<int64_t>().swap(sa_outcomes_);
}

// ---------------------------------------------------------------------------------------------
// Validation findings, pointed into the arrays.

std::string ArraysPointer(const ModelSpec& spec, const Location& where) {
  using F = Location::Field;
  auto slot = [&] { return spec.state_first_slot[where.state] + where.slot; };
  auto outcome = [&] { return spec.slot_first_outcome[slot()] + where.outcome; };
  switch (where.field) {
    case F::kModel:
      return "";
    case F::kDiscount:
      return "/criterion/discount";
    case F::kCriterion:
      return "/criterion";
    case F::kHorizon:
      return "/criterion/horizon";
    case F::kTerminalValue:
      return "/criterion/terminal_values/" + EscapePointerToken(spec.state_names[where.state]);
    case F::kStates:
      return "/states";
    case F::kCatalogue:
      return "/actions";
    case F::kCatalogueEntry:
      return "/actions/" + std::to_string(where.action);
    case F::kState:
    case F::kStateName:
      return Pointer(Member::kStates, where.state);
    case F::kStateActions: {
      // A terminal state with rows: point at its first row; a state without rows: at it.
      const SlotId first = spec.state_first_slot[where.state];
      if (first < spec.state_first_slot[where.state + 1]) return Pointer(Member::kSaState, first);
      return Pointer(Member::kStates, where.state);
    }
    case F::kSlotAction:
      return Pointer(Member::kSaAction, slot());
    case F::kSlotReward:
      return Pointer(Member::kSaReward, slot());
    case F::kSlotOutcomes:
      return Pointer(Member::kSaOutcomes, slot());
    case F::kOutcomeNext:
      return Pointer(Member::kNext, outcome());
    case F::kOutcomeProbability:
      return Pointer(Member::kProbability, outcome());
    case F::kOutcomeReward:
      return Pointer(Member::kReward, outcome());
  }
  return "";
}

// True iff `pointer` or one of its ancestors (other than the whole document) is in `reported`.
bool AlreadyReported(std::string pointer, const std::unordered_set<std::string>& reported) {
  while (!pointer.empty()) {
    if (reported.count(pointer)) return true;
    pointer.resize(pointer.rfind('/'));
  }
  return false;
}

// True iff the SIMDJSON_PADDING bytes after `text` lie in the memory page of its last byte.
// simdjson may then read them (it reads past the end but never uses what it finds there) and
// the text need not be copied: a copy of a 1 GB document costs about a second here, mostly in
// page faults. Sanitizers rightly see those reads as overflows, so their builds always copy.
bool CanParseInPlace(std::string_view text) {
#if defined(__SANITIZE_ADDRESS__) || defined(__SANITIZE_THREAD__)
  return false;
#elif defined(__has_feature)
#if __has_feature(address_sanitizer) || __has_feature(memory_sanitizer)
  return false;
#endif
#endif
  constexpr uintptr_t kPageSize = 4096;  // The smallest page of the platforms we build for.
  if (text.empty()) return false;
  const auto last = reinterpret_cast<uintptr_t>(text.data() + text.size() - 1);
  return last % kPageSize + simdjson::SIMDJSON_PADDING < kPageSize;
}

// Reads and assembles the document; false iff it could not be read completely. Unless the
// text can be parsed in place (CanParseInPlace), simdjson reads a padded copy of it, which
// lives only as long as this call.
bool DecodeInto(std::string_view text, const DecodeLimits& limits, ArraysDecoder& decoder) {
  if (text.size() > simdjson::SIMDJSON_MAXSIZE_BYTES) {
    decoder.Error("", "the document is larger than 4 GiB, the most a compact model may take");
    return false;
  }
  simdjson::padded_string copy;
  simdjson::padded_string_view input(text.data(), text.size(),
                                     text.size() + simdjson::SIMDJSON_PADDING);
  if (!CanParseInPlace(text)) {
    copy = simdjson::padded_string(text.data(), text.size());
    if (copy.data() == nullptr && !text.empty()) {
      decoder.Error("", "out of memory while reading the document");
      return false;
    }
    input = copy;
  }
  {
    // The parser's index (4 bytes per structural character: about half the text's size for
    // columns of numbers) is freed before Assemble() fills in the spec's defaults.
    od::parser parser;
    if (parser.allocate(input.size(), static_cast<size_t>(std::max(1, limits.max_depth))) !=
        SUCCESS) {
      decoder.Error("", "out of memory while reading the document");
      return false;
    }
    od::document doc;
    const error_code e = parser.iterate(input).get(doc);
    if (e) {
      decoder.Error("", "malformed JSON: " + SyntaxProblem(e));
      return false;
    }
    if (!decoder.Read(doc, std::string_view(input.data(), input.size()))) return false;
  }
  return decoder.Assemble();
}

// Runs Validate() on a decoded spec and compiles it, as DecodeModel does for the object
// encoding; findings at places the decoder already reported are not repeated.
void ValidateAndBuild(ArraysDecoder& decoder, const DecodeLimits& limits, ModelDecodeResult& out) {
  const ModelSpec& spec = decoder.spec();
  std::unordered_set<std::string> reported;
  for (const DocumentIssue& e : out.errors) reported.insert(e.pointer);
  ValidateOptions options;
  options.max_errors =
      std::max<int64_t>(0, limits.max_errors - static_cast<int64_t>(out.errors.size()));
  options.max_warnings = limits.max_warnings;
  const bool catalogue_ok = decoder.catalogue_ok();
  options.skip = [&](const Finding& f) {
    if (f.severity != Finding::Severity::kError) return false;
    if (f.where.field == Location::Field::kSlotAction && !catalogue_ok) return true;
    return AlreadyReported(ArraysPointer(spec, f.where), reported);
  };
  ValidationReport report = Validate(spec, options);
  for (const Finding& f : report.errors)
    out.errors.push_back({ArraysPointer(spec, f.where), f.message});
  out.errors_not_listed += report.errors_not_listed;
  for (const Finding& f : report.warnings) {
    out.warnings.push_back({ArraysPointer(spec, f.where), f.message});
  }
  out.warnings_not_listed = report.warnings_not_listed;
  if (!out.errors.empty() || out.errors_not_listed > 0 || !report.proof) return;
  Result<Model> model = BuildModel(spec, *report.proof);  // Compiles without validating again.
  if (!model.ok()) {
    out.errors.push_back({"", model.status().message()});
    return;
  }
  out.model = std::move(*model);
  out.spec = std::move(decoder.spec());
}

}  // namespace

bool IsArraysModelDocument(std::string_view text) {
  const std::optional<std::string> format = FormatScanner(text).Format();
  return format && format->rfind(kArraysFormatFamily, 0) == 0;
}

SpecDecodeResult DecodeArraysModelSpec(std::string_view text, const DecodeLimits& limits) {
  SpecDecodeResult out;
  try {
    ArraysDecoder decoder(limits);
    DecodeInto(text, limits, decoder);
    out.spec = std::move(decoder.spec());
    out.errors = std::move(decoder.errors());
    out.errors_not_listed = decoder.errors_not_listed();
    out.malformed = decoder.malformed();
  } catch (const std::bad_alloc&) {
    out = SpecDecodeResult();
    out.errors.push_back({"", "out of memory while reading the document"});
  }
  return out;
}

ModelDecodeResult DecodeArraysModel(std::string_view text, const DecodeLimits& limits,
                                    const TextReleased& released) {
  ModelDecodeResult out;
  try {
    ArraysDecoder decoder(limits);
    const bool complete = DecodeInto(text, limits, decoder);
    if (released) released();  // The spec holds copies of everything it needs.
    out.errors = std::move(decoder.errors());
    out.errors_not_listed = decoder.errors_not_listed();
    out.malformed = decoder.malformed();
    if (complete && decoder.shape_ok()) ValidateAndBuild(decoder, limits, out);
  } catch (const std::bad_alloc&) {
    out = ModelDecodeResult();
    out.errors.push_back({"", "out of memory while reading the document"});
  }
  return out;
}

}  // namespace mdp::server
