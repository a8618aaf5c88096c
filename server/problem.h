// Problem details (RFC 9457): the one place that maps a Status to an HTTP status code and an
// application/problem+json body. Handlers never choose error codes themselves.
// Stateless; thread-safe.
#ifndef MDP_SERVER_PROBLEM_H_
#define MDP_SERVER_PROBLEM_H_

#include <string>
#include <vector>

#include "server/json_reader.h"
#include "solver/status.h"

namespace mdp::server {

inline constexpr const char* kProblemContentType = "application/problem+json";

struct Problem {
  int status = 500;
  std::string body;         // application/problem+json.
  int retry_after = 0;      // Seconds; > 0 adds a Retry-After header (429, 503).
};

// Kinds of problem beyond what a Status code says.
enum class ProblemKind {
  kFromStatus,         // Decide from the Status code.
  kMalformedJson,      // 400: the body is not JSON.
  kInvalidModel,       // 422: the model document has errors (listed).
  kInvalidCandidate,   // 422: a candidate values/policy document has errors (listed).
  kUnknownStates,      // 422: batch query names states the model lacks (listed).
  kUnsupportedMediaType,  // 415.
  kPayloadTooLarge,    // 413.
  kUnauthorized,       // 401.
  kNotFoundRoute,      // 404: no such route.
  kMethodNotAllowed,   // 405.
};

// The problem for `status` (and `kind`), with `errors` as our "errors" extension member:
// [{"pointer": ..., "message": ...}], and `truncated` the count of errors not listed.
Problem MakeProblem(const Status& status, ProblemKind kind = ProblemKind::kFromStatus,
                    const std::vector<DocumentIssue>& errors = {}, int64_t truncated = 0,
                    const std::string& instance = "");

}  // namespace mdp::server

#endif  // MDP_SERVER_PROBLEM_H_
