#include "server/cli.h"

#include <CLI/CLI.hpp>
#include <cstdio>
#include <iomanip>
#include <iostream>
#include <optional>
#include <ostream>
#include <sstream>
#include <string>
#include <unistd.h>

#include "server/file_io.h"
#include "server/json_codec.h"
#include "server/model_codec.h"
#include "server/serve.h"

namespace mdp::server {
namespace {

void PrintIssues(std::ostream& err, const std::string& path,
                 const std::vector<DocumentIssue>& issues, std::string_view kind) {
  for (const DocumentIssue& i : issues) {
    err << path << ": " << (i.pointer.empty() ? "(document)" : i.pointer) << ": " << kind
        << i.message << "\n";
  }
}

// Reads and decodes a model; prints problems to `err`. Nullopt iff the model is unusable.
std::optional<Model> LoadModel(const std::string& path, std::ostream& err, bool quiet_warnings,
                               ModelDecodeResult* full = nullptr) {
  Result<FileText> text = FileText::Open(path);  // Mapped, not copied: documents can be GBs.
  if (!text.ok()) {
    err << "mdpserve: " << text.status().message() << "\n";
    return std::nullopt;
  }
  ModelDecodeResult decoded = DecodeModel(text->text());
  PrintIssues(err, path, decoded.errors, "");
  if (decoded.errors_not_listed > 0) {
    err << path << ": " << decoded.errors_not_listed << " more errors not listed\n";
  }
  if (!quiet_warnings) PrintIssues(err, path, decoded.warnings, "warning: ");
  std::optional<Model> model = std::move(decoded.model);
  if (full != nullptr) *full = std::move(decoded);
  return model;
}

Status Emit(const Json& doc, const std::string& out_path, std::ostream& out) {
  const std::string text = DumpJson(doc, 2) + "\n";
  if (out_path.empty() || out_path == "-") {
    out << text;
    return Status::Ok();
  }
  return WriteFileAtomically(out_path, text);
}

const std::vector<std::string> kMethodNames = {
    "auto", "value_iteration", "gauss_seidel", "policy_iteration", "modified_policy_iteration",
    "relative_value_iteration", "backward_induction"};
constexpr const char* kMethodHelp =
    "auto (the criterion's default) | value_iteration | gauss_seidel | policy_iteration | "
    "modified_policy_iteration (discounted) | relative_value_iteration (average) | "
    "backward_induction (finite_horizon)";

std::string Fixed(double x) {
  std::ostringstream s;
  s << std::setprecision(10) << x;
  return s.str();
}

// A human-readable policy table: one line per state.
void PrintTable(const Model& m, const Solution& sol, std::ostream& out) {
  size_t width = 5;
  for (StateId s = 0; s < m.num_states(); ++s) width = std::max(width, m.state_name(s).size());
  out << std::left << std::setw(static_cast<int>(width)) << "state" << "  "
      << std::setw(14) << "value" << "  " << std::setw(16) << "action"
      << "  " << std::setw(12) << "action gap" << "  tied with\n";
  for (StateId s = 0; s < m.num_states(); ++s) {
    const RowId best = sol.best_row[s];
    std::string tied;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      if (sol.optimal_row[r] && r != best) tied += (tied.empty() ? "" : ", ") + m.row_action_name(r);
    }
    const double gap = sol.action_gap[s];
    out << std::left << std::setw(static_cast<int>(width)) << m.state_name(s) << "  "
        << std::setw(14) << (std::isnan(sol.values[s]) ? std::string("-") : Fixed(sol.values[s]))
        << "  " << std::setw(16)
        << (best >= 0          ? m.row_action_name(best)
            : m.terminal(s)    ? std::string("(terminal)")
                               : std::string("(no goal)"))
        << "  "
        << std::setw(12) << (std::isnan(gap) ? std::string("-") : Fixed(gap)) << "  "
        << tied << "\n";
  }
  const std::string unit = m.reward_unit().empty() ? "" : " (" + m.reward_unit() + ")";
  out << "outcome " << SolveOutcomeName(sol.outcome) << " after " << sol.iterations
      << " iterations; ";
  switch (sol.criterion) {
    case CriterionKind::kAverage:
      out << "gain " << Fixed(sol.average.gain) << " per step, within "
          << (sol.average.gain_upper - sol.average.gain_lower) / 2 << unit
          << "; values are the bias (0 at " << m.state_name(sol.average.reference_state)
          << ")\n";
      if (!sol.average.note.empty()) out << sol.average.note << "\n";
      return;
    case CriterionKind::kFiniteHorizon:
      out << "stage " << sol.stage << " of a " << sol.horizon << "-period horizon ("
          << sol.horizon - sol.stage << " periods to go); exact up to rounding" << unit << "\n";
      return;
    case CriterionKind::kTotal:
      out << "values within " << sol.value_error_bound << " of optimal" << unit
          << "; at most " << Fixed(sol.total.max_expected_steps)
          << " expected steps to a goal; " << sol.total.states_not_reaching_goal
          << " states cannot reach a goal with certainty\n";
      return;
    case CriterionKind::kDiscounted:
      out << "values within " << sol.value_error_bound << " of optimal" << unit << "\n";
      return;
  }
}

struct SolveArgs {
  std::string model, out, method = "auto", linear_solver = "auto", detail = "full";
  SolveOptions options;
  bool table = false;
  int64_t stage = 0;
};

int RunSolve(const SolveArgs& args, std::ostream& out, std::ostream& err) {
  SolveOptions options = args.options;
  std::optional<Method> method = ParseMethod(args.method);
  std::optional<LinearSolver> linear = ParseLinearSolver(args.linear_solver);
  if (!method || !linear) {
    err << "mdpserve: unknown --method or --linear-solver\n";
    return kExitBadInput;
  }
  options.method = *method;
  options.linear_solver = *linear;
  std::optional<Model> model = LoadModel(args.model, err, false);
  if (!model) return kExitBadInput;
  Result<Solution> solution = Solve(*model, options);
  if (!solution.ok()) {
    err << "mdpserve: " << solution.status().message() << "\n";
    return kExitBadInput;
  }
  if (solution->outcome != SolveOutcome::kConverged) {
    err << "mdpserve: warning: solve stopped before the tolerance was met ("
        << SolveOutcomeName(solution->outcome) << "); bounds in the output still hold\n";
  }
  if (args.stage != 0) {
    if (solution->criterion != CriterionKind::kFiniteHorizon || args.stage < 0 ||
        args.stage >= solution->horizon) {
      err << "mdpserve: --stage applies to finite-horizon models only, from 0 to the horizon "
             "minus 1\n";
      return kExitBadInput;
    }
    *solution = SolutionAtStage(*model, *solution, args.stage);
  }
  if (args.table) {
    PrintTable(*model, *solution, out);
    if (args.out.empty()) return kExitOk;
  }
  const SolutionDetail detail =
      args.detail == "summary" ? SolutionDetail::kSummary : SolutionDetail::kFull;
  Status written = Emit(EncodeSolution(*model, *solution, detail), args.out, out);
  if (!written.ok()) {
    err << "mdpserve: " << written.message() << "\n";
    return kExitBadInput;
  }
  return kExitOk;
}

int RunValidate(const std::string& path, std::ostream& out, std::ostream& err) {
  ModelDecodeResult decoded;
  std::optional<Model> model = LoadModel(path, err, false, &decoded);
  (void)Emit(EncodeIssues(decoded.errors, decoded.warnings, decoded.errors_not_listed), "", out);
  return model ? kExitOk : kExitBadInput;
}

struct VerifyArgs {
  std::string model, values, policy;
  VerifyOptions options;
};

// Solves `m` tightly for use as the optimal reference.
Result<Solution> ReferenceSolution(const Model& m) {
  SolveOptions options;
  options.tolerance = 1e-10;
  return Solve(m, options);
}

int RunVerify(const VerifyArgs& args, std::ostream& out, std::ostream& err) {
  if (args.values.empty() == args.policy.empty()) {
    err << "mdpserve: verify needs exactly one of --values FILE or --policy FILE\n";
    return kExitBadInput;
  }
  std::optional<Model> model = LoadModel(args.model, err, true);
  if (!model) return kExitBadInput;
  const std::string& path = args.values.empty() ? args.policy : args.values;
  Result<std::string> text = ReadWholeFile(path);
  if (!text.ok()) {
    err << "mdpserve: " << text.status().message() << "\n";
    return kExitBadInput;
  }
  if (!args.values.empty()) {
    Decoded<std::vector<double>> values = DecodeValues(*model, *text);
    if (!values.ok()) {
      PrintIssues(err, path, values.errors, "");
      return kExitBadInput;
    }
    // Total reward and finite horizon measure the candidate against a fresh solve.
    const CriterionKind kind = model->criterion().kind;
    Result<ValuesReport> report = ValuesReport{};
    if (kind == CriterionKind::kTotal || kind == CriterionKind::kFiniteHorizon) {
      Result<Solution> reference = ReferenceSolution(*model);
      if (!reference.ok()) {
        err << "mdpserve: " << reference.status().message() << "\n";
        return kExitBadInput;
      }
      report = VerifyValues(*model, values.value, *reference, args.options);
    } else {
      report = VerifyValues(*model, values.value, args.options);
    }
    if (!report.ok()) {
      err << "mdpserve: " << report.status().message() << "\n";
      return kExitBadInput;
    }
    (void)Emit(EncodeValuesReport(*model, *report), "", out);
    return report->pass ? kExitOk : kExitVerdictFailed;
  }
  Decoded<Policy> policy = DecodePolicy(*model, *text);
  if (!policy.ok()) {
    PrintIssues(err, path, policy.errors, "");
    return kExitBadInput;
  }
  Result<Solution> reference = ReferenceSolution(*model);
  if (!reference.ok()) {
    err << "mdpserve: " << reference.status().message() << "\n";
    return kExitBadInput;
  }
  Result<PolicyReport> report = VerifyPolicy(*model, policy.value, *reference, args.options);
  if (!report.ok()) {
    err << "mdpserve: " << report.status().message() << "\n";
    return kExitBadInput;
  }
  (void)Emit(EncodePolicyReport(*model, *report), "", out);
  return report->pass ? kExitOk : kExitVerdictFailed;
}

struct EvaluateArgs {
  std::string model, policy, linear_solver = "auto";
};

int RunEvaluate(const EvaluateArgs& args, std::ostream& out, std::ostream& err) {
  std::optional<LinearSolver> linear = ParseLinearSolver(args.linear_solver);
  if (!linear) {
    err << "mdpserve: unknown --linear-solver\n";
    return kExitBadInput;
  }
  std::optional<Model> model = LoadModel(args.model, err, true);
  if (!model) return kExitBadInput;
  Result<std::string> text = ReadWholeFile(args.policy);
  if (!text.ok()) {
    err << "mdpserve: " << text.status().message() << "\n";
    return kExitBadInput;
  }
  Decoded<Policy> policy = DecodePolicy(*model, *text);
  if (!policy.ok()) {
    PrintIssues(err, args.policy, policy.errors, "");
    return kExitBadInput;
  }
  EvaluateOptions options;
  options.solver = *linear;
  if (model->criterion().kind != CriterionKind::kDiscounted) {
    Result<CriterionValues> values = EvaluateUnderCriterion(*model, policy.value, options);
    if (!values.ok()) {
      err << "mdpserve: " << values.status().message() << "\n";
      return kExitBadInput;
    }
    (void)Emit(EncodeCriterionEvaluation(*model, *values), "", out);
    return kExitOk;
  }
  Result<PolicyValues> values = EvaluatePolicy(*model, policy.value, options);
  if (!values.ok()) {
    err << "mdpserve: " << values.status().message() << "\n";
    return kExitBadInput;
  }
  (void)Emit(EncodeEvaluation(*model, *values), "", out);
  return kExitOk;
}

struct CompareArgs {
  std::string model_a, model_b, method = "auto";
  double tolerance = 1e-8;
  int top = 10;
};

// Solves both models the same way and reports what changed from the first to the second.
int RunCompare(const CompareArgs& args, std::ostream& out, std::ostream& err) {
  SolveOptions options;
  options.method = *ParseMethod(args.method);
  options.tolerance = args.tolerance;
  std::optional<Model> a = LoadModel(args.model_a, err, true);
  std::optional<Model> b = LoadModel(args.model_b, err, true);
  if (!a || !b) return kExitBadInput;
  Result<Solution> sa = Solve(*a, options);
  Result<Solution> sb = Solve(*b, options);
  if (!sa.ok() || !sb.ok()) {
    err << "mdpserve: " << (!sa.ok() ? sa.status() : sb.status()).message() << "\n";
    return kExitBadInput;
  }
  CompareOptions compare;
  compare.top_k = args.top;
  (void)Emit(EncodeComparison(CompareSolutions(*a, *sa, *b, *sb, compare)), "", out);
  return kExitOk;
}

struct SimulateArgs {
  std::string model, policy, solution, start_file, out;
  std::vector<std::string> start;
  SimulateOptions options;
  int listed_states = 20;
  bool progress = false;
};

// The policy to simulate from --policy or --solution (one of them is given). Nullopt (after
// printing why) iff it cannot be read.
std::optional<Policy> PolicyToSimulate(const Model& m, const SimulateArgs& args,
                                       std::ostream& err) {
  const std::string& path = args.policy.empty() ? args.solution : args.policy;
  Result<std::string> text = ReadWholeFile(path);
  if (!text.ok()) {
    err << "mdpserve: " << text.status().message() << "\n";
    return std::nullopt;
  }
  Decoded<Policy> policy = DecodePolicy(m, *text);
  if (!policy.ok()) {
    PrintIssues(err, path, policy.errors, "");
    return std::nullopt;
  }
  return std::move(policy.value);
}

// The start distribution: --start-distribution FILE, else the --start states (equally likely;
// a state named twice counts twice), else the model's first state. False after printing why.
bool StartDistribution(const Model& m, const SimulateArgs& args, std::vector<StartWeight>& start,
                       std::ostream& err) {
  if (!args.start_file.empty()) {
    Result<std::string> text = ReadWholeFile(args.start_file);
    if (!text.ok()) {
      err << "mdpserve: " << text.status().message() << "\n";
      return false;
    }
    Decoded<std::vector<StartWeight>> decoded = DecodeStartDistribution(m, *text);
    PrintIssues(err, args.start_file, decoded.errors, "");
    start = std::move(decoded.value);
    return decoded.ok();
  }
  if (args.start.empty()) {
    start = {{0, 1.0}};
    return true;
  }
  for (const std::string& name : args.start) {
    std::optional<StateId> s = m.FindState(name);
    if (!s) {
      err << "mdpserve: --start: the model has no state '" << name << "'\n";
      return false;
    }
    start.push_back({*s, 1.0 / static_cast<double>(args.start.size())});
  }
  return true;
}

// Prints a line to `err` each time another 5% of the episodes is done.
ProgressFn ProgressLines(int64_t episodes, std::ostream& err) {
  return [episodes, &err, next = int64_t{5}](const Progress& p) mutable {
    const int64_t percent = p.iteration * 100 / episodes;
    if (percent < next) return;
    next = percent / 5 * 5 + 5;
    std::ostringstream line;  // Own stream, so err's formatting state is left alone.
    line << "simulate: " << percent << "% (" << p.iteration << "/" << episodes << " episodes, "
         << std::setprecision(3) << p.elapsed_seconds << " s)\n";
    err << line.str() << std::flush;
  };
}

// Cut episodes bias the mean; say so when the bias could matter next to the sampling error
// (more than a tenth of the interval's half-width).
void WarnAboutTruncation(const SimulationReport& r, int64_t max_steps, std::ostream& err) {
  const double half_width = std::isnan(r.ci_high) ? 0.0 : 0.5 * (r.ci_high - r.ci_low);
  if (r.truncated_episodes == 0 || r.truncation_bias_bound <= 0.1 * half_width) return;
  if (std::isinf(r.truncation_bias_bound)) {  // Total reward: no geometric tail bound.
    err << "mdpserve: warning: " << r.truncated_episodes << " of " << r.episodes
        << " episodes had not reached a goal after --max-steps " << max_steps
        << "; the mean leaves out what they would still collect, by an amount no bound "
           "covers; raise --max-steps\n";
    return;
  }
  err << "mdpserve: warning: " << r.truncated_episodes << " of " << r.episodes
      << " episodes were cut at --max-steps " << max_steps << "; the mean may be off by up to "
      << r.truncation_bias_bound << " (truncation_bias_bound); raise --max-steps\n";
}

int RunSimulate(const SimulateArgs& args, std::ostream& out, std::ostream& err) {
  std::optional<Model> model = LoadModel(args.model, err, true);
  if (!model) return kExitBadInput;
  // Without a policy file, a fresh solve's own decisions (per stage for a finite horizon).
  std::optional<Policy> policy;
  std::optional<Solution> solved;
  if (args.policy.empty() && args.solution.empty()) {
    Result<Solution> solution = Solve(*model, SolveOptions{});
    if (!solution.ok()) {
      err << "mdpserve: " << solution.status().message() << "\n";
      return kExitBadInput;
    }
    solved = std::move(*solution);
  } else {
    policy = PolicyToSimulate(*model, args, err);
    if (!policy) return kExitBadInput;
  }
  SimulateOptions options = args.options;
  if (!StartDistribution(*model, args, options.start, err)) return kExitBadInput;
  ProgressFn progress;
  if (args.progress || (&err == &std::cerr && ::isatty(STDERR_FILENO) == 1)) {
    progress = ProgressLines(options.episodes, err);
  }
  Result<SimulationReport> report = solved ? Simulate(*model, *solved, options, &progress)
                                           : Simulate(*model, *policy, options, &progress);
  if (!report.ok()) {
    err << "mdpserve: " << report.status().message() << "\n";
    return kExitBadInput;
  }
  WarnAboutTruncation(*report, options.max_steps, err);
  Status written =
      Emit(EncodeSimulation(*model, options, *report, args.listed_states), args.out, out);
  if (!written.ok()) {
    err << "mdpserve: " << written.message() << "\n";
    return kExitBadInput;
  }
  return kExitOk;
}

CLI::App* AddSimulateCommand(CLI::App& app, SimulateArgs& a) {
  CLI::App* cmd = app.add_subcommand(
      "simulate", "Monte Carlo rollouts of a policy: return statistics and state visits");
  cmd->add_option("MODEL", a.model, "model document (JSON)")->required();
  CLI::Option* policy = cmd->add_option("--policy", a.policy, "policy or solution document");
  cmd->add_option("--solution", a.solution,
                  "solution document whose policy to simulate (default: solve the model and "
                  "follow its decisions, stage by stage for a finite horizon)")
      ->excludes(policy);
  CLI::Option* start = cmd->add_option(
      "--start", a.start, "start state(s), equally likely (default: the model's first state)");
  cmd->add_option("--start-distribution", a.start_file,
                  "start distribution document (mdpserve/start@1)")
      ->excludes(start);
  cmd->add_option("--episodes", a.options.episodes, "episodes to run")
      ->capture_default_str()
      ->check(CLI::Range(int64_t{1}, int64_t{100000000}));
  cmd->add_option("--max-steps", a.options.max_steps, "steps after which an episode is cut (average reward: the steps averaged over; ignored for a finite horizon, whose episodes last the horizon)")
      ->capture_default_str()
      ->check(CLI::Range(int64_t{1}, int64_t{1000000000}));
  cmd->add_option("--seed", a.options.seed, "seed of the random stream")->capture_default_str();
  cmd->add_option("--confidence", a.options.confidence,
                  "level of the confidence interval of the mean, in (0, 1)")
      ->capture_default_str();
  cmd->add_option("--quantiles", a.options.quantiles, "quantile levels of the return, in [0, 1]")
      ->delimiter(',');
  cmd->add_option("--top-states", a.listed_states, "most visited states to list")
      ->capture_default_str()
      ->check(CLI::Range(0, 100000));
  cmd->add_option("--out", a.out, "write the simulation document here instead of stdout");
  cmd->add_flag("--progress", a.progress,
                "print progress lines to stderr (default: only when stderr is a terminal)");
  return cmd;
}

void AddSolveOptions(CLI::App* cmd, SolveArgs& a) {
  cmd->add_option("MODEL", a.model, "model document (JSON), or - for standard input")->required();
  cmd->add_option("--method", a.method, kMethodHelp)
      ->capture_default_str()
      ->check(CLI::IsMember(kMethodNames));
  cmd->add_option("--tolerance", a.options.tolerance,
                  "target bound on sup |V - V*| in reward units")
      ->capture_default_str()
      ->check(CLI::Range(1e-14, 1e6));
  cmd->add_option("--max-iterations", a.options.max_iterations, "iteration cap")
      ->capture_default_str()
      ->check(CLI::Range(int64_t{1}, int64_t{1000000000}));
  cmd->add_option("--time-limit", a.options.time_limit_seconds, "seconds, 0 for none")
      ->capture_default_str()
      ->check(CLI::Range(0.0, 1e7));
  cmd->add_option("--evaluation-sweeps", a.options.evaluation_sweeps,
                  "modified policy iteration: sweeps per improvement")
      ->capture_default_str()
      ->check(CLI::Range(int64_t{1}, int64_t{1000000}));
  cmd->add_option("--linear-solver", a.linear_solver,
                  "policy evaluation: auto | direct | bicgstab | sweeps")
      ->capture_default_str()
      ->check(CLI::IsMember({"auto", "direct", "bicgstab", "sweeps"}));
  cmd->add_option("--tie-tolerance", a.options.tie_tolerance,
                  "extra slack when grouping tied actions (reward units)")
      ->capture_default_str()
      ->check(CLI::Range(0.0, 1e6));
  cmd->add_option("--threads", a.options.threads,
                  "threads for sweeps; 0 = automatic (every core this process may run on, for "
                  "models of at least 262144 transitions, else 1)")
      ->capture_default_str()
      ->check(CLI::Range(0, 256));
  cmd->add_option("--detail", a.detail, "summary | full (full adds the per-state Q-table)")
      ->capture_default_str()
      ->check(CLI::IsMember({"summary", "full"}));
  cmd->add_option("--out", a.out, "write the solution document here instead of stdout");
  cmd->add_flag("--table", a.table, "print a readable policy table to stdout");
  cmd->add_option("--stage", a.stage,
                  "finite horizon: report the decisions of this stage (0 = the whole horizon "
                  "ahead) instead of stage 0")
      ->capture_default_str();
}

}  // namespace

int RunCli(int argc, char** argv, std::ostream& out, std::ostream& err) {
  CLI::App app{"mdpserve: solve, verify and evaluate finite Markov decision processes"};
  app.require_subcommand(1);
  std::string validate_path;
  CLI::App* validate = app.add_subcommand("validate", "check a model document, list every problem");
  validate->add_option("MODEL", validate_path, "model document (JSON), or -")->required();

  SolveArgs solve_args;
  CLI::App* solve = app.add_subcommand("solve", "solve a model; print the solution document");
  AddSolveOptions(solve, solve_args);

  VerifyArgs verify_args;
  CLI::App* verify = app.add_subcommand(
      "verify", "bound how far candidate values or a candidate policy are from optimal");
  verify->add_option("MODEL", verify_args.model, "model document (JSON)")->required();
  verify->add_option("--values", verify_args.values, "values or solution document");
  verify->add_option("--policy", verify_args.policy, "policy or solution document");
  verify->add_option("--tolerance", verify_args.options.tolerance, "verdict threshold")
      ->capture_default_str()
      ->check(CLI::Range(0.0, 1e12));
  verify->add_option("--worst", verify_args.options.worst_k, "how many worst states to list")
      ->capture_default_str()
      ->check(CLI::Range(0, 100000));

  EvaluateArgs evaluate_args;
  CLI::App* evaluate = app.add_subcommand("evaluate", "exact values of a given policy");
  evaluate->add_option("MODEL", evaluate_args.model, "model document (JSON)")->required();
  evaluate->add_option("--policy", evaluate_args.policy, "policy or solution document")
      ->required();
  evaluate->add_option("--linear-solver", evaluate_args.linear_solver,
                       "auto | direct | bicgstab | sweeps")
      ->capture_default_str()
      ->check(CLI::IsMember({"auto", "direct", "bicgstab", "sweeps"}));

  CompareArgs compare_args;
  CLI::App* compare = app.add_subcommand(
      "compare", "solve two models (e.g. two revisions) and report what changed");
  compare->add_option("MODEL_A", compare_args.model_a, "the first (older) model document")
      ->required();
  compare->add_option("MODEL_B", compare_args.model_b, "the second (newer) model document")
      ->required();
  compare->add_option("--method", compare_args.method, "solve method for both")
      ->capture_default_str()
      ->check(CLI::IsMember(kMethodNames));
  compare->add_option("--tolerance", compare_args.tolerance, "solve tolerance for both")
      ->capture_default_str()
      ->check(CLI::Range(1e-14, 1e6));
  compare->add_option("--top", compare_args.top, "largest value changes to list")
      ->capture_default_str()
      ->check(CLI::Range(0, 100000));

  SimulateArgs simulate_args;
  CLI::App* simulate = AddSimulateCommand(app, simulate_args);

  ServerConfig serve_config;
  CLI::App* serve = app.add_subcommand(
      "serve", "run the planning service over HTTP (see api-schema/openapi.json)");
  AddServeOptions(serve, serve_config);

  try {
    app.parse(argc, argv);
  } catch (const CLI::ParseError& e) {
    const int code = app.exit(e, out, err);
    return code == 0 ? kExitOk : kExitBadInput;
  }
  if (validate->parsed()) return RunValidate(validate_path, out, err);
  if (solve->parsed()) return RunSolve(solve_args, out, err);
  if (verify->parsed()) return RunVerify(verify_args, out, err);
  if (evaluate->parsed()) return RunEvaluate(evaluate_args, out, err);
  if (compare->parsed()) return RunCompare(compare_args, out, err);
  if (simulate->parsed()) return RunSimulate(simulate_args, out, err);
  if (serve->parsed()) return RunServe(serve_config, out);
  return kExitBadInput;
}

}  // namespace mdp::server
