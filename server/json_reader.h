// ReadJson: a bounded JSON reader for hostile input. It parses with nlohmann's SAX interface
// into a DOM, but refuses nesting deeper than a cap, arrays longer than a cap and duplicate
// object keys, and reports malformed text with line, column and the JSON Pointer where the
// parser stood. A hook can take the elements of one top-level array member as each element
// completes (see JsonReadOptions::stream_member), so a huge list is never held as one DOM.
// Stateless; thread-safe.
#ifndef MDP_SERVER_JSON_READER_H_
#define MDP_SERVER_JSON_READER_H_

#include <cstdint>
#include <functional>
#include <nlohmann/json.hpp>
#include <string>
#include <string_view>
#include <vector>

namespace mdp::server {

using Json = nlohmann::json;

struct DocumentIssue {
  std::string pointer;  // RFC 6901 JSON Pointer ("" is the whole document).
  std::string message;  // Plain words.
};

struct JsonReadOptions {
  int max_depth = 64;                   // Containers nested deeper are refused.
  int64_t max_array_items = 1'000'000;  // Per array (except the streamed one).
  // If set, elements of the top-level member with this name (which must be an array) are
  // handed to `on_element` as they complete and replaced by null in the DOM.
  std::string stream_member;
  int64_t max_streamed_items = 50'000'000;
  // Called with (element, index). Returns false to abort reading (the callback records why).
  std::function<bool(Json&&, int64_t)> on_element;
};

struct JsonReadResult {
  Json root;
  std::vector<DocumentIssue> errors;  // Empty iff the text was read completely.
  bool malformed = false;             // True iff the text is not JSON (syntax) or nests too deep.
};

JsonReadResult ReadJson(std::string_view text, const JsonReadOptions& options);

// Escapes one reference token for a JSON Pointer ("~" -> "~0", "/" -> "~1").
std::string EscapePointerToken(std::string_view token);

// `text` with each byte that is not part of well-formed UTF-8 written as the four characters
// "\xHH": for messages that quote raw input (the parser's "last read" text), which must stay
// valid UTF-8 to be sent as JSON.
std::string EscapeInvalidUtf8(std::string_view text);

// Serializes `json` (indent < 0: compact) as every answer and stored report is written. A
// string holding bytes that are not well-formed UTF-8 gets U+FFFD in their place instead of
// nlohmann's exception: decoded documents cannot hold such strings, but a message quoting
// raw input could (found by tests/fuzz/service_api_fuzz: answered 500, and the command line
// aborted).
std::string DumpJson(const Json& json, int indent = -1);

}  // namespace mdp::server

#endif  // MDP_SERVER_JSON_READER_H_
