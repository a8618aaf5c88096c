// The route table and its handlers: decode -> call the service -> encode. No maths, no
// locking, no SQL here; status codes for errors come from problem.cc.
#include <cmath>
#include <memory>
#include <string>
#include <string_view>

#include "server/api_codec.h"
#include "server/canonical.h"
#include "server/http_context.h"
#include "server/http_server.h"
#include "server/json_codec.h"

namespace mdp::server {
namespace {

using httplib::Request;
using httplib::Response;

std::string Param(const Request& req, const char* name) {
  return req.has_param(name) ? req.get_param_value(name) : std::string();
}

Status MissingParam(const char* name) {
  return InvalidArgumentError(std::string("query parameter '") + name + "' is required");
}

// Looks up `name` in the plan's model; writes 404 and returns -1 if absent.
StateId FindStateOr404(const Plan& plan, const std::string& name, Response& res) {
  std::optional<StateId> s = plan.model->FindState(name);
  if (!s) WriteProblem(res, NotFoundError("model " + plan.model_id + " has no state '" + name + "'"));
  return s.value_or(-1);
}

// The stage of a finite-horizon query from its `stage` or `periods_remaining` parameter.
Result<int64_t> QueryStage(const Request& req, const Plan& plan) {
  return ResolveStage(plan, Param(req, "stage"), Param(req, "periods_remaining"));
}

// The same from a batch body's optional "stage" or "periods_remaining" integer members.
Result<int64_t> BatchStage(const Json& body, const Plan& plan) {
  std::string texts[2];
  const char* keys[2] = {"stage", "periods_remaining"};
  for (int i = 0; i < 2; ++i) {
    if (!body.contains(keys[i])) continue;
    const Json& v = body[keys[i]];
    // JSON Schema counts 3.0 as an integer; so do we.
    if (!v.is_number() || v.get<double>() != std::floor(v.get<double>()) ||
        std::fabs(v.get<double>()) > 1e15) {
      return InvalidArgumentError(std::string("/") + keys[i] + ": must be a whole number");
    }
    texts[i] = std::to_string(static_cast<int64_t>(v.get<double>()));
  }
  return ResolveStage(plan, texts[0], texts[1]);
}

// True iff the request body is not JSON at all: read again, only on error paths.
bool BodyIsNotJson(const Request& req) { return ReadJson(req.body, JsonReadOptions{}).malformed; }

// The problem for a request body that could not be decoded: malformed-json when the body is
// not JSON at all, else what the status says.
Problem BodyProblem(const Request& req, const Status& status) {
  if (status.code() == StatusCode::kInvalidArgument && BodyIsNotJson(req)) {
    return MakeProblem(status, ProblemKind::kMalformedJson);
  }
  return MakeProblem(status);
}

// The body is the handler's own: the service frees it once read, before the model is
// compiled and stored (a 1M-state document is over 1 GB of text).
void UploadModelBody(HttpContext& ctx, const Request& req, std::string body, Response& res) {
  if (!RequireJsonBody(req, res)) return;
  Result<UploadResult> upload = ctx.service.UploadModelOwned(std::move(body));
  if (!upload.ok()) return WriteProblem(res, upload.status());
  if (!upload->too_large.empty()) {
    return WriteProblem(res, MakeProblem(ResourceExhaustedError(upload->too_large),
                                         ProblemKind::kPayloadTooLarge));
  }
  if (!upload->errors.empty()) {
    const int64_t count = static_cast<int64_t>(upload->errors.size()) + upload->errors_not_listed;
    return WriteProblem(
        res, MakeProblem(InvalidArgumentError(upload->malformed
                                                  ? upload->errors.front().message
                                                  : "the model document has " +
                                                        std::to_string(count) + " errors"),
                         upload->malformed ? ProblemKind::kMalformedJson
                                           : ProblemKind::kInvalidModel,
                         upload->errors, upload->errors_not_listed));
  }
  res.set_header("Location", "/v1/models/" + upload->record.id);
  WriteJson(res, upload->created ? 201 : 200, DumpJson(EncodeUpload(*upload)));
}

// A request with no body at all.
void UploadModel(HttpContext& ctx, const Request& req, Response& res) {
  UploadModelBody(ctx, req, req.body, res);
}

void ListModels(HttpContext& ctx, const Request&, Response& res) {
  Result<std::vector<ModelRecord>> models = ctx.service.ListModels();
  if (!models.ok()) return WriteProblem(res, models.status());
  Json list = Json::array();
  for (const ModelRecord& m : *models) list.push_back(EncodeModelRecord(m));
  WriteJson(res, 200, DumpJson(Json{{"models", std::move(list)}}));
}

void GetModel(HttpContext& ctx, const Request&, Response& res) {
  Result<ModelRecord> model = ctx.service.GetModel(ctx.path_params[0], false);
  if (!model.ok()) return WriteProblem(res, model.status());
  WriteJson(res, 200, DumpJson(EncodeModelRecord(*model)));
}

// Sent in chunks of 1 MiB as it is written: the text of a 1M-state model is 2.4 GB.
void GetModelDocument(HttpContext& ctx, const Request&, Response& res) {
  Result<PlanningService::ModelDocument> document =
      ctx.service.GetModelDocument(ctx.path_params[0]);
  if (!document.ok()) return WriteProblem(res, document.status());
  if (document->spec == nullptr) return WriteJson(res, 200, document->text);
  res.status = 200;
  // One piece per call: the transport asks for the next one only once the client has taken
  // the previous one, and serves other connections in between.
  struct Stream {
    explicit Stream(std::shared_ptr<const ModelSpec> model)
        : spec(std::move(model)), cursor(*spec) {}
    std::shared_ptr<const ModelSpec> spec;  // Declared before `cursor`, which reads it.
    CanonicalModelCursor cursor;
    std::string piece;
  };
  auto stream = std::make_shared<Stream>(document->spec);
  res.set_chunked_content_provider("application/json", [stream](size_t, httplib::DataSink& sink) {
    stream->piece.clear();
    const bool more = stream->cursor.Next(stream->piece, size_t{1} << 20);
    if (!sink.write(stream->piece.data(), stream->piece.size())) {
      return false;  // Closes the connection.
    }
    if (!more) sink.done();
    return true;
  });
}

void DeleteModel(HttpContext& ctx, const Request&, Response& res) {
  Status deleted = ctx.service.DeleteModel(ctx.path_params[0]);
  if (!deleted.ok()) return WriteProblem(res, deleted);
  res.status = 204;
}

void StartSolve(HttpContext& ctx, const Request& req, Response& res) {
  if (!RequireJsonBody(req, res)) return;
  Result<SolveRequest> request = DecodeSolveRequest(req.body);
  if (!request.ok()) return WriteProblem(res, BodyProblem(req, request.status()));
  Result<SolveStart> start = ctx.service.StartSolve(request->model_id, request->options);
  if (!start.ok()) return WriteProblem(res, start.status());
  if (!start->job) {
    const std::string where =
        "/v1/models/" + request->model_id + "/solutions/" + start->cached_solution_id;
    res.set_header("Location", where);
    return WriteJson(res, 200,
                     DumpJson(Json{{"cached", true},
                                   {"model_id", request->model_id},
                                   {"solution_id", start->cached_solution_id},
                                   {"solution", where}}));
  }
  res.set_header("Location", "/v1/jobs/" + start->job->record.id);
  WriteJson(res, 202, DumpJson(EncodeJobView(*start->job)));
}

void ListJobs(HttpContext& ctx, const Request& req, Response& res) {
  std::optional<JobStatus> status;
  if (req.has_param("status")) {
    status = ParseJobStatus(Param(req, "status"));
    if (!status) return WriteProblem(res, InvalidArgumentError("unknown job status"));
  }
  int64_t limit = 100;
  if (req.has_param("limit")) {
    try {
      limit = std::stoll(Param(req, "limit"));
    } catch (...) {
      limit = -1;
    }
    if (limit < 1 || limit > 10000) {
      return WriteProblem(res, InvalidArgumentError("limit must be between 1 and 10000"));
    }
  }
  Result<std::vector<JobView>> jobs = ctx.service.ListJobs(Param(req, "model_id"), status, limit);
  if (!jobs.ok()) return WriteProblem(res, jobs.status());
  Json list = Json::array();
  for (const JobView& j : *jobs) list.push_back(EncodeJobView(j));
  WriteJson(res, 200, DumpJson(Json{{"jobs", std::move(list)}}));
}

void GetJob(HttpContext& ctx, const Request&, Response& res) {
  Result<JobView> job = ctx.service.GetJob(ctx.path_params[0]);
  if (!job.ok()) return WriteProblem(res, job.status());
  WriteJson(res, 200, DumpJson(EncodeJobView(*job)));
}

void CancelJob(HttpContext& ctx, const Request&, Response& res) {
  Result<JobView> job = ctx.service.CancelJob(ctx.path_params[0]);
  if (!job.ok()) return WriteProblem(res, job.status());
  WriteJson(res, 200, DumpJson(EncodeJobView(*job)));
}

void BestAction(HttpContext& ctx, const Request& req, Response& res) {
  if (!req.has_param("state")) return WriteProblem(res, MissingParam("state"));
  Result<Plan> plan = ctx.service.GetPlan(ctx.path_params[0], Param(req, "solution_id"));
  if (!plan.ok()) return WriteProblem(res, plan.status());
  const StateId s = FindStateOr404(*plan, Param(req, "state"), res);
  if (s < 0) return;
  Result<int64_t> stage = QueryStage(req, *plan);
  if (!stage.ok()) return WriteProblem(res, stage.status());
  std::string body;
  body.reserve(512);
  AppendBestAction(body, *plan, s, *stage);
  WriteJson(res, 200, body);
}

void BestActionBatch(HttpContext& ctx, const Request& req, Response& res) {
  if (!RequireJsonBody(req, res)) return;
  JsonReadResult read = ReadJson(req.body, JsonReadOptions{});
  if (!read.errors.empty()) {
    return WriteProblem(res, MakeProblem(InvalidArgumentError(read.errors.front().message),
                                         ProblemKind::kMalformedJson, read.errors));
  }
  const Json& states = read.root.is_object() && read.root.contains("states")
                           ? read.root["states"] : Json();
  if (!states.is_array() || states.empty() || states.size() > 100000) {
    return WriteProblem(res, InvalidArgumentError(
                                 "/states: must be an array of 1 to 100000 state names"));
  }
  std::string solution_id;
  if (read.root.contains("solution_id") && read.root["solution_id"].is_string()) {
    solution_id = read.root["solution_id"].get<std::string>();
  }
  Result<Plan> plan = ctx.service.GetPlan(ctx.path_params[0], solution_id);
  if (!plan.ok()) return WriteProblem(res, plan.status());
  Result<int64_t> stage = BatchStage(read.root, *plan);
  if (!stage.ok()) return WriteProblem(res, stage.status());
  std::vector<StateId> ids;
  std::vector<DocumentIssue> unknown;
  for (size_t i = 0; i < states.size(); ++i) {
    std::optional<StateId> s =
        states[i].is_string() ? plan->model->FindState(states[i].get<std::string>()) : std::nullopt;
    if (!s) {
      if (unknown.size() < 100) {
        unknown.push_back({"/states/" + std::to_string(i), "not a state of this model"});
      }
      continue;
    }
    ids.push_back(*s);
  }
  if (!unknown.empty()) {
    return WriteProblem(res, MakeProblem(InvalidArgumentError("unknown states in the batch"),
                                         ProblemKind::kUnknownStates, unknown));
  }
  std::string body = "{\"solution_id\":\"" + plan->solution_id + "\",\"answers\":[";
  for (size_t i = 0; i < ids.size(); ++i) {
    if (i) body += ',';
    AppendBestAction(body, *plan, ids[i], *stage);
  }
  body += "]}";
  WriteJson(res, 200, body);
}

void Explain(HttpContext& ctx, const Request& req, Response& res) {
  if (!req.has_param("state")) return WriteProblem(res, MissingParam("state"));
  Result<Plan> plan = ctx.service.GetPlan(ctx.path_params[0], Param(req, "solution_id"));
  if (!plan.ok()) return WriteProblem(res, plan.status());
  const StateId s = FindStateOr404(*plan, Param(req, "state"), res);
  if (s < 0) return;
  Result<int64_t> stage = QueryStage(req, *plan);
  if (!stage.ok()) return WriteProblem(res, stage.status());
  WriteJson(res, 200, DumpJson(EncodeExplain(*plan, s, *stage)));
}

void ListSolutions(HttpContext& ctx, const Request&, Response& res) {
  Result<std::vector<SolutionRecord>> list = ctx.service.ListSolutions(ctx.path_params[0]);
  if (!list.ok()) return WriteProblem(res, list.status());
  Json out = Json::array();
  for (const SolutionRecord& s : *list) out.push_back(EncodeSolutionRecord(s));
  WriteJson(res, 200, DumpJson(Json{{"solutions", std::move(out)}}));
}

void GetSolution(HttpContext& ctx, const Request&, Response& res) {
  Result<SolutionRecord> record =
      ctx.service.GetSolutionRecord(ctx.path_params[0], ctx.path_params[1]);
  if (!record.ok()) return WriteProblem(res, record.status());
  WriteJson(res, 200, DumpJson(EncodeSolutionRecord(*record)));
}

void GetSolutionTables(HttpContext& ctx, const Request& req, Response& res) {
  Result<Plan> plan = ctx.service.GetPlan(ctx.path_params[0], ctx.path_params[1]);
  if (!plan.ok()) return WriteProblem(res, plan.status());
  Result<int64_t> stage = QueryStage(req, *plan);
  if (!stage.ok()) return WriteProblem(res, stage.status());
  Json doc = *stage == 0 ? EncodeSolution(*plan->model, *plan->solution, SolutionDetail::kFull)
                         : EncodeSolution(*plan->model,
                                          SolutionAtStage(*plan->model, *plan->solution, *stage),
                                          SolutionDetail::kFull);
  doc["id"] = plan->solution_id;
  WriteJson(res, 200, DumpJson(doc));
}

void Verify(HttpContext& ctx, const Request& req, Response& res) {
  if (!RequireJsonBody(req, res)) return;
  Result<VerifyStart> done = ctx.service.Verify(ctx.path_params[0], req.body);
  if (!done.ok()) return WriteProblem(res, BodyProblem(req, done.status()));
  if (!done->errors.empty()) {
    return WriteProblem(res, MakeProblem(InvalidArgumentError("the candidate does not fit the model"),
                                         ProblemKind::kInvalidCandidate, done->errors));
  }
  if (done->job) {
    res.set_header("Location", "/v1/jobs/" + done->job->record.id);
    return WriteJson(res, 202, DumpJson(EncodeJobView(*done->job)));
  }
  WriteJson(res, 200, done->report_json);
}

void Compare(HttpContext& ctx, const Request& req, Response& res) {
  if (!req.has_param("with")) return WriteProblem(res, MissingParam("with"));
  Result<ComparisonReport> report = ctx.service.Compare(
      ctx.path_params[0], Param(req, "solution_id"), Param(req, "with"),
      Param(req, "with_solution_id"));
  if (!report.ok()) return WriteProblem(res, report.status());
  WriteJson(res, 200, DumpJson(EncodeComparison(*report)));
}

void StartSimulation(HttpContext& ctx, const Request& req, Response& res) {
  if (!RequireJsonBody(req, res)) return;
  Result<SimulateStart> start = ctx.service.StartSimulation(ctx.path_params[0], req.body);
  if (!start.ok()) return WriteProblem(res, start.status());
  if (!start->errors.empty()) {
    // A body that is not JSON is 400 malformed-json, as on the other routes (it was 422).
    if (BodyIsNotJson(req)) {
      return WriteProblem(res, MakeProblem(InvalidArgumentError(start->errors.front().message),
                                           ProblemKind::kMalformedJson, start->errors));
    }
    return WriteProblem(
        res, MakeProblem(InvalidArgumentError("the simulation request does not fit the model"),
                         ProblemKind::kInvalidCandidate, start->errors));
  }
  res.set_header("Location", "/v1/jobs/" + start->job->record.id);
  WriteJson(res, 202, DumpJson(EncodeJobView(*start->job)));
}

void Healthz(HttpContext&, const Request&, Response& res) {
  WriteJson(res, 200, R"({"status":"ok"})");
}

void Readyz(HttpContext& ctx, const Request&, Response& res) {
  if (!ctx.service.accepting()) {
    return WriteProblem(res, Status(StatusCode::kUnavailable, "shutting down"));
  }
  WriteJson(res, 200, R"({"status":"ready"})");
}

void Metrics(HttpContext& ctx, const Request&, Response& res) {
  res.status = 200;
  res.set_content(ctx.registry.RenderText(), "text/plain; version=0.0.4; charset=utf-8");
}

void OpenApi(HttpContext&, const Request&, Response& res) { WriteJson(res, 200, kOpenApiDocument); }

}  // namespace

const std::vector<Route>& ApiRoutes() {
  // The hot query first: HttpServer tries the routes in this order.
  static const std::vector<Route> routes = {
      {"GET", "/v1/models/{id}/policy", BestAction},
      {"POST", "/v1/models", UploadModel, UploadModelBody},
      {"GET", "/v1/models", ListModels},
      {"GET", "/v1/models/{id}", GetModel},
      {"DELETE", "/v1/models/{id}", DeleteModel},
      {"GET", "/v1/models/{id}/document", GetModelDocument},
      {"POST", "/v1/models/{id}/policy/batch", BestActionBatch},
      {"GET", "/v1/models/{id}/policy/explain", Explain},
      {"GET", "/v1/models/{id}/solutions", ListSolutions},
      {"GET", "/v1/models/{id}/solutions/{sid}", GetSolution},
      {"GET", "/v1/models/{id}/solutions/{sid}/tables", GetSolutionTables},
      {"POST", "/v1/models/{id}/verify", Verify},
      {"GET", "/v1/models/{id}/compare", Compare},
      {"POST", "/v1/models/{id}/simulations", StartSimulation},
      {"POST", "/v1/jobs", StartSolve},
      {"GET", "/v1/jobs", ListJobs},
      {"GET", "/v1/jobs/{id}", GetJob},
      {"POST", "/v1/jobs/{id}/cancel", CancelJob},
      {"GET", "/healthz", Healthz},
      {"GET", "/readyz", Readyz},
      {"GET", "/metrics", Metrics},
      {"GET", "/v1/openapi.json", OpenApi},
  };
  return routes;
}

}  // namespace mdp::server
