#include "server/api_codec.h"

#include <algorithm>
#include <charconv>
#include <cmath>

#include "server/canonical.h"
#include "server/json_codec.h"

namespace mdp::server {
namespace {

Status Invalid(const std::string& pointer, const std::string& message) {
  return InvalidArgumentError(pointer + ": " + message);
}

Result<Json> ParseObject(std::string_view text) {
  JsonReadResult read = ReadJson(text, JsonReadOptions{});
  if (!read.errors.empty()) {
    return InvalidArgumentError(
        (read.errors.front().pointer.empty() ? "(document)" : read.errors.front().pointer) +
        ": " + read.errors.front().message);
  }
  if (!read.root.is_object()) return Invalid("(document)", "must be a JSON object");
  return std::move(read.root);
}

Status ReadDouble(const Json& obj, const char* key, const std::string& ptr, double* out) {
  auto it = obj.find(key);
  if (it == obj.end()) return Status::Ok();
  if (!it->is_number()) return Invalid(ptr + "/" + key, "must be a number");
  *out = it->get<double>();
  return Status::Ok();
}

Status ReadInt(const Json& obj, const char* key, const std::string& ptr, int64_t* out) {
  auto it = obj.find(key);
  if (it == obj.end()) return Status::Ok();
  if (!it->is_number_integer()) return Invalid(ptr + "/" + key, "must be an integer");
  *out = it->get<int64_t>();
  return Status::Ok();
}

Json NumberOrNull(double x) { return std::isfinite(x) ? Json(x) : Json(nullptr); }

}  // namespace

Result<SolveOptions> DecodeSolveOptions(const Json& json) {
  const std::string ptr = "/options";
  if (!json.is_object()) return Invalid(ptr, "must be an object");
  SolveOptions o;
  for (auto it = json.begin(); it != json.end(); ++it) {
    static const char* kKnown[] = {"method", "tolerance", "max_iterations", "time_limit_seconds",
                                   "evaluation_sweeps", "linear_solver", "tie_tolerance",
                                   "threads"};
    if (std::none_of(std::begin(kKnown), std::end(kKnown),
                     [&](const char* k) { return it.key() == k; })) {
      return Invalid(ptr + "/" + EscapePointerToken(it.key()), "unknown option");
    }
  }
  if (auto it = json.find("method"); it != json.end()) {
    std::optional<Method> m = it->is_string() ? ParseMethod(it->get<std::string>()) : std::nullopt;
    if (!m) {
      return Invalid(ptr + "/method", "must be one of auto, value_iteration, gauss_seidel, "
                                      "policy_iteration, modified_policy_iteration, "
                                      "relative_value_iteration, backward_induction");
    }
    o.method = *m;
  }
  if (auto it = json.find("linear_solver"); it != json.end()) {
    std::optional<LinearSolver> s =
        it->is_string() ? ParseLinearSolver(it->get<std::string>()) : std::nullopt;
    if (!s) return Invalid(ptr + "/linear_solver", "must be auto, direct, bicgstab or sweeps");
    o.linear_solver = *s;
  }
  int64_t threads = o.threads;
  MDP_RETURN_IF_ERROR(ReadDouble(json, "tolerance", ptr, &o.tolerance));
  MDP_RETURN_IF_ERROR(ReadInt(json, "max_iterations", ptr, &o.max_iterations));
  MDP_RETURN_IF_ERROR(ReadDouble(json, "time_limit_seconds", ptr, &o.time_limit_seconds));
  MDP_RETURN_IF_ERROR(ReadInt(json, "evaluation_sweeps", ptr, &o.evaluation_sweeps));
  MDP_RETURN_IF_ERROR(ReadDouble(json, "tie_tolerance", ptr, &o.tie_tolerance));
  MDP_RETURN_IF_ERROR(ReadInt(json, "threads", ptr, &threads));
  o.threads = static_cast<int>(std::clamp<int64_t>(threads, -1, 1 << 20));
  MDP_RETURN_IF_ERROR(CheckSolveOptions(o));
  return o;
}

Result<SolveOptions> DecodeSolveOptionsText(std::string_view text) {
  Result<Json> json = ParseObject(text);
  if (!json.ok()) return json.status();
  return DecodeSolveOptions(*json);
}

Result<SolveRequest> DecodeSolveRequest(std::string_view body) {
  Result<Json> json = ParseObject(body);
  if (!json.ok()) return json.status();
  SolveRequest request;
  for (auto it = json->begin(); it != json->end(); ++it) {
    if (it.key() != "model_id" && it.key() != "options") {
      return Invalid("/" + EscapePointerToken(it.key()), "unknown field");
    }
  }
  auto id = json->find("model_id");
  if (id == json->end() || !id->is_string()) {
    return Invalid("/model_id", "required: the id of an uploaded model");
  }
  request.model_id = id->get<std::string>();
  if (auto options = json->find("options"); options != json->end()) {
    Result<SolveOptions> decoded = DecodeSolveOptions(*options);
    if (!decoded.ok()) return decoded.status();
    request.options = *decoded;
  }
  return request;
}

Result<VerifyRequest> DecodeVerifyRequest(std::string_view body) {
  Result<Json> json = ParseObject(body);
  if (!json.ok()) return json.status();
  VerifyRequest request;
  const bool values = json->contains("values");
  const bool policy = json->contains("policy");
  if (values == policy) {
    return Invalid("(document)", "give exactly one of \"values\" or \"policy\"");
  }
  request.kind = values ? "values" : "policy";
  MDP_RETURN_IF_ERROR(ReadDouble(*json, "tolerance", "", &request.tolerance));
  if (!(request.tolerance >= 0.0 && std::isfinite(request.tolerance))) {
    return Invalid("/tolerance", "must be a finite number at least 0");
  }
  int64_t worst = request.worst;
  MDP_RETURN_IF_ERROR(ReadInt(*json, "worst", "", &worst));
  if (worst < 0 || worst > 10000) return Invalid("/worst", "must be between 0 and 10000");
  request.worst = static_cast<int>(worst);
  if (auto it = json->find("solution_id"); it != json->end()) {
    if (!it->is_string()) return Invalid("/solution_id", "must be a string");
    request.solution_id = it->get<std::string>();
  }
  return request;
}

Decoded<SimulateRequest> DecodeSimulateRequest(const Model& m, std::string_view body) {
  Decoded<SimulateRequest> out;
  JsonReadResult read = ReadJson(body, JsonReadOptions{});
  if (!read.errors.empty()) {
    out.errors = std::move(read.errors);
    return out;
  }
  const Json& root = read.root;
  if (!root.is_object()) {
    out.errors.push_back({"", "the request must be a JSON object"});
    return out;
  }
  static const char* kKnown[] = {"start", "policy", "solution_id", "episodes", "max_steps",
                                 "seed", "confidence", "quantiles", "top_states"};
  for (auto it = root.begin(); it != root.end(); ++it) {
    if (std::none_of(std::begin(kKnown), std::end(kKnown),
                     [&](const char* k) { return it.key() == k; })) {
      out.errors.push_back({"/" + EscapePointerToken(it.key()), "unknown field"});
    }
  }
  SimulateOptions& o = out.value.options;
  auto integer = [&](const char* key, int64_t low, int64_t high, int64_t* target) {
    auto it = root.find(key);
    if (it == root.end()) return;
    if (!it->is_number_integer() || it->get<int64_t>() < low || it->get<int64_t>() > high) {
      out.errors.push_back({std::string("/") + key, "must be an integer from " +
                                                        std::to_string(low) + " to " +
                                                        std::to_string(high)});
      return;
    }
    *target = it->get<int64_t>();
  };
  integer("episodes", 1, 100'000'000, &o.episodes);
  integer("max_steps", 1, 1'000'000'000, &o.max_steps);
  int64_t top = out.value.listed_states;
  integer("top_states", 0, 100'000, &top);
  out.value.listed_states = static_cast<int>(top);
  if (auto it = root.find("seed"); it != root.end()) {
    if (!it->is_number_unsigned()) {
      out.errors.push_back({"/seed", "must be a non-negative integer"});
    } else {
      o.seed = it->get<uint64_t>();
    }
  }
  if (auto it = root.find("confidence"); it != root.end()) {
    if (!it->is_number() || !(it->get<double>() > 0.0 && it->get<double>() < 1.0)) {
      out.errors.push_back({"/confidence", "must be a number strictly between 0 and 1"});
    } else {
      o.confidence = it->get<double>();
    }
  }
  if (auto it = root.find("quantiles"); it != root.end()) {
    o.quantiles.clear();
    if (!it->is_array() || it->size() > 100) {
      out.errors.push_back({"/quantiles", "must be an array of at most 100 levels"});
    } else {
      for (size_t i = 0; i < it->size(); ++i) {
        const Json& q = (*it)[i];
        if (!q.is_number() || !(q.get<double>() >= 0.0 && q.get<double>() <= 1.0)) {
          out.errors.push_back({"/quantiles/" + std::to_string(i), "must be between 0 and 1"});
        } else {
          o.quantiles.push_back(q.get<double>());
        }
      }
    }
  }
  if (auto it = root.find("solution_id"); it != root.end()) {
    if (!it->is_string()) {
      out.errors.push_back({"/solution_id", "must be a string"});
    } else {
      out.value.solution_id = it->get<std::string>();
    }
  }
  if (root.contains("start")) {
    Decoded<std::vector<StartWeight>> start = DecodeStartDistribution(m, body);
    for (auto& e : start.errors) out.errors.push_back(std::move(e));
    o.start = std::move(start.value);
  } else if (m.num_states() > 0) {
    o.start = {StartWeight{0, 1.0}};
  }
  if (root.contains("policy")) {
    Decoded<Policy> policy = DecodePolicy(m, body);
    for (auto& e : policy.errors) out.errors.push_back(std::move(e));
    out.value.policy = std::move(policy.value);
  }
  return out;
}

Json EncodeSolutionReport(const Model& m, const Solution& solution,
                          const std::string& solution_id) {
  Json report = EncodeSolution(m, solution, SolutionDetail::kSummary);
  report.erase("values");
  report.erase("policy");
  report["id"] = solution_id;
  return report;
}

Json EncodeModelRecord(const ModelRecord& r) {
  Json out = {{"id", r.id},
              {"name", r.name},
              {"states", r.states},
              {"actions", r.actions},
              {"state_actions", r.state_actions},
              {"outcomes", r.outcomes},
              {"created_at", r.created_at}};
  out["warnings"] = r.warnings_json.empty() ? Json::array() : Json::parse(r.warnings_json);
  return out;
}

Json EncodeUpload(const UploadResult& upload) {
  Json out = EncodeModelRecord(upload.record);
  out["created"] = upload.created;
  Json warnings = Json::array();
  for (const DocumentIssue& w : upload.warnings) {
    warnings.push_back({{"pointer", w.pointer}, {"message", w.message}});
  }
  out["warnings"] = std::move(warnings);
  return out;
}

Json EncodeJobView(const JobView& view) {
  const JobRecord& r = view.record;
  auto optional = [](const std::string& s) { return s.empty() ? Json(nullptr) : Json(s); };
  Json out = {{"id", r.id},
              {"kind", r.kind},
              {"model_id", r.model_id},
              {"status", JobStatusName(r.status)},
              {"created_at", r.created_at},
              {"started_at", optional(r.started_at)},
              {"finished_at", optional(r.finished_at)},
              {"solution_id", optional(r.solution_id)},
              {"error", optional(r.error)}};
  if (r.kind == "solve" && !r.request_json.empty()) out["options"] = Json::parse(r.request_json);
  if (!r.result_json.empty()) out["result"] = Json::parse(r.result_json);
  if (view.progress) {
    out["progress"] = {{"iteration", view.progress->iteration},
                       {"sweeps", view.progress->sweeps},
                       {"residual", NumberOrNull(view.progress->residual)},
                       {"error_bound", NumberOrNull(view.progress->error_bound)},
                       {"elapsed_seconds", view.progress->elapsed_seconds},
                       {"phase", view.phase}};
  } else {
    out["progress"] = nullptr;
  }
  return out;
}

Json EncodeSolutionRecord(const SolutionRecord& r) {
  Json out = r.report_json.empty() ? Json::object() : Json::parse(r.report_json);
  out["id"] = r.id;
  out["model_id"] = r.model_id;
  out["created_at"] = r.created_at;
  return out;
}

Result<int64_t> ResolveStage(const Plan& plan, std::string_view stage,
                             std::string_view periods_remaining) {
  if (stage.empty() && periods_remaining.empty()) return int64_t{0};
  const Solution& sol = *plan.solution;
  if (sol.criterion != CriterionKind::kFiniteHorizon) {
    return InvalidArgumentError(
        "'stage' and 'periods_remaining' apply only to finite-horizon models; this model's "
        "criterion is " + std::string(CriterionKindName(sol.criterion)));
  }
  if (!stage.empty() && !periods_remaining.empty()) {
    return InvalidArgumentError("give 'stage' or 'periods_remaining', not both");
  }
  const std::string_view text = stage.empty() ? periods_remaining : stage;
  int64_t n = -1;
  const auto [end, error] = std::from_chars(text.data(), text.data() + text.size(), n);
  const bool whole = error == std::errc() && end == text.data() + text.size();
  if (stage.empty()) {
    if (!whole || n < 1 || n > sol.horizon) {
      return InvalidArgumentError("periods_remaining must be a whole number from 1 to the horizon " +
                                  std::to_string(sol.horizon));
    }
    return sol.horizon - n;
  }
  if (!whole || n < 0 || n >= sol.horizon) {
    return InvalidArgumentError("stage must be a whole number from 0 to " +
                                std::to_string(sol.horizon - 1) + " (the horizon is " +
                                std::to_string(sol.horizon) + ")");
  }
  return n;
}

namespace {

// What a query answers in one state: the stored stage-0 fields, or a stage's decision.
struct StateView {
  double value = 0.0;
  const double* q = nullptr;          // Per row of the state, document order.
  const uint8_t* optimal = nullptr;
  RowId pick = -1;
  double action_gap = 0.0;
  StageDecision decision;             // Holds the arrays for stage > 0.
};

StateView ViewAt(const Plan& plan, StateId s, int64_t stage) {
  const Model& m = *plan.model;
  const Solution& sol = *plan.solution;
  StateView v;
  if (stage == 0) {
    v.value = sol.values[s];
    v.q = sol.q.data() + m.row_begin(s);
    v.optimal = sol.optimal_row.data() + m.row_begin(s);
    v.pick = sol.best_row[s];
    v.action_gap = sol.action_gap[s];
    return v;
  }
  v.decision = DecideAtStage(m, sol, stage, s);
  v.value = m.terminal(s) ? 0.0 : v.decision.value;
  v.q = v.decision.q.data();
  v.optimal = v.decision.optimal.data();
  v.pick = v.decision.pick;
  v.action_gap = v.decision.action_gap;
  return v;
}

}  // namespace

void AppendBestAction(std::string& out, const Plan& plan, StateId s, int64_t stage) {
  const Model& m = *plan.model;
  const Solution& sol = *plan.solution;
  const StateView view = ViewAt(plan, s, stage);
  const RowId begin = m.row_begin(s);
  out += "{\"state\":";
  AppendJsonString(out, m.state_name(s));
  out += ",\"terminal\":";
  out += m.terminal(s) ? "true" : "false";
  out += ",\"action\":";
  if (view.pick >= 0) {
    AppendJsonString(out, m.row_action_name(view.pick));
  } else {
    out += "null";
  }
  out += ",\"optimal_actions\":[";
  int64_t optimal = 0;
  for (RowId r = begin; r < m.row_end(s); ++r) {
    if (!view.optimal[r - begin]) continue;
    if (optimal++ > 0) out += ',';
    AppendJsonString(out, m.row_action_name(r));
  }
  out += "],\"value\":";
  AppendJsonNumber(out, view.value);
  out += ",\"q\":{";
  for (RowId r = begin; r < m.row_end(s); ++r) {
    if (r > begin) out += ',';
    AppendJsonString(out, m.row_action_name(r));
    out += ':';
    AppendJsonNumber(out, view.q[r - begin]);
  }
  out += "},\"action_gap\":";
  AppendJsonNumber(out, view.action_gap);  // null when NaN.
  out += ",\"tied\":";
  out += optimal >= 2 ? "true" : "false";
  out += ",\"value_error_bound\":";
  AppendJsonNumber(out, sol.value_error_bound);
  switch (sol.criterion) {
    case CriterionKind::kFiniteHorizon:
      out += ",\"stage\":" + std::to_string(stage) +
             ",\"periods_remaining\":" + std::to_string(sol.horizon - stage);
      break;
    case CriterionKind::kAverage:
      out += ",\"gain\":";
      AppendJsonNumber(out, sol.average.state_gain.empty() ? sol.average.gain
                                                           : sol.average.state_gain[s]);
      break;
    case CriterionKind::kTotal:
      out += ",\"reaches_goal\":";
      out += sol.total.reaches_goal.empty() || sol.total.reaches_goal[s] ? "true" : "false";
      out += ",\"expected_steps\":";
      AppendJsonNumber(out, sol.total.expected_steps.empty() ? 0.0 : sol.total.expected_steps[s]);
      break;
    case CriterionKind::kDiscounted: break;
  }
  out += ",\"solution_id\":";
  AppendJsonString(out, plan.solution_id);
  out += '}';
}

Json EncodeExplain(const Plan& plan, StateId s, int64_t stage) {
  const Model& m = *plan.model;
  const Solution& sol = *plan.solution;
  const StateView view = ViewAt(plan, s, stage);
  const int64_t n = m.num_states();
  // The values the lookahead uses: V1 of the solve, or those of the following stage.
  const double* next_values = sol.criterion == CriterionKind::kFiniteHorizon
                                  ? sol.stage_values.data() + (stage + 1) * n
                                  : sol.values.data();
  Json actions = Json::array();
  for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
    const double q = view.q[r - m.row_begin(s)];
    std::vector<std::pair<double, StateId>> next;
    for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
      next.emplace_back(m.entry_probability(e), m.entry_next(e));
    }
    std::sort(next.begin(), next.end(), [](auto& a, auto& b) { return a.first > b.first; });
    Json outcomes = Json::array();
    for (size_t i = 0; i < next.size() && i < 20; ++i) {
      outcomes.push_back({{"next", m.state_name(next[i].second)},
                          {"probability", next[i].first},
                          {"value", NumberOrNull(next_values[next[i].second])}});
    }
    // q = r(s, a) + the continuation term, so the term is q - r exactly as solved.
    actions.push_back({{"action", m.row_action_name(r)},
                       {"optimal", view.optimal[r - m.row_begin(s)] != 0},
                       {"expected_reward", m.row_reward(r)},
                       {"discounted_next_value", NumberOrNull(q - m.row_reward(r))},
                       {"q", NumberOrNull(q)},
                       {"next_states", static_cast<int64_t>(next.size())},
                       {"outcomes", std::move(outcomes)}});
  }
  Json out = {{"state", m.state_name(s)},
              {"terminal", m.terminal(s)},
              {"criterion", EncodeCriterion(m)},
              {"discount", m.discount()},
              {"objective", m.objective() == Objective::kMaximize ? "maximize" : "minimize"},
              {"value", NumberOrNull(view.value)},
              {"action", view.pick >= 0 ? Json(m.row_action_name(view.pick)) : Json(nullptr)},
              {"actions", std::move(actions)},
              {"solution_id", plan.solution_id}};
  if (sol.criterion == CriterionKind::kFiniteHorizon) {
    out["stage"] = stage;
    out["periods_remaining"] = sol.horizon - stage;
  }
  if (sol.criterion == CriterionKind::kAverage) {
    out["gain"] = NumberOrNull(sol.average.state_gain.empty() ? sol.average.gain
                                                              : sol.average.state_gain[s]);
  }
  return out;
}

}  // namespace mdp::server
