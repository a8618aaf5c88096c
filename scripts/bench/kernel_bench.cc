// kernel_bench: Google Benchmark micro-benchmarks of the Bellman kernels of
// solver/internal/bellman.h on seeded models (scripts/bench/bench_models.h), next to the
// reference loop of bench_measure.h. bytes_per_second counts SweepBytes() per full sweep
// (not reported for PolicySweep, which reads one row per state).
//
//   kernel_bench [--benchmark_*]    e.g. --benchmark_format=json --benchmark_min_time=0.2
//
// Environment: MDP_KERNEL_BENCH_STATES (default 100000) states per model, 4 actions x 8
// outcomes; MDP_KERNEL_BENCH_STRUCTURES (default "random,local,local_shuffled");
// MDP_KERNEL_BENCH_SPANS (default "4096,65536,524288"): SyncSweepSpan/<span> sweeps the random
// model with every next state folded into [0, span) (next % span), so V's footprint is
// span x 8 bytes while the row and entry counts stay (up to the few outcomes the fold
// merges): how much of the random sweep's time is its scattered reads of V, by cache level.
#include <benchmark/benchmark.h>

#include <cstdlib>
#include <map>
#include <optional>
#include <memory>
#include <sstream>
#include <string>
#include <vector>

#include "scripts/bench/bench_measure.h"
#include "scripts/bench/bench_models.h"
#include "solver/internal/bellman.h"
#include "solver/solver.h"

namespace mdp::bench {
namespace {

std::string EnvOr(const char* name, const char* fallback) {
  const char* v = std::getenv(name);
  return v != nullptr && *v != '\0' ? v : fallback;
}

int64_t BenchStates() { return std::atoll(EnvOr("MDP_KERNEL_BENCH_STATES", "100000").c_str()); }

// The generator's spec of `structure` at BenchStates() states.
ModelSpec BenchSpec(Structure structure) {
  ModelShape shape;
  shape.structure = structure;
  shape.states = BenchStates();
  return GenerateSpec(shape);
}

std::unique_ptr<Model> BuildOrAbort(const ModelSpec& spec) {
  Result<Model> built = BuildModel(spec);
  if (!built.ok()) std::abort();
  return std::make_unique<Model>(std::move(built).value());
}

// Models are built once per structure, on first use, and live until exit.
const Model& CachedModel(Structure structure) {
  static std::map<Structure, std::unique_ptr<Model>> models;
  std::unique_ptr<Model>& slot = models[structure];
  if (!slot) slot = BuildOrAbort(BenchSpec(structure));
  return *slot;
}

// The random model with each next state j replaced by j % span (outcomes that land on the
// same state merge), built once per span.
const Model& CachedSpanModel(int64_t span) {
  static std::map<int64_t, std::unique_ptr<Model>> models;
  std::unique_ptr<Model>& slot = models[span];
  if (!slot) {
    ModelSpec spec = BenchSpec(Structure::kRandom);
    for (StateId& j : spec.outcome_next) j = static_cast<StateId>(j % span);
    slot = BuildOrAbort(spec);
  }
  return *slot;
}

void RunSpan(benchmark::State& state, int64_t span, int threads) {
  const Model& m = CachedSpanModel(span);
  std::vector<double> a(m.num_states(), 0.0), b(m.num_states(), 0.0);
  for (auto _ : state) {
    benchmark::DoNotOptimize(internal::SyncSweep(m, a.data(), b.data(), threads));
    a.swap(b);
  }
  state.SetBytesProcessed(state.iterations() * SweepBytes(m));
  state.counters["states"] = m.num_states();
  state.counters["entries"] = static_cast<double>(m.num_entries());
  state.counters["v_bytes"] = static_cast<double>(8 * span);
}

// kSync sweeps with the kernel copy the solver would choose for the model; kSyncPortable and
// kSyncGather name the copy (internal::KernelSet), to compare the two side by side.
enum class Kernel { kSync, kSyncPortable, kSyncGather, kReference, kGaussSeidel, kPolicy, kGreedy };

void RunKernel(benchmark::State& state, Structure structure, Kernel kernel, int threads) {
  const Model& m = CachedModel(structure);
  std::vector<double> a(m.num_states(), 0.0), b(m.num_states(), 0.0);
  std::vector<RowId> rows(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) rows[s] = m.row_begin(s);
  for (auto _ : state) {
    double diff = 0.0;
    switch (kernel) {
      case Kernel::kSync: diff = internal::SyncSweep(m, a.data(), b.data(), threads); break;
      case Kernel::kSyncPortable:
        diff = internal::SyncSweep(m, a.data(), b.data(), threads, internal::KernelSet::kPortable);
        break;
      case Kernel::kSyncGather:
        diff = internal::SyncSweep(m, a.data(), b.data(), threads, internal::KernelSet::kGather);
        break;
      case Kernel::kReference: diff = ReferenceSweep(m, a.data(), b.data(), threads); break;
      case Kernel::kGaussSeidel: diff = internal::GaussSeidelSweep(m, a.data()); break;
      case Kernel::kPolicy:
        diff = internal::PolicySweep(m, rows.data(), a.data(), b.data(), threads);
        break;
      case Kernel::kGreedy:
        diff = internal::GreedySweep(m, a.data(), b.data(), rows.data(), threads);
        break;
    }
    benchmark::DoNotOptimize(diff);
    if (kernel != Kernel::kGaussSeidel) a.swap(b);
  }
  // A policy sweep reads one row per state, so SweepBytes() would overstate its rate.
  if (kernel != Kernel::kPolicy) state.SetBytesProcessed(state.iterations() * SweepBytes(m));
  state.counters["states"] = m.num_states();
}

void RegisterAll() {
  const int all = internal::ThreadCount(0);
  std::stringstream list(EnvOr("MDP_KERNEL_BENCH_STRUCTURES", "random,local,local_shuffled"));
  const std::vector<std::pair<const char*, Kernel>> kernels = {
      {"SyncSweep", Kernel::kSync},
      {"SyncSweepPortable", Kernel::kSyncPortable},
      {"SyncSweepGather", Kernel::kSyncGather},
      {"ReferenceSweep", Kernel::kReference},
      {"PolicySweep", Kernel::kPolicy}, {"GreedySweep", Kernel::kGreedy},
      {"GaussSeidelSweep", Kernel::kGaussSeidel}};
  const int64_t states = BenchStates();
  std::stringstream spans(EnvOr("MDP_KERNEL_BENCH_SPANS", "4096,65536,524288"));
  for (std::string text; std::getline(spans, text, ',');) {
    const int64_t span = std::atoll(text.c_str());
    if (span < 1 || span >= states) continue;
    for (int threads : {1, all}) {
      const std::string label =
          "SyncSweepSpan/" + std::to_string(span) + "/threads:" + std::to_string(threads);
      benchmark::RegisterBenchmark(label.c_str(), RunSpan, span, threads)
          ->Unit(benchmark::kMillisecond)
          ->UseRealTime();
      if (threads == all) break;
    }
  }
  for (std::string name; std::getline(list, name, ',');) {
    const std::optional<Structure> structure = ParseStructure(name);
    if (!structure) continue;
    for (const auto& [kernel_name, kernel] : kernels) {
      for (int threads : {1, all}) {
        const std::string label = std::string(kernel_name) + "/" + name + "/threads:" +
                                  std::to_string(threads);
        benchmark::RegisterBenchmark(label.c_str(), RunKernel, *structure, kernel, threads)
            ->Unit(benchmark::kMillisecond)
            ->UseRealTime();
        // Gauss-Seidel is sequential; one registration is enough.
        if (kernel == Kernel::kGaussSeidel || threads == all) break;
      }
    }
  }
}

}  // namespace
}  // namespace mdp::bench

int main(int argc, char** argv) {
  benchmark::Initialize(&argc, argv);
  if (benchmark::ReportUnrecognizedArguments(argc, argv)) return 2;
  mdp::bench::RegisterAll();
  benchmark::RunSpecifiedBenchmarks();
  benchmark::Shutdown();
  return 0;
}
