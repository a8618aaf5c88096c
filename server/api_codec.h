// JSON documents of the HTTP API (api-schema/openapi.json): requests in (solve options,
// solve and verify requests), records and answers out. The best-action answer is written
// by hand into a string because it is the hot path; everything else goes through
// nlohmann_json. Stateless; thread-safe.
#ifndef MDP_SERVER_API_CODEC_H_
#define MDP_SERVER_API_CODEC_H_

#include <string>
#include <string_view>
#include <vector>

#include "server/json_codec.h"
#include "server/json_reader.h"
#include "server/planning_service.h"
#include "server/store.h"
#include "solver/solver.h"

namespace mdp::server {

// Solve options from a JSON object; every field optional, unknown fields are errors.
Result<SolveOptions> DecodeSolveOptions(const Json& json);
Result<SolveOptions> DecodeSolveOptionsText(std::string_view text);

struct SolveRequest {
  std::string model_id;
  SolveOptions options;
};
// {"model_id": "...", "options": {...}} (options optional).
Result<SolveRequest> DecodeSolveRequest(std::string_view body);

struct VerifyRequest {
  std::string kind;         // "values" or "policy".
  double tolerance = 1e-6;  // Verdict threshold.
  int worst = 10;           // Worst states listed.
  std::string solution_id;  // Reference for policy checks; empty = the current solution.
};
// A values or policy document, optionally with "tolerance", "worst" and "solution_id".
Result<VerifyRequest> DecodeVerifyRequest(std::string_view body);

// A simulation request (POST /v1/models/{id}/simulations): options, an optional start
// distribution ("start": {"<state>": p}; default the model's first state), an optional
// candidate "policy" (default the greedy policy of the solution "solution_id", or of the
// current solution) and "top_states". Every problem is listed with its pointer.
struct SimulateRequest {
  SimulateOptions options;
  std::optional<Policy> policy;
  std::string solution_id;
  int listed_states = 20;
};
Decoded<SimulateRequest> DecodeSimulateRequest(const Model& m, std::string_view body);

// The report of a solution: everything EncodeSolution gives except the per-state tables,
// plus its "id".
Json EncodeSolutionReport(const Model& m, const Solution& solution,
                          const std::string& solution_id);

Json EncodeModelRecord(const ModelRecord& record);
Json EncodeUpload(const UploadResult& upload);
Json EncodeJobView(const JobView& view);
Json EncodeSolutionRecord(const SolutionRecord& record);

// The stage a query is about, from its `stage` (0-based) or `periods_remaining` (horizon -
// stage) parameter, each empty when not given: finite-horizon solutions only, default 0.
// kInvalidArgument, saying why, for a parameter that is not a whole number in range, for
// both at once, or for either on a solution of another criterion.
Result<int64_t> ResolveStage(const Plan& plan, std::string_view stage,
                             std::string_view periods_remaining);

// Appends the best-action answer for state `s` of `plan` at `stage` (see the OpenAPI
// BestAction schema). REQUIRES: stage from ResolveStage.
void AppendBestAction(std::string& out, const Plan& plan, StateId s, int64_t stage = 0);
// The explain answer: the one-step lookahead of every action of state `s` at `stage`.
Json EncodeExplain(const Plan& plan, StateId s, int64_t stage = 0);

}  // namespace mdp::server

#endif  // MDP_SERVER_API_CODEC_H_
