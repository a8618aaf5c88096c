// DecodeModel: reads a model document (api-schema/model.schema.json, format
// "mdpserve/model@1") into a ModelSpec, validates it, and compiles it into a Model. Reports
// every problem it finds (up to a cap), each with an RFC 6901 JSON Pointer into the document.
// The states list is decoded one state at a time as the text is read, so a document of
// millions of states never exists as one DOM. Stateless; thread-safe.
#ifndef MDP_SERVER_MODEL_CODEC_H_
#define MDP_SERVER_MODEL_CODEC_H_

#include <cstdint>
#include <functional>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "server/json_reader.h"
#include "solver/model.h"
#include "solver/model_spec.h"

namespace mdp::server {

inline constexpr std::string_view kModelFormat = "mdpserve/model@1";

// Size caps on documents ("absurd sizes"). Defaults are documented in api-schema/README.md.
struct DecodeLimits {
  int64_t max_states = 50'000'000;
  int64_t max_catalogue = 1'000'000;
  int64_t max_actions_per_state = 10'000;
  int64_t max_outcomes_per_action = 1'000'000;
  int64_t max_outcomes = 400'000'000;
  int max_depth = 64;
  int64_t max_errors = 100;
  int64_t max_warnings = 100;
};

struct ModelDecodeResult {
  std::optional<Model> model;  // Set iff `errors` is empty and errors_not_listed == 0.
  ModelSpec spec;              // The model as written (set with `model`), for re-encoding.
  std::vector<DocumentIssue> errors;
  std::vector<DocumentIssue> warnings;
  int64_t errors_not_listed = 0;
  int64_t warnings_not_listed = 0;
  bool malformed = false;  // The text is not JSON (or nests too deep): nothing was checked.
  bool ok() const { return model.has_value(); }
};

// The name rules both encodings share: the number of Unicode code points in UTF-8 text, and
// whether it holds a C0 or C1 control character (U+0000..U+001F, U+007F..U+009F).
size_t CodePoints(std::string_view s);
bool HasControlCharacter(std::string_view s);

// Called once the decoder has read all it needs of the text, before validation and
// compilation: a caller that owns a large text frees it there, so that the text and the
// compiled model are never held at once.
using TextReleased = std::function<void()>;

// Decodes, validates and compiles. `released` (optional) is called at most once, after the
// last read of `text`; `text` must not be used by the decoder after it.
ModelDecodeResult DecodeModel(std::string_view text, const DecodeLimits& limits = {},
                              const TextReleased& released = nullptr);

// Decodes without compiling: the spec as written plus the decoder's own findings (types,
// names, structure); Validate()'s findings are not included. For tests and tools.
struct SpecDecodeResult {
  ModelSpec spec;
  std::vector<DocumentIssue> errors;
  int64_t errors_not_listed = 0;
  bool malformed = false;
};
SpecDecodeResult DecodeModelSpec(std::string_view text, const DecodeLimits& limits = {});

}  // namespace mdp::server

#endif  // MDP_SERVER_MODEL_CODEC_H_
