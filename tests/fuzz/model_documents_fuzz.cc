// Fuzz target: model documents in either encoding, as a POST /v1/models body. Built twice
// (tests/CMakeLists.txt): model_objects_fuzz decodes with the object codec
// (server/model_codec.h), model_arrays_fuzz with the arrays codec (model_arrays_codec.h);
// MDP_FUZZ_ARRAYS picks. Properties (abort when broken, see fuzz_checks.h):
//  - a decode is ok exactly when it lists no error, and a malformed text lists one;
//  - every listed pointer is an RFC 6901 pointer ("" or starting with "/");
//  - a model that decodes round-trips through its canonical document and survives every
//    solve method of its criterion, whose answers agree within their bounds.
#include <cstddef>
#include <cstdint>
#include <string_view>
#include <vector>

#include "server/json_reader.h"
#include "server/model_arrays_codec.h"
#include "server/model_codec.h"
#include "tests/fuzz/fuzz_checks.h"

namespace {

// Caps far below the service's defaults, so that a short input cannot ask for gigabytes.
mdp::server::DecodeLimits SmallLimits() {
  mdp::server::DecodeLimits limits;
  limits.max_states = 10'000;
  limits.max_catalogue = 10'000;
  limits.max_actions_per_state = 1'000;
  limits.max_outcomes_per_action = 10'000;
  limits.max_outcomes = 100'000;
  return limits;
}

void CheckIssues(const std::vector<mdp::server::DocumentIssue>& issues) {
  for (const mdp::server::DocumentIssue& issue : issues) {
    if (!issue.pointer.empty() && issue.pointer.front() != '/') {
      mdp::fuzz::Fail("an issue's pointer is not a JSON Pointer: " + issue.pointer);
    }
    if (issue.message.empty()) mdp::fuzz::Fail("an issue has no message");
  }
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  const std::string_view text(reinterpret_cast<const char*>(data), size);
  const mdp::server::DecodeLimits limits = SmallLimits();
#if defined(MDP_FUZZ_ARRAYS)
  const mdp::server::ModelDecodeResult result = mdp::server::DecodeArraysModel(text, limits);
  const mdp::server::SpecDecodeResult spec = mdp::server::DecodeArraysModelSpec(text, limits);
#else
  const mdp::server::ModelDecodeResult result = mdp::server::DecodeModel(text, limits);
  const mdp::server::SpecDecodeResult spec = mdp::server::DecodeModelSpec(text, limits);
#endif
  CheckIssues(result.errors);
  CheckIssues(result.warnings);
  CheckIssues(spec.errors);
  const bool listed = !result.errors.empty() || result.errors_not_listed > 0;
  if (result.ok() == listed) mdp::fuzz::Fail("a decode's result and its error list disagree");
  if (result.malformed && result.errors.empty()) {
    mdp::fuzz::Fail("a malformed text is reported without an error");
  }
  // An empty (or all-blank) body is answered as an empty document, not as malformed JSON
  // (the API test's scenario e); DecodeModelSpec, for tools, calls it malformed.
  const bool blank = text.find_first_not_of(" \t\r\n") == std::string_view::npos;
  if (!blank && result.malformed != spec.malformed) {
    mdp::fuzz::Fail("DecodeModel and DecodeModelSpec disagree on whether the text is JSON");
  }
  if (!result.ok()) return 0;
  mdp::fuzz::CheckCanonicalRoundTrip(result.spec);
  mdp::fuzz::CheckSolves(*result.model);
  return 0;
}
