#include "server/json_codec.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <numeric>
#include <string>

namespace mdp::server {
namespace {

constexpr int64_t kMaxListedErrors = 100;

Json NumberOrNull(double x) { return std::isfinite(x) ? Json(x) : Json(nullptr); }

std::string_view ObjectiveName(Objective o) {
  return o == Objective::kMaximize ? "maximize" : "minimize";
}

Json ModelSummary(const Model& m) {
  Json out = {{"name", m.name()},
              {"states", m.num_states()},
              {"actions", m.num_actions()},
              {"state_actions", m.num_rows()},
              {"outcomes", m.num_outcomes_in_document()}};
  if (!m.reward_unit().empty()) out["reward_unit"] = m.reward_unit();
  return out;
}

Json StateMap(const Model& m, const std::vector<double>& values) {
  Json out = Json::object();
  for (StateId s = 0; s < m.num_states(); ++s) out[m.state_name(s)] = NumberOrNull(values[s]);
  return out;
}

Json StateEntry(const Model& m, const Solution& sol, StateId s) {
  Json q = Json::object();
  Json optimal = Json::array();
  for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
    q[m.row_action_name(r)] = NumberOrNull(sol.q[r]);
    if (sol.optimal_row[r]) optimal.push_back(m.row_action_name(r));
  }
  const RowId best = sol.best_row[s];
  Json out = {{"state", m.state_name(s)},
              {"terminal", m.terminal(s)},
              {"value", NumberOrNull(sol.values[s])},
              {"action", best >= 0 ? Json(m.row_action_name(best)) : Json(nullptr)},
              {"optimal_actions", std::move(optimal)},
              {"action_gap", NumberOrNull(sol.action_gap[s])},
              {"q", std::move(q)}};
  if (sol.criterion == CriterionKind::kTotal && !sol.total.reaches_goal.empty()) {
    out["reaches_goal"] = sol.total.reaches_goal[s] != 0;
    out["expected_steps"] = NumberOrNull(sol.total.expected_steps[s]);
  }
  if (sol.criterion == CriterionKind::kAverage && !sol.average.state_gain.empty()) {
    out["gain"] = NumberOrNull(sol.average.state_gain[s]);
  }
  return out;
}

constexpr size_t kListedNames = 100;

// Up to kListedNames state names, then a count of the rest.
Json NameList(const Model& m, const std::vector<StateId>& states) {
  Json names = Json::array();
  for (size_t i = 0; i < states.size() && i < kListedNames; ++i) {
    names.push_back(m.state_name(states[i]));
  }
  return names;
}

Json AverageBlock(const Model& m, const Solution& sol) {
  const Solution::AverageReport& a = sol.average;
  Json classes = Json::array();
  for (size_t i = 0; i < a.recurrent_classes.size() && i < kListedNames; ++i) {
    const auto& c = a.recurrent_classes[i];
    classes.push_back({{"states", NameList(m, c)}, {"size", c.size()}});
  }
  Json out = {{"gain", NumberOrNull(a.gain)},
              {"gain_lower", NumberOrNull(a.gain_lower)},
              {"gain_upper", NumberOrNull(a.gain_upper)},
              {"gain_error_bound", NumberOrNull((a.gain_upper - a.gain_lower) / 2)},
              {"reference_state", m.state_name(a.reference_state)},
              {"multichain", a.multichain},
              {"recurrent_class_count", a.recurrent_classes.size()},
              {"recurrent_classes", std::move(classes)},
              {"note", a.note}};
  if (!a.state_gain.empty()) out["state_gains"] = StateMap(m, a.state_gain);
  return out;
}

Json TotalBlock(const Model& m, const Solution& sol) {
  std::vector<StateId> stuck;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (!sol.total.reaches_goal.empty() && !sol.total.reaches_goal[s]) stuck.push_back(s);
  }
  int64_t goals = 0;
  for (StateId s = 0; s < m.num_states(); ++s) goals += m.terminal(s) ? 1 : 0;
  return {{"goal_states", goals},
          {"states_not_reaching_goal", sol.total.states_not_reaching_goal},
          {"not_reaching_goal", NameList(m, stuck)},
          {"max_expected_steps", NumberOrNull(sol.total.max_expected_steps)}};
}


void AddError(std::vector<DocumentIssue>& errors, std::string pointer, std::string message) {
  if (static_cast<int64_t>(errors.size()) < kMaxListedErrors) {
    errors.push_back({std::move(pointer), std::move(message)});
  }
}

// Reads `text` and returns the object member `member` ("values" or "policy"), checking the
// document's format is `own_format` or a solution document. Null on error.
const Json* OpenCandidate(const Json& root, std::string_view member, std::string_view own_format,
                          std::vector<DocumentIssue>& errors) {
  if (!root.is_object()) {
    AddError(errors, "", "the document must be a JSON object");
    return nullptr;
  }
  auto format = root.find("format");
  if (format != root.end() && !(format->is_string() && (*format == own_format ||
                                                        *format == "mdpserve/solution@1"))) {
    AddError(errors, "/format", "must be '" + std::string(own_format) + "'");
    return nullptr;
  }
  auto it = root.find(member);
  if (it == root.end() || !it->is_object()) {
    AddError(errors, "/" + std::string(member),
             it == root.end() ? "required field is missing" : "must be an object");
    return nullptr;
  }
  return &*it;
}

// Reports states of `m` missing from `map` (terminal states may be missing).
void CheckCoverage(const Model& m, const Json& map, std::string_view member,
                   std::vector<DocumentIssue>& errors) {
  int64_t missing = 0;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (m.terminal(s) || map.contains(m.state_name(s))) continue;
    if (++missing <= 10) {
      AddError(errors, "/" + std::string(member), "no entry for state '" + m.state_name(s) + "'");
    }
  }
  if (missing > 10) {
    AddError(errors, "/" + std::string(member),
             std::to_string(missing - 10) + " more states have no entry");
  }
}

// Sets the row probabilities of state s from one policy entry.
void ReadPolicyEntry(const Model& m, StateId s, const Json& entry, const std::string& ptr,
                     Policy& policy, std::vector<DocumentIssue>& errors) {
  if (m.terminal(s)) {
    AddError(errors, ptr, "state is terminal and takes no action");
    return;
  }
  auto set = [&](const std::string& action, double p, const std::string& where) {
    std::optional<RowId> row = m.FindRow(s, action);
    if (!row) {
      AddError(errors, where, "action '" + action + "' is not available in this state");
      return;
    }
    policy.row_probability[*row] = p;
  };
  if (entry.is_string()) {
    set(entry.get<std::string>(), 1.0, ptr);
    return;
  }
  if (!entry.is_object()) {
    AddError(errors, ptr, "must be an action name or an object of action probabilities");
    return;
  }
  for (auto it = entry.begin(); it != entry.end(); ++it) {
    const std::string where = ptr + "/" + EscapePointerToken(it.key());
    if (!it->is_number() || !std::isfinite(it->get<double>())) {
      AddError(errors, where, "probability must be a finite number");
      continue;
    }
    const double p = it->get<double>();
    if (p < 0.0 || p > 1.0) {
      AddError(errors, where, "probability must be between 0 and 1");
      continue;
    }
    set(it.key(), p, where);
  }
}

}  // namespace

Json EncodeCriterion(const Model& m) {
  const Criterion& c = m.criterion();
  Json out = {{"kind", CriterionKindName(c.kind)}};
  if (c.kind == CriterionKind::kDiscounted || c.kind == CriterionKind::kFiniteHorizon) {
    out["discount"] = c.discount;
  }
  if (c.kind == CriterionKind::kFiniteHorizon) {
    out["horizon"] = c.horizon;
    Json values = Json::object();
    for (size_t s = 0; s < c.terminal_values.size(); ++s) {
      if (c.terminal_values[s] != 0.0) values[m.state_name(static_cast<StateId>(s))] = c.terminal_values[s];
    }
    if (!values.empty()) out["terminal_values"] = std::move(values);
  }
  return out;
}

Json EncodeSolveOptions(const SolveOptions& o) {
  return {{"tolerance", o.tolerance},
          {"max_iterations", o.max_iterations},
          {"time_limit_seconds", o.time_limit_seconds},
          {"evaluation_sweeps", o.evaluation_sweeps},
          {"linear_solver", LinearSolverName(o.linear_solver)},
          {"tie_tolerance", o.tie_tolerance},
          {"threads", o.threads}};
}

Json EncodeSolution(const Model& m, const Solution& sol, SolutionDetail detail) {
  Json gaps = Json::array();
  for (const auto& [s, gap] : SmallestGaps(m, sol, 10)) {
    gaps.push_back({{"state", m.state_name(s)}, {"gap", gap}});
  }
  Json policy = Json::object();
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (sol.best_row[s] >= 0) policy[m.state_name(s)] = m.row_action_name(sol.best_row[s]);
  }
  Json out = {{"format", "mdpserve/solution@1"},
              {"model", ModelSummary(m)},
              {"objective", ObjectiveName(m.objective())},
              {"criterion", EncodeCriterion(m)},
              {"method", MethodName(sol.method)},
              {"options", EncodeSolveOptions(sol.options)},
              {"outcome", SolveOutcomeName(sol.outcome)},
              {"iterations", sol.iterations},
              {"sweeps", sol.sweeps},
              {"residual", NumberOrNull(sol.residual)},
              {"value_error_bound", NumberOrNull(sol.value_error_bound)},
              {"q_error_bound", NumberOrNull(sol.q_error_bound)},
              {"policy_loss_bound", NumberOrNull(sol.policy_loss_bound)},
              {"tie_tolerance", sol.tie_tolerance},
              {"solve_seconds", sol.solve_seconds},
              {"tied_states", sol.tied_states},
              {"smallest_gaps", std::move(gaps)},
              {"values", StateMap(m, sol.values)},
              {"policy", std::move(policy)}};
  switch (sol.criterion) {
    case CriterionKind::kAverage: out["average"] = AverageBlock(m, sol); break;
    case CriterionKind::kTotal: out["total"] = TotalBlock(m, sol); break;
    case CriterionKind::kFiniteHorizon:
      out["finite_horizon"] = {{"horizon", sol.horizon},
                               {"stage", sol.stage},
                               {"periods_remaining", sol.horizon - sol.stage}};
      break;
    case CriterionKind::kDiscounted: break;
  }
  if (detail == SolutionDetail::kFull) {
    Json states = Json::array();
    for (StateId s = 0; s < m.num_states(); ++s) states.push_back(StateEntry(m, sol, s));
    out["states"] = std::move(states);
  }
  return out;
}

Json EncodeValuesReport(const Model& m, const ValuesReport& report) {
  Json worst = Json::array();
  for (const StateResidual& w : report.worst) {
    worst.push_back({{"state", m.state_name(w.state)},
                     {"residual", NumberOrNull(w.residual)},
                     {"candidate", NumberOrNull(w.candidate)},
                     {"backup", NumberOrNull(w.backup)}});
  }
  Json out = {{"format", "mdpserve/verification@1"},
              {"kind", "values"},
              {"criterion", CriterionKindName(report.criterion)},
              {"verdict", report.pass ? "pass" : "fail"},
              {"tolerance", report.tolerance},
              {"max_residual", NumberOrNull(report.max_residual)},
              {"value_error_bound", NumberOrNull(report.value_error_bound)},
              {"greedy_policy_loss_bound", NumberOrNull(report.greedy_policy_loss_bound)},
              {"worst_states", std::move(worst)},
              {"residuals", StateMap(m, report.residuals)}};
  switch (report.criterion) {
    case CriterionKind::kAverage:
      out["gain_lower"] = NumberOrNull(report.gain_lower);
      out["gain_upper"] = NumberOrNull(report.gain_upper);
      break;
    case CriterionKind::kTotal:
      out["states_not_reaching_goal"] = report.states_not_reaching_goal;
      [[fallthrough]];
    case CriterionKind::kFiniteHorizon:
      out["reference_distance"] = NumberOrNull(report.reference_distance);
      out["reference_error_bound"] = NumberOrNull(report.reference_error_bound);
      break;
    case CriterionKind::kDiscounted: break;
  }
  return out;
}

Json EncodePolicyReport(const Model& m, const PolicyReport& report) {
  Json worst = Json::array();
  for (const StateLoss& w : report.worst) {
    worst.push_back({{"state", m.state_name(w.state)},
                     {"loss", NumberOrNull(w.loss)},
                     {"value", NumberOrNull(w.value)},
                     {"optimal_value", NumberOrNull(w.optimal_value)}});
  }
  Json suboptimal = Json::array();
  for (const SuboptimalChoice& c : report.suboptimal) {
    Json chosen = Json::array();
    Json optimal = Json::array();
    for (RowId r : c.chosen) chosen.push_back(m.row_action_name(r));
    for (RowId r : c.optimal) optimal.push_back(m.row_action_name(r));
    suboptimal.push_back({{"state", m.state_name(c.state)},
                          {"chosen", std::move(chosen)},
                          {"optimal_actions", std::move(optimal)}});
  }
  Json improper = Json::array();
  for (size_t i = 0; i < report.improper_states.size() && i < kListedNames; ++i) {
    improper.push_back(m.state_name(report.improper_states[i]));
  }
  return {{"format", "mdpserve/verification@1"},
          {"kind", "policy"},
          {"criterion", CriterionKindName(report.criterion)},
          {"verdict", report.pass ? "pass" : "fail"},
          {"tolerance", report.tolerance},
          {"max_loss", NumberOrNull(report.max_loss)},
          {"evaluation_error_bound", NumberOrNull(report.evaluation_error_bound)},
          {"optimal_value_error_bound", NumberOrNull(report.optimal_value_error_bound)},
          {"improper_states", std::move(improper)},
          {"improper_count", report.improper_count},
          {"linear_solver", LinearSolverName(report.solver_used)},
          {"worst_states", std::move(worst)},
          {"suboptimal_states", std::move(suboptimal)},
          {"suboptimal_count", report.suboptimal_count},
          {"values", StateMap(m, report.values)},
          {"losses", StateMap(m, report.losses)}};
}

Json EncodeEvaluation(const Model& m, const PolicyValues& values) {
  return {{"format", "mdpserve/evaluation@1"},
          {"criterion", "discounted"},
          {"linear_solver", LinearSolverName(values.solver_used)},
          {"residual", values.residual},
          {"value_error_bound", values.value_error_bound},
          {"iterations", values.iterations},
          {"values", StateMap(m, values.values)}};
}

Json EncodeCriterionEvaluation(const Model& m, const CriterionValues& v) {
  Json out = {{"format", "mdpserve/evaluation@1"},
              {"criterion", CriterionKindName(v.criterion)},
              {"linear_solver", LinearSolverName(v.solver_used)},
              {"residual", NumberOrNull(v.residual)},
              {"value_error_bound", NumberOrNull(v.value_error_bound)},
              {"iterations", 0},
              {"values", StateMap(m, v.values)}};
  if (v.criterion == CriterionKind::kAverage) {
    out["gains"] = StateMap(m, v.gains);
    out["gain_error_bound"] = NumberOrNull(v.gain_error_bound);
    Json classes = Json::array();
    for (size_t i = 0; i < v.recurrent_classes.size() && i < kListedNames; ++i) {
      classes.push_back({{"states", NameList(m, v.recurrent_classes[i])},
                         {"size", v.recurrent_classes[i].size()}});
    }
    out["recurrent_classes"] = std::move(classes);
  }
  if (v.criterion == CriterionKind::kTotal) {
    out["expected_steps"] = StateMap(m, v.expected_steps);
    out["improper_states"] = NameList(m, v.improper_states);
    out["improper_count"] = v.improper_states.size();
  }
  return out;
}

Json EncodeComparison(const ComparisonReport& r) {
  auto state = [](const StateComparison& c) {
    auto pick = [](const std::string& a) { return a.empty() ? Json(nullptr) : Json(a); };
    return Json{{"state", c.state},
                {"value_a", NumberOrNull(c.value_a)},
                {"value_b", NumberOrNull(c.value_b)},
                {"value_difference", NumberOrNull(c.value_b - c.value_a)},
                {"optimal_actions_a", c.optimal_a},
                {"optimal_actions_b", c.optimal_b},
                {"action_a", pick(c.pick_a)},
                {"action_b", pick(c.pick_b)}};
  };
  Json set_changes = Json::array();
  for (const StateComparison& c : r.optimal_set_changes) set_changes.push_back(state(c));
  Json largest = Json::array();
  for (const StateComparison& c : r.largest_value_changes) largest.push_back(state(c));
  return {{"format", "mdpserve/comparison@1"},
          {"same_objective", r.same_objective},
          {"same_discount", r.same_discount},
          {"same_criterion", r.same_criterion},
          {"criterion_a", CriterionKindName(r.criterion_a)},
          {"criterion_b", CriterionKindName(r.criterion_b)},
          {"values_comparable", r.values_comparable},
          {"states_a", r.states_a},
          {"states_b", r.states_b},
          {"common_states", r.common_states},
          {"only_in_a", r.only_in_a},
          {"only_in_b", r.only_in_b},
          {"only_in_a_count", r.only_in_a_count},
          {"only_in_b_count", r.only_in_b_count},
          {"actions_changed_count", r.actions_changed_count},
          {"optimal_set_changed_count", r.optimal_set_changed_count},
          {"action_changed_count", r.pick_changed_count},
          {"value_changed_count", r.value_changed_count},
          {"value_margin", NumberOrNull(r.value_margin)},
          {"max_abs_value_difference", r.max_abs_value_difference},
          {"mean_abs_value_difference", r.mean_abs_value_difference},
          {"optimal_set_changes", std::move(set_changes)},
          {"largest_value_changes", std::move(largest)}};
}

namespace {

// The `listed` most visited states (most visits first, ties in model order), and the share of
// steps spent in the others.
Json VisitSummary(const Model& m, const SimulationReport& r, int listed) {
  std::vector<StateId> visited;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (r.visits[s] > 0) visited.push_back(s);
  }
  const size_t shown = std::min(visited.size(), static_cast<size_t>(std::max(0, listed)));
  std::partial_sort(visited.begin(), visited.begin() + shown, visited.end(),
                    [&](StateId a, StateId b) {
                      return r.visits[a] != r.visits[b] ? r.visits[a] > r.visits[b] : a < b;
                    });
  Json top = Json::array();
  int64_t listed_steps = 0;
  for (size_t i = 0; i < shown; ++i) {
    const StateId s = visited[i];
    listed_steps += r.visits[s];
    top.push_back({{"state", m.state_name(s)},
                   {"visits", r.visits[s]},
                   {"frequency", r.visit_frequency[s]}});
  }
  const double rest = r.total_steps > 0
                          ? static_cast<double>(r.total_steps - listed_steps) / r.total_steps
                          : 0.0;
  return {{"total_steps", r.total_steps},
          {"states_visited", static_cast<int64_t>(visited.size())},
          {"most_visited", std::move(top)},
          {"unlisted_frequency", rest}};
}

Json StartMap(const Model& m, const std::vector<StartWeight>& start) {
  Json out = Json::object();
  for (const StartWeight& w : start) {
    const std::string& name = m.state_name(w.state);
    out[name] = (out.contains(name) ? out[name].get<double>() : 0.0) + w.probability;
  }
  return out;
}

}  // namespace

namespace {

// What one simulated episode's return adds up, per criterion.
std::string_view ReturnKind(CriterionKind kind) {
  switch (kind) {
    case CriterionKind::kDiscounted: return "discounted_sum";
    case CriterionKind::kAverage: return "reward_per_step";
    case CriterionKind::kFiniteHorizon: return "horizon_sum";
    case CriterionKind::kTotal: return "total_until_goal";
  }
  return "discounted_sum";
}

}  // namespace

Json EncodeSimulation(const Model& m, const SimulateOptions& options,
                      const SimulationReport& r, int listed_states) {
  Json levels = Json::array();
  for (double q : options.quantiles) levels.push_back(q);
  Json quantiles = Json::array();
  for (const QuantileValue& q : r.quantiles) {
    quantiles.push_back({{"level", q.level}, {"value", NumberOrNull(q.value)}});
  }
  const Json ret = {{"mean", NumberOrNull(r.mean)},
                    {"std_dev", NumberOrNull(r.std_dev)},
                    {"std_error", NumberOrNull(r.std_error)},
                    {"confidence_interval", {{"level", options.confidence},
                                             {"low", NumberOrNull(r.ci_low)},
                                             {"high", NumberOrNull(r.ci_high)}}},
                    {"min", NumberOrNull(r.min)},
                    {"max", NumberOrNull(r.max)},
                    {"quantiles", std::move(quantiles)}};
  return {{"format", "mdpserve/simulation@1"},
          {"model", ModelSummary(m)},
          {"objective", ObjectiveName(m.objective())},
          {"criterion", EncodeCriterion(m)},
          {"options", {{"start", StartMap(m, options.start)},
                       {"episodes", options.episodes},
                       {"max_steps", options.max_steps},
                       {"seed", options.seed},
                       {"confidence", options.confidence},
                       {"quantiles", std::move(levels)}}},
          {"outcome", SimulationOutcomeName(r.outcome)},
          {"episodes", r.episodes},
          {"return", ret},
          {"episode_length", {{"mean", NumberOrNull(r.mean_length)},
                              {"truncated_episodes", r.truncated_episodes}}},
          {"return_kind", ReturnKind(m.criterion().kind)},
          {"truncation_bound", NumberOrNull(r.truncation_bound)},
          {"truncation_bias_bound", NumberOrNull(r.truncation_bias_bound)},
          {"visits", VisitSummary(m, r, listed_states)},
          {"simulate_seconds", r.elapsed_seconds}};
}

Json EncodeIssues(const std::vector<DocumentIssue>& errors,
                  const std::vector<DocumentIssue>& warnings, int64_t errors_not_listed) {
  auto list = [](const std::vector<DocumentIssue>& issues) {
    Json out = Json::array();
    for (const auto& i : issues) out.push_back({{"pointer", i.pointer}, {"message", i.message}});
    return out;
  };
  return {{"format", "mdpserve/errors@1"},
          {"errors", list(errors)},
          {"warnings", list(warnings)},
          {"truncated", errors_not_listed}};
}

Decoded<std::vector<double>> DecodeValues(const Model& m, std::string_view text) {
  Decoded<std::vector<double>> out;
  JsonReadResult read = ReadJson(text, JsonReadOptions{});
  if (!read.errors.empty()) {
    out.errors = std::move(read.errors);
    return out;
  }
  const Json* map = OpenCandidate(read.root, "values", "mdpserve/values@1", out.errors);
  if (map == nullptr) return out;
  out.value.assign(m.num_states(), 0.0);
  for (auto it = map->begin(); it != map->end(); ++it) {
    const std::string ptr = "/values/" + EscapePointerToken(it.key());
    std::optional<StateId> s = m.FindState(it.key());
    if (!s) {
      AddError(out.errors, ptr, "the model has no state '" + it.key() + "'");
    } else if (it->is_null() && m.criterion().kind == CriterionKind::kTotal) {
      // Total reward: null marks a state that cannot reach a goal (no value), as solutions do.
      out.value[*s] = std::numeric_limits<double>::quiet_NaN();
    } else if (!it->is_number() || !std::isfinite(it->get<double>())) {
      AddError(out.errors, ptr, "value must be a finite number");
    } else if (m.terminal(*s) && it->get<double>() != 0.0) {
      AddError(out.errors, ptr, "a terminal state's value is 0");
    } else {
      out.value[*s] = it->get<double>();
    }
  }
  CheckCoverage(m, *map, "values", out.errors);
  return out;
}

Decoded<Policy> DecodePolicy(const Model& m, std::string_view text) {
  Decoded<Policy> out;
  JsonReadResult read = ReadJson(text, JsonReadOptions{});
  if (!read.errors.empty()) {
    out.errors = std::move(read.errors);
    return out;
  }
  const Json* map = OpenCandidate(read.root, "policy", "mdpserve/policy@1", out.errors);
  if (map == nullptr) return out;
  out.value.row_probability.assign(m.num_rows(), 0.0);
  for (auto it = map->begin(); it != map->end(); ++it) {
    const std::string ptr = "/policy/" + EscapePointerToken(it.key());
    std::optional<StateId> s = m.FindState(it.key());
    if (!s) {
      AddError(out.errors, ptr, "the model has no state '" + it.key() + "'");
      continue;
    }
    ReadPolicyEntry(m, *s, *it, ptr, out.value, out.errors);
  }
  if (m.criterion().kind == CriterionKind::kTotal) {
    // Solutions leave out states that cannot reach a goal (no action is better there); a
    // state left out chooses uniformly among its actions, and verification reports it if
    // that fails to reach a goal where the optimum does.
    for (StateId st = 0; st < m.num_states(); ++st) {
      if (m.terminal(st) || map->contains(m.state_name(st))) continue;
      const double share = 1.0 / static_cast<double>(m.row_end(st) - m.row_begin(st));
      for (RowId r = m.row_begin(st); r < m.row_end(st); ++r) out.value.row_probability[r] = share;
    }
  } else {
    CheckCoverage(m, *map, "policy", out.errors);
  }
  if (out.errors.empty()) {
    Status status = CheckPolicy(m, out.value);
    if (!status.ok()) AddError(out.errors, "/policy", status.message());
  }
  return out;
}

Decoded<std::vector<StartWeight>> DecodeStartDistribution(const Model& m, std::string_view text) {
  Decoded<std::vector<StartWeight>> out;
  JsonReadResult read = ReadJson(text, JsonReadOptions{});
  if (!read.errors.empty()) {
    out.errors = std::move(read.errors);
    return out;
  }
  const Json* map = OpenCandidate(read.root, "start", "mdpserve/start@1", out.errors);
  if (map == nullptr) return out;
  double sum = 0.0;
  for (auto it = map->begin(); it != map->end(); ++it) {
    const std::string ptr = "/start/" + EscapePointerToken(it.key());
    std::optional<StateId> s = m.FindState(it.key());
    if (!s) {
      AddError(out.errors, ptr, "the model has no state '" + it.key() + "'");
    } else if (!it->is_number() || !std::isfinite(it->get<double>()) ||
               it->get<double>() < 0.0 || it->get<double>() > 1.0) {
      AddError(out.errors, ptr, "probability must be a number between 0 and 1");
    } else {
      out.value.push_back({*s, it->get<double>()});
      sum += it->get<double>();
    }
  }
  if (out.errors.empty() && out.value.empty()) {
    AddError(out.errors, "/start", "needs at least one state");
  } else if (out.errors.empty() && std::fabs(sum - 1.0) > kStartSumTolerance) {
    AddError(out.errors, "/start", "probabilities sum to " + std::to_string(sum) + ", not 1");
  }
  return out;
}

}  // namespace mdp::server
