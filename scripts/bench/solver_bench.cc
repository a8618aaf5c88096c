// solver_bench: measures the solver on seeded models and prints one JSON object per run on
// standard output (scripts/bench.sh collects them into BENCHMARKS.md).
//
//   solver_bench probe [--bytes=1073741824] [--repetitions=5]
//       STREAM-like read bandwidth with 1 thread and with all threads.
//   solver_bench model --structure=random|local|local_shuffled|grid|inventory
//       [--states=100000] [--actions=4] [--outcomes=8] [--seed=1] [--discount=0.99]
//       [--reach=16] [--sweeps=10] [--min-seconds=0.5]
//       [--methods=value_iteration,gauss_seidel:1,...]
//       [--tolerance=1e-6] [--solve-threads=0] [--time-limit=1800]
//       [--renumber=auto|off|on] [--measure-renumbering=1]
//       [--write-arrays=DIR] [--write-json=FILE]
//       [--criterion=discounted|average|finite_horizon|total] [--horizon=100]
//       [--terminal-every=0] [--objective=maximize|minimize] [--reward-shift=0]
//       [--paired-probe-bytes=0] [--paired-rounds=15]
//       Generates the model, builds it, optionally writes it for the baselines, times sweeps
//       (solver and reference loop, 1 thread and all threads; at least --sweeps of each and
//       more until --min-seconds have passed) and solves to a bound with
//       each method (":N" after a method overrides --solve-threads for it; 0 = all).
//       --renumber is the solves' internal state renumbering (SolveOptions::renumber).
//       With sweeps timed and --measure-renumbering=1 (the default), also times the solver's
//       renumbering (solver/internal/renumber.h) and the same sweeps on the renumbered copy:
//       the object "renumber" of the output.
//       --criterion sets the generated model's criterion (finite_horizon: --horizon periods,
//       discount --discount); --terminal-every=K makes every K-th state (0, K, 2K, ...)
//       terminal, dropping its actions: the goals a total-reward model needs. With
//       --objective=minimize the rewards read as costs; --reward-shift adds a constant to
//       every action's reward (1.5 makes the random and local generators' costs positive,
//       which makes a total-cost model with goals well posed).
//       --paired-probe-bytes=N (N > 0): last, after the peak RSS is recorded, times the
//       read-bandwidth probe over N bytes and the solver's sweep in alternation,
//       --paired-rounds pairs per thread count (1 and all): the object "paired_probe".
//   solver_bench sweep-on-request --structure=... [--states=100000] [--actions=4]
//       [--outcomes=8] [--seed=1] [--discount=0.99] [--reach=16]
//       Generates and builds the same model as `model` with the same flags, prints one JSON
//       line {"ready": true, "states", "entries", "check_sum": the sum of V after 3 sweeps
//       from 0}, then answers each line "THREADS COUNT" on standard input with COUNT timed
//       sweeps of the solver's kernel on THREADS threads (0 = all) as one JSON line
//       {"threads", "seconds": [...]}, until "quit" or the end of input. Lets a baseline in
//       another process alternate its sweeps with the solver's (baseline_sweep.py
//       --paired-solver), so both are timed under the same machine conditions.
// Flags are --name=value or --name value. Exit status 2 on bad flags, 1 on a failed step.
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <map>
#include <optional>
#include <sstream>
#include <string>
#include <vector>

#include "scripts/bench/bench_files.h"
#include "scripts/bench/bench_json.h"
#include "scripts/bench/bench_measure.h"
#include "scripts/bench/bench_models.h"
#include "solver/internal/bellman.h"
#include "solver/internal/renumber.h"
#include "solver/solver.h"

namespace mdp::bench {
namespace {

// --name=value / --name value pairs; every flag read must be known.
class Flags {
 public:
  bool Parse(int argc, char** argv, int first) {
    for (int i = first; i < argc; ++i) {
      std::string arg = argv[i];
      if (arg.rfind("--", 0) != 0) return Fail("unexpected argument " + arg);
      const size_t eq = arg.find('=');
      if (eq != std::string::npos) {
        values_[arg.substr(2, eq - 2)] = arg.substr(eq + 1);
      } else if (i + 1 < argc) {
        values_[arg.substr(2)] = argv[++i];
      } else {
        return Fail("flag " + arg + " needs a value");
      }
    }
    return true;
  }
  std::string Get(const std::string& name, const std::string& fallback) {
    used_[name] = true;
    auto it = values_.find(name);
    return it == values_.end() ? fallback : it->second;
  }
  double Number(const std::string& name, double fallback) {
    const std::string text = Get(name, "");
    if (text.empty()) return fallback;
    char* end = nullptr;
    const double v = std::strtod(text.c_str(), &end);
    if (*end != '\0') Fail("--" + name + " is not a number: " + text);
    return v;
  }
  // True iff every given flag was read and every number parsed.
  bool AllKnown() {
    for (const auto& [name, value] : values_) {
      if (!used_.count(name)) Fail("unknown flag --" + name);
    }
    return ok_;
  }

 private:
  bool Fail(const std::string& message) {
    std::fprintf(stderr, "solver_bench: %s\n", message.c_str());
    ok_ = false;
    return false;
  }
  std::map<std::string, std::string> values_;
  std::map<std::string, bool> used_;
  bool ok_ = true;
};

JsonObject TimingJson(std::string_view kernel, int threads, const Timing& t) {
  return JsonObject()
      .Add("kernel", kernel)
      .Add("threads", threads)
      .Add("best_seconds", t.best)
      .Add("median_seconds", t.median)
      .Add("repetitions", t.repetitions);
}

int RunProbe(Flags& flags) {
  const auto bytes = static_cast<int64_t>(flags.Number("bytes", 1 << 30));
  const int repetitions = static_cast<int>(flags.Number("repetitions", 5));
  if (!flags.AllKnown()) return 2;
  BandwidthProbe probe(bytes);
  std::vector<JsonObject> runs;
  for (int threads : {1, internal::ThreadCount(0)}) {
    runs.push_back(TimingJson("sum", threads, probe.Measure(threads, repetitions)));
    if (threads == internal::ThreadCount(0)) break;
  }
  std::printf("%s\n", JsonObject()
                          .Add("kind", "probe")
                          .Add("bytes", probe.bytes())
                          .Add("runs", runs)
                          .Add("checksum", probe.checksum())
                          .str()
                          .c_str());
  return 0;
}

std::vector<std::string> SplitCommas(const std::string& list) {
  std::vector<std::string> items;
  std::stringstream in(list);
  for (std::string item; std::getline(in, item, ',');) {
    if (!item.empty()) items.push_back(item);
  }
  return items;
}

// Solves `m` with each method to the same tolerance; values are compared with the first's.
std::optional<std::vector<JsonObject>> RunSolves(const Model& m,
                                                 const std::vector<std::string>& methods,
                                                 SolveOptions options) {
  std::vector<JsonObject> solves;
  std::vector<double> first_values;
  const int default_threads = options.threads;
  for (const std::string& item : methods) {
    // "method" or "method:threads".
    const size_t colon = item.find(':');
    const std::string name = item.substr(0, colon);
    std::optional<Method> method = ParseMethod(name);
    const int threads =
        colon == std::string::npos ? default_threads : std::atoi(item.c_str() + colon + 1);
    if (!method || threads < 0) {
      std::fprintf(stderr, "solver_bench: bad method %s\n", item.c_str());
      return std::nullopt;
    }
    options.method = *method;
    options.threads = threads;
    Stopwatch clock;
    Result<Solution> solution = Solve(m, options);
    const double wall = clock.seconds();
    if (!solution.ok()) {
      std::fprintf(stderr, "solver_bench: %s\n", solution.status().ToString().c_str());
      return std::nullopt;
    }
    double diff = 0.0;
    if (first_values.empty()) first_values = solution->values;
    for (size_t s = 0; s < first_values.size(); ++s) {
      diff = std::max(diff, std::fabs(solution->values[s] - first_values[s]));
    }
    solves.push_back(JsonObject()
                         .Add("method", name)
                         .Add("answered_by", MethodName(solution->method))
                         .Add("threads", internal::ThreadCount(threads))
                         .Add("outcome", SolveOutcomeName(solution->outcome))
                         .Add("iterations", solution->iterations)
                         .Add("sweeps", solution->sweeps)
                         .Add("solve_seconds", solution->solve_seconds)
                         .Add("wall_seconds", wall)
                         .Add("value_error_bound", solution->value_error_bound)
                         .Add("max_diff_vs_first", diff)
                         .Add("renumbered",
                              solution->options.renumber == Renumber::kOn ? "yes" : "no")
                         .Add("gain_lower", solution->average.gain_lower)
                         .Add("gain_upper", solution->average.gain_upper)
                         .Add("peak_rss_bytes", PeakResidentBytes()));
  }
  return solves;
}

// V after `sweeps` synchronous sweeps from 0 on one thread: what the baseline must reproduce.
std::vector<double> CheckValues(const Model& m, int sweeps) {
  std::vector<double> v(m.num_states(), 0.0), next(m.num_states(), 0.0);
  for (int i = 0; i < sweeps; ++i) {
    (void)internal::SyncSweep(m, v.data(), next.data(), 1);
    v.swap(next);
  }
  return v;
}

// Sweep timings of the solver's kernel and the reference loop, 1 thread and all threads.
std::vector<JsonObject> TimeAllSweeps(const Model& m, const SolverSweep& project, int sweeps,
                                      double min_seconds) {
  std::vector<JsonObject> timings;
  const int all_threads = internal::ThreadCount(0);
  for (int threads : {1, all_threads}) {
    if (sweeps <= 0) break;
    for (SweepKernel kernel : {SweepKernel::kProject, SweepKernel::kReference}) {
      timings.push_back(TimingJson(kernel == SweepKernel::kProject ? "project" : "reference",
                                   threads,
                                   TimeSweeps(m, project, kernel, threads, sweeps, min_seconds)));
    }
    if (threads == all_threads) break;
  }
  return timings;
}

// The probe and the solver's sweep in alternation (TimePairedWithProbe), 1 thread and all.
std::vector<JsonObject> TimeAllPaired(const Model& m, int64_t probe_bytes, int rounds) {
  const SolverSweep project(m);
  BandwidthProbe probe(probe_bytes);
  std::vector<JsonObject> out;
  const int all_threads = internal::ThreadCount(0);
  for (int threads : {1, all_threads}) {
    const PairedTiming t = TimePairedWithProbe(m, project, probe, threads, rounds);
    const std::vector<double>& ratio = t.ratio;
    out.push_back(JsonObject()
                      .Add("threads", threads)
                      .Add("rounds", rounds)
                      .Add("probe_bytes", probe.bytes())
                      .Add("sweep_bytes", SweepBytes(m))
                      .Add("probe", TimingJson("sum", threads, t.probe))
                      .Add("sweep", TimingJson("project", threads, t.sweep))
                      .Add("ratio_min", ratio.front())
                      .Add("ratio_median", ratio[ratio.size() / 2])
                      .Add("ratio_max", ratio.back()));
    if (threads == all_threads) break;
  }
  return out;
}

// Renumbering as Solve() does it: what the automatic rule decides and costs, the locality
// score, the order's and the copy's cost, the copy's resident memory (measured while it is
// alive: the order's temporary arrays are freed before the copy is built, so this is the
// peak extra), and sweeps on the copy, timed as TimeAllSweeps times the original's.
JsonObject MeasureRenumbering(const Model& m, int sweeps, double min_seconds) {
  const int threads = internal::ThreadCount(0);
  JsonObject out;
  Stopwatch auto_clock;
  const bool applies = internal::RenumberForLocality(m, Renumber::kAuto, threads).has_value();
  out.AddRaw("auto_renumbers", applies ? "true" : "false");
  out.Add("auto_seconds", auto_clock.seconds());
  Stopwatch score_clock;
  out.Add("far_before", internal::FarEntryFraction(m, {}, threads));
  out.Add("score_seconds", score_clock.seconds());
  const int64_t rss_before = ResidentBytes();
  Stopwatch order_clock;
  const internal::StateOrder order = internal::LocalityOrder(m);
  out.Add("order_seconds", order_clock.seconds());
  Stopwatch permute_clock;
  const Model copy = internal::PermuteStates(m, order.new_of_old, threads);
  out.Add("permute_seconds", permute_clock.seconds());
  out.Add("extra_rss_bytes", ResidentBytes() - rss_before);
  out.Add("copy_model_bytes", copy.ByteSize());
  out.Add("far_after", internal::FarEntryFraction(copy, {}, threads));
  out.Add("sweeps", TimeAllSweeps(copy, SolverSweep(copy), sweeps, min_seconds));
  return out;
}

// `spec` with every k-th state terminal: its actions (slots and their outcomes) dropped.
ModelSpec WithTerminalEvery(const ModelSpec& spec, int64_t k) {
  ModelSpec out;
  out.name = spec.name;
  out.objective = spec.objective;
  out.criterion = spec.criterion;
  out.action_names = spec.action_names;
  for (StateId s = 0; s < spec.num_states(); ++s) {
    const bool terminal = s % k == 0;
    out.AddState(spec.state_names[s], terminal);
    if (terminal) continue;
    for (SlotId slot = spec.state_first_slot[s]; slot < spec.state_first_slot[s + 1]; ++slot) {
      out.AddStateAction(spec.slot_action[slot], spec.slot_reward[slot]);
      for (OutcomeId o = spec.slot_first_outcome[slot]; o < spec.slot_first_outcome[slot + 1];
           ++o) {
        out.AddOutcome(spec.outcome_next[o], spec.outcome_probability[o],
                       spec.outcome_reward.empty() ? 0.0 : spec.outcome_reward[o]);
      }
    }
  }
  return out;
}

std::optional<CriterionKind> ParseCriterion(const std::string& name) {
  for (CriterionKind kind : {CriterionKind::kDiscounted, CriterionKind::kAverage,
                             CriterionKind::kFiniteHorizon, CriterionKind::kTotal}) {
    if (name == CriterionKindName(kind)) return kind;
  }
  return std::nullopt;
}

std::optional<Renumber> ParseRenumber(const std::string& name) {
  if (name == "auto") return Renumber::kAuto;
  if (name == "off") return Renumber::kOff;
  if (name == "on") return Renumber::kOn;
  return std::nullopt;
}

// The generator flags shared by `model` and `sweep-on-request`; nullopt for a bad structure.
std::optional<ModelShape> ShapeFlags(Flags& flags) {
  ModelShape shape;
  const std::optional<Structure> structure = ParseStructure(flags.Get("structure", "random"));
  shape.states = static_cast<int64_t>(flags.Number("states", 100000));
  shape.actions = static_cast<int>(flags.Number("actions", 4));
  shape.outcomes = static_cast<int>(flags.Number("outcomes", 8));
  shape.seed = static_cast<uint64_t>(flags.Number("seed", 1));
  shape.discount = flags.Number("discount", 0.99);
  shape.reach = static_cast<int64_t>(flags.Number("reach", 16));
  if (!structure || shape.states < 1 || shape.actions < 1 || shape.outcomes < 1 ||
      (*structure == Structure::kGrid && (shape.actions > 8 || shape.outcomes > 8))) {
    return std::nullopt;
  }
  shape.structure = *structure;
  return shape;
}

constexpr char kBadShape[] = "solver_bench: bad --structure or size (grid: at most 8 and 8)\n";

int RunModel(Flags& flags) {
  const std::optional<ModelShape> parsed_shape = ShapeFlags(flags);
  const int sweeps = static_cast<int>(flags.Number("sweeps", 10));
  const double min_seconds = flags.Number("min-seconds", 0.5);
  const std::vector<std::string> methods = SplitCommas(flags.Get("methods", ""));
  SolveOptions options;
  options.tolerance = flags.Number("tolerance", 1e-6);
  options.threads = static_cast<int>(flags.Number("solve-threads", 0));
  options.time_limit_seconds = flags.Number("time-limit", 1800);
  const std::optional<Renumber> renumber = ParseRenumber(flags.Get("renumber", "auto"));
  const bool measure_renumbering = flags.Number("measure-renumbering", 1) != 0;
  const std::string arrays_dir = flags.Get("write-arrays", "");
  const auto paired_bytes = static_cast<int64_t>(flags.Number("paired-probe-bytes", 0));
  const int paired_rounds = static_cast<int>(flags.Number("paired-rounds", 15));
  const std::string json_path = flags.Get("write-json", "");
  const std::optional<CriterionKind> criterion =
      ParseCriterion(flags.Get("criterion", "discounted"));
  const int64_t horizon = static_cast<int64_t>(flags.Number("horizon", 100));
  const int64_t terminal_every = static_cast<int64_t>(flags.Number("terminal-every", 0));
  const std::string objective = flags.Get("objective", "maximize");
  const double reward_shift = flags.Number("reward-shift", 0.0);
  if (!flags.AllKnown()) return 2;
  if (!criterion || horizon < 1 || terminal_every < 0 ||
      (objective != "maximize" && objective != "minimize")) {
    std::fprintf(stderr,
                 "solver_bench: bad --criterion, --horizon, --terminal-every or --objective\n");
    return 2;
  }
  if (!renumber) {
    std::fprintf(stderr, "solver_bench: --renumber must be auto, off or on\n");
    return 2;
  }
  options.renumber = *renumber;
  if (!parsed_shape) {
    std::fputs(kBadShape, stderr);
    return 2;
  }
  const ModelShape shape = *parsed_shape;

  JsonObject report;
  report.Add("kind", "model").Add("structure", StructureName(shape.structure));
  report.Add("states", shape.states).Add("actions", shape.actions);
  report.Add("outcomes", shape.outcomes).Add("seed", static_cast<int64_t>(shape.seed));
  report.Add("discount", shape.discount).Add("reach", shape.reach);

  Stopwatch generate_clock;
  ModelSpec spec = GenerateSpec(shape);
  if (terminal_every > 0) spec = WithTerminalEvery(spec, terminal_every);
  spec.criterion.kind = *criterion;
  spec.objective = objective == "minimize" ? Objective::kMinimize : Objective::kMaximize;
  for (double& r : spec.slot_reward) r += reward_shift;
  if (*criterion == CriterionKind::kFiniteHorizon) spec.criterion.horizon = horizon;
  report.Add("generate_seconds", generate_clock.seconds());
  report.Add("criterion", CriterionKindName(*criterion));
  if (*criterion == CriterionKind::kFiniteHorizon) report.Add("horizon", horizon);
  report.Add("terminal_every", terminal_every).Add("objective", objective);
  report.Add("reward_shift", reward_shift);
  if (!json_path.empty()) {
    Stopwatch write_clock;
    const Status written = WriteModelDocument(spec, DocumentEncoding::kObjects, json_path);
    if (!written.ok()) {
      std::fprintf(stderr, "solver_bench: %s\n", written.ToString().c_str());
      return 1;
    }
    report.Add("json_path", json_path).Add("json_write_seconds", write_clock.seconds());
    report.Add("json_bytes", static_cast<int64_t>(std::filesystem::file_size(json_path)));
  }
  Stopwatch build_clock;
  Result<Model> built = BuildModel(spec);
  report.Add("build_seconds", build_clock.seconds());
  spec = ModelSpec();  // Free the authored form: the solver only needs the Model.
  if (!built.ok()) {
    std::fprintf(stderr, "solver_bench: %s\n", built.status().ToString().c_str());
    return 1;
  }
  const Model& m = *built;
  report.Add("peak_rss_after_build_bytes", PeakResidentBytes());
  report.Add("rss_model_only_bytes", ResidentBytes());
  report.Add("rows", m.num_rows()).Add("entries", m.num_entries());
  report.Add("array_bytes", ModelArrayBytes(m)).Add("model_bytes", m.ByteSize());
  report.Add("sweep_bytes", SweepBytes(m));

  if (!arrays_dir.empty()) {
    constexpr int kCheckSweeps = 3;
    const Status written = WriteModelArrays(m, CheckValues(m, kCheckSweeps), kCheckSweeps,
                                            arrays_dir);
    if (!written.ok()) {
      std::fprintf(stderr, "solver_bench: %s\n", written.ToString().c_str());
      return 1;
    }
  }
  report.Add("threads_all", internal::ThreadCount(0));
  if (sweeps > 0) {
    // Freed before the solves, which build their own when value iteration decides to.
    const SolverSweep project(m);
    report.AddRaw("sweep_tiled", project.tiled() ? "true" : "false");
    report.Add("tile_build_seconds", project.build_seconds());
    report.Add("sweeps", TimeAllSweeps(m, project, sweeps, min_seconds));
  } else {
    report.Add("sweeps", std::vector<JsonObject>{});
  }
  if (measure_renumbering && sweeps > 0) {
    report.Add("renumber", MeasureRenumbering(m, sweeps, min_seconds));
  }
  std::optional<std::vector<JsonObject>> solves = RunSolves(m, methods, options);
  if (!solves) return 1;
  report.Add("tolerance", options.tolerance).Add("solve_threads", options.threads);
  report.Add("solves", *solves);
  report.Add("peak_rss_bytes", PeakResidentBytes());
  if (paired_bytes > 0 && paired_rounds > 0) {
    report.Add("paired_probe", TimeAllPaired(m, paired_bytes, paired_rounds));
  }
  std::printf("%s\n", report.str().c_str());
  return 0;
}

// solver_bench sweep-on-request: see the top of the file.
int RunSweepOnRequest(Flags& flags) {
  const std::optional<ModelShape> shape = ShapeFlags(flags);
  if (!flags.AllKnown()) return 2;
  if (!shape) {
    std::fputs(kBadShape, stderr);
    return 2;
  }
  Result<Model> built = BuildModel(GenerateSpec(*shape));
  if (!built.ok()) {
    std::fprintf(stderr, "solver_bench: %s\n", built.status().ToString().c_str());
    return 1;
  }
  const Model& m = *built;
  double check_sum = 0.0;
  for (double x : CheckValues(m, 3)) check_sum += x;
  std::printf("%s\n", JsonObject()
                          .AddRaw("ready", "true")
                          .Add("states", m.num_states())
                          .Add("entries", m.num_entries())
                          .Add("check_sum", check_sum)
                          .str()
                          .c_str());
  std::fflush(stdout);
  const SolverSweep project(m);
  std::vector<double> a(m.num_states(), 0.0), b(m.num_states(), 0.0);
  double sink = 0.0;
  char line[256];
  while (std::fgets(line, sizeof line, stdin) != nullptr) {
    if (std::string(line).rfind("quit", 0) == 0) break;
    int threads = -1, count = 0;
    if (std::sscanf(line, "%d %d", &threads, &count) != 2 || threads < 0 || count < 1 ||
        count > 1000) {
      std::fprintf(stderr, "solver_bench: expected \"THREADS COUNT\" or \"quit\", got %s", line);
      return 2;
    }
    const int used = internal::ThreadCount(threads);
    std::vector<double> seconds;
    for (int i = 0; i < count; ++i) {
      Stopwatch clock;
      sink += project(a.data(), b.data(), used);
      seconds.push_back(clock.seconds());
      a.swap(b);
    }
    if (std::isnan(sink)) seconds.clear();  // Never true; keeps the residuals observable.
    std::printf("%s\n", JsonObject().Add("threads", used).Add("seconds", seconds).str().c_str());
    std::fflush(stdout);
  }
  return 0;
}

}  // namespace
}  // namespace mdp::bench

int main(int argc, char** argv) {
  const std::string command = argc > 1 ? argv[1] : "";
  mdp::bench::Flags flags;
  if (command != "probe" && command != "model" && command != "sweep-on-request") {
    std::fprintf(stderr,
                 "usage: solver_bench probe|model|sweep-on-request [--flag=value ...] "
                 "(see the source)\n");
    return 2;
  }
  if (!flags.Parse(argc, argv, 2)) return 2;
  if (command == "probe") return mdp::bench::RunProbe(flags);
  if (command == "model") return mdp::bench::RunModel(flags);
  return mdp::bench::RunSweepOnRequest(flags);
}
