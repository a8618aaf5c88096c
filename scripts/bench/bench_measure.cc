#include "scripts/bench/bench_measure.h"

#include <algorithm>
#include <cmath>
#include <fstream>
#include <string>

#include "solver/internal/bellman.h"

namespace mdp::bench {
namespace {

Timing Summarise(std::vector<double> seconds) {
  Timing t;
  t.repetitions = static_cast<int>(seconds.size());
  if (seconds.empty()) return t;
  std::sort(seconds.begin(), seconds.end());
  t.best = seconds.front();
  t.median = seconds[seconds.size() / 2];
  return t;
}

// Eight independent partial sums per thread, so the loop is bound by loads rather than by the
// latency of one floating-point add chain (which would cap a single thread far below DRAM
// bandwidth without -ffast-math).
double SumArray(const double* x, int64_t n, int threads) {
  double total = 0.0;
#pragma omp parallel for num_threads(threads) reduction(+ : total) schedule(static)
  for (int64_t block = 0; block < n / 8; ++block) {
    const double* p = x + block * 8;
    total += ((p[0] + p[1]) + (p[2] + p[3])) + ((p[4] + p[5]) + (p[6] + p[7]));
  }
  return total;
}

int64_t StatusField(const char* key) {
  std::ifstream in("/proc/self/status");
  std::string line;
  const std::string prefix = std::string(key) + ":";
  while (std::getline(in, line)) {
    if (line.rfind(prefix, 0) == 0) return std::stoll(line.substr(prefix.size())) * 1024;
  }
  return -1;
}

}  // namespace

BandwidthProbe::BandwidthProbe(int64_t bytes)
    : size_(bytes / 64 * 8),
      data_(internal::LargeArrayAllocator<double>().allocate(static_cast<size_t>(size_)),
            Free{size_}) {
  const int64_t n = size_;
  double* x = data_.get();
  // First touch in parallel, with the static schedule the sums use.
#pragma omp parallel for schedule(static)
  for (int64_t i = 0; i < n; ++i) x[i] = 1.0 + static_cast<double>(i & 7);
}

Timing BandwidthProbe::Measure(int threads, int repetitions) {
  std::vector<double> seconds;
  for (int r = 0; r < repetitions; ++r) {
    Stopwatch clock;
    checksum_ += SumArray(data_.get(), size_, threads);
    seconds.push_back(clock.seconds());
  }
  return Summarise(std::move(seconds));
}

double ReferenceSweep(const Model& m, const double* in, double* out, int threads) {
  const StateId n = m.num_states();
  const RowId* state_rows = m.state_row_begin_data();
  const int64_t* row_entries = m.row_entry_begin_data();
  const StateId* next = m.entry_next_data();
  const double* prob = m.entry_probability_data();
  const double* reward = m.row_reward_data();
  const double g = m.discount();
  double diff = 0.0;
#pragma omp parallel for num_threads(threads) reduction(max : diff) schedule(static, 4096)
  for (StateId s = 0; s < n; ++s) {
    double best = 0.0;
    for (RowId r = state_rows[s]; r < state_rows[s + 1]; ++r) {
      double acc = 0.0;
      for (int64_t e = row_entries[r]; e < row_entries[r + 1]; ++e) acc += prob[e] * in[next[e]];
      const double q = reward[r] + g * acc;
      best = r == state_rows[s] ? q : std::max(best, q);
    }
    diff = std::max(diff, std::fabs(best - in[s]));
    out[s] = best;
  }
  return diff;
}

SolverSweep::SolverSweep(const Model& m) : m_(m) {
  const int threads = internal::ThreadCount(0);
  Stopwatch clock;
  if (internal::TilingPays(m, threads)) tiled_ = internal::TiledEntries::Build(m, threads);
  build_seconds_ = clock.seconds();
}

double SolverSweep::operator()(const double* in, double* out, int threads) const {
  return tiled_ ? tiled_->Sweep(m_, in, out, threads) : internal::SyncSweep(m_, in, out, threads);
}

Timing TimeSweeps(const Model& m, const SolverSweep& project, SweepKernel kernel, int threads,
                  int repetitions, double min_seconds) {
  std::vector<double> a(m.num_states(), 0.0), b(m.num_states(), 0.0);
  double sink = 0.0;
  auto sweep = [&] {
    sink += kernel == SweepKernel::kProject ? project(a.data(), b.data(), threads)
                                            : ReferenceSweep(m, a.data(), b.data(), threads);
    a.swap(b);
  };
  sweep();
  sweep();
  std::vector<double> seconds;
  const size_t least = static_cast<size_t>(repetitions), most = 10 * least;
  for (Stopwatch total; seconds.size() < least ||
                        (total.seconds() < min_seconds && seconds.size() < most);) {
    Stopwatch clock;
    sweep();
    seconds.push_back(clock.seconds());
  }
  if (std::isnan(sink)) seconds.clear();  // Never true; keeps the residuals observable.
  return Summarise(std::move(seconds));
}

PairedTiming TimePairedWithProbe(const Model& m, const SolverSweep& project,
                                 BandwidthProbe& probe, int threads, int rounds) {
  std::vector<double> a(m.num_states(), 0.0), b(m.num_states(), 0.0);
  double sink = 0.0;
  auto sweep = [&] {
    sink += project(a.data(), b.data(), threads);
    a.swap(b);
  };
  sweep();
  sweep();
  (void)probe.Measure(threads, 1);
  const double sweep_bytes = static_cast<double>(SweepBytes(m));
  const double probe_bytes = static_cast<double>(probe.bytes());
  std::vector<double> probe_seconds, sweep_seconds;
  PairedTiming out;
  for (int r = 0; r < rounds; ++r) {
    const double p = probe.Measure(threads, 1).best;
    Stopwatch clock;
    sweep();
    const double s = clock.seconds();
    probe_seconds.push_back(p);
    sweep_seconds.push_back(s);
    out.ratio.push_back((sweep_bytes / s) / (probe_bytes / p));
  }
  if (std::isnan(sink)) sweep_seconds.clear();  // Never true; keeps the residuals observable.
  std::sort(out.ratio.begin(), out.ratio.end());
  out.probe = Summarise(std::move(probe_seconds));
  out.sweep = Summarise(std::move(sweep_seconds));
  return out;
}

int64_t SweepBytes(const Model& m) {
  const int64_t states = m.num_states(), rows = m.num_rows(), entries = m.num_entries();
  return 8 * (states + 1) + 8 * rows + 8 * (rows + 1) + 4 * entries + 8 * entries + 8 * states;
}

int64_t ModelArrayBytes(const Model& m) {
  const int64_t states = m.num_states(), rows = m.num_rows(), entries = m.num_entries();
  return states + 8 * (states + 1) + 4 * rows + 8 * rows + 8 * (rows + 1) + 12 * entries;
}

int64_t PeakResidentBytes() { return StatusField("VmHWM"); }
int64_t ResidentBytes() { return StatusField("VmRSS"); }

}  // namespace mdp::bench
