// Measurements the benchmark driver makes: a read-bandwidth probe, timings of synchronous
// value-iteration sweeps, the bytes a sweep must read, and the process's resident memory.
// Numbers only; reporting is the driver's business. Not thread-safe (each call may use all
// the threads it is given through OpenMP).
#ifndef MDP_SCRIPTS_BENCH_BENCH_MEASURE_H_
#define MDP_SCRIPTS_BENCH_BENCH_MEASURE_H_

#include <chrono>
#include <cstdint>
#include <memory>
#include <optional>
#include <vector>

#include "solver/internal/large_array.h"
#include "solver/internal/tiled_sweep.h"
#include "solver/model.h"

namespace mdp::bench {

// Wall-clock seconds since construction.
class Stopwatch {
 public:
  Stopwatch() : start_(std::chrono::steady_clock::now()) {}
  double seconds() const {
    return std::chrono::duration<double>(std::chrono::steady_clock::now() - start_).count();
  }

 private:
  std::chrono::steady_clock::time_point start_;
};

// Best and median of repeated timings, in seconds.
struct Timing {
  double best = 0.0;
  double median = 0.0;
  int repetitions = 0;
};

// A STREAM-like read probe: sums an array of `bytes` bytes (first touched by the threads that
// later read it) and reports how fast that goes. The array is allocated as the solver's large
// arrays are (internal/large_array.h: on huge pages where the kernel offers them), so that
// the probe shows what the host allows and not a handicap the model's arrays do not have.
class BandwidthProbe {
 public:
  explicit BandwidthProbe(int64_t bytes);
  // Seconds to sum the whole array with `threads` threads, `repetitions` times.
  Timing Measure(int threads, int repetitions);
  int64_t bytes() const { return size_ * static_cast<int64_t>(sizeof(double)); }
  double checksum() const { return checksum_; }  // Keeps the sums observable.

 private:
  struct Free {
    int64_t size;
    void operator()(double* p) const {
      internal::LargeArrayAllocator<double>().deallocate(p, static_cast<size_t>(size));
    }
  };
  int64_t size_;
  std::unique_ptr<double[], Free> data_;
  double checksum_ = 0.0;
};

// The synchronous sweep value iteration runs on `m` once it has decided (value_iteration.cc):
// over a tiled copy of the entries when internal::TilingPays(m), else internal::SyncSweep.
// Both give the same values bit for bit. Holds a reference to `m`.
class SolverSweep {
 public:
  explicit SolverSweep(const Model& m);
  double operator()(const double* in, double* out, int threads) const;
  bool tiled() const { return tiled_.has_value(); }
  double build_seconds() const { return build_seconds_; }

 private:
  const Model& m_;
  std::optional<internal::TiledEntries> tiled_;
  double build_seconds_ = 0.0;
};

// Which loop a sweep timing runs.
enum class SweepKernel {
  kProject,    // SolverSweep: the solver's own synchronous sweep.
  kReference,  // A plain loop over the same arrays (max over rows, fused residual) for scale.
};

// Times sweeps V <- T V from V = 0 with `threads` threads, one by one, after 2 untimed sweeps
// that warm caches and the thread pool: at least `repetitions` of them and, up to 10x that
// many, until `min_seconds` have passed, so that the best of them finds a quiet moment on a
// shared machine.
Timing TimeSweeps(const Model& m, const SolverSweep& project, SweepKernel kernel, int threads,
                  int repetitions, double min_seconds);

// The probe and the solver's sweep timed in alternation, one of each per round, so that both
// see the same moment of a shared machine: `rounds` pairs after 2 untimed sweeps and one
// untimed probe. ratio[i] is round i's sweep rate (sweep_bytes per second) over its probe
// rate; its median is what the bandwidth target is judged on.
struct PairedTiming {
  Timing probe;
  Timing sweep;
  std::vector<double> ratio;  // Sorted.
};
PairedTiming TimePairedWithProbe(const Model& m, const SolverSweep& project,
                                 BandwidthProbe& probe, int threads, int rounds);

// One synchronous sweep with the reference loop; returns sup |out - in|. Maximising models.
double ReferenceSweep(const Model& m, const double* in, double* out, int threads);

// Bytes a synchronous sweep reads if every array element is read once: the CSR arrays
// (state_row_begin, row_reward, row_entry_begin, entry_next, entry_probability) plus V.
int64_t SweepBytes(const Model& m);

// Bytes of the compiled model's numeric arrays (the CSR arrays above plus row actions and
// terminal flags), without names.
int64_t ModelArrayBytes(const Model& m);

// Peak and current resident set size of this process in bytes (VmHWM, VmRSS from
// /proc/self/status); -1 if unavailable.
int64_t PeakResidentBytes();
int64_t ResidentBytes();

}  // namespace mdp::bench

#endif  // MDP_SCRIPTS_BENCH_BENCH_MEASURE_H_
