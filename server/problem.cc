#include "server/problem.h"

namespace mdp::server {
namespace {

struct Kind {
  int status;
  const char* slug;
  const char* title;
};

Kind Classify(const Status& status, ProblemKind kind) {
  switch (kind) {
    case ProblemKind::kMalformedJson: return {400, "malformed-json", "Malformed JSON"};
    case ProblemKind::kInvalidModel: return {422, "invalid-model", "The model is not valid"};
    case ProblemKind::kInvalidCandidate:
      return {422, "invalid-candidate", "The candidate does not fit the model"};
    case ProblemKind::kUnknownStates: return {422, "unknown-states", "Unknown states"};
    case ProblemKind::kUnsupportedMediaType:
      return {415, "unsupported-media-type", "Unsupported media type"};
    case ProblemKind::kPayloadTooLarge: return {413, "payload-too-large", "Payload too large"};
    case ProblemKind::kUnauthorized: return {401, "unauthorized", "Unauthorized"};
    case ProblemKind::kNotFoundRoute: return {404, "no-such-route", "No such route"};
    case ProblemKind::kMethodNotAllowed:
      return {405, "method-not-allowed", "Method not allowed"};
    case ProblemKind::kFromStatus: break;
  }
  switch (status.code()) {
    case StatusCode::kInvalidArgument: return {400, "invalid-request", "Invalid request"};
    case StatusCode::kNotFound: return {404, "not-found", "Not found"};
    case StatusCode::kFailedPrecondition: return {409, "conflict", "Conflict"};
    case StatusCode::kResourceExhausted: return {429, "too-many-requests", "Too many requests"};
    case StatusCode::kCancelled: return {499, "cancelled", "Cancelled"};
    case StatusCode::kDeadlineExceeded: return {504, "deadline-exceeded", "Deadline exceeded"};
    case StatusCode::kUnavailable: return {503, "unavailable", "Service unavailable"};
    case StatusCode::kOk:
    case StatusCode::kInternal: break;
  }
  return {500, "internal", "Internal error"};
}

}  // namespace

Problem MakeProblem(const Status& status, ProblemKind kind,
                    const std::vector<DocumentIssue>& errors, int64_t truncated,
                    const std::string& instance) {
  const Kind k = Classify(status, kind);
  Json body = {{"type", std::string("urn:mdpserve:problem:") + k.slug},
               {"title", k.title},
               {"status", k.status},
               {"detail", status.message()}};
  if (!instance.empty()) body["instance"] = instance;
  if (!errors.empty() || truncated > 0) {
    Json list = Json::array();
    for (const DocumentIssue& e : errors) {
      list.push_back({{"pointer", e.pointer}, {"message", e.message}});
    }
    body["errors"] = std::move(list);
    body["truncated"] = truncated;
  }
  Problem p;
  p.status = k.status;
  p.body = DumpJson(body);
  if (k.status == 429) p.retry_after = 5;
  if (k.status == 503) p.retry_after = 10;
  return p;
}

}  // namespace mdp::server
