// Value iteration's sweep over a second, cache-blocked copy of a model's entries, for large
// models whose next states are scattered (ones that renumbering could not bring near: random
// next states). The row-by-row sweep (bellman.h) reads V[next] at random over all of V; here
// the entries of a block of rows are grouped by the block of next states they read, so that
// one tile's reads fall within 256 KiB of V (kTileColumnBits), sorted by next state, and add
// into per-row sums kept for the block. Internal: the server never includes this.
//
// The sweep gives SyncSweep's values and residual bit for bit (portable kernels): the rows'
// entries are sorted by next state (model.h), so a row's entries are met in the row's own
// order, and each is added into the sum of its position's parity, as row_dot.h's window of 8
// does (one sum for longer rows and rows without a window, as its plain loop does).
//
// Measured on 1,000,000 states x 4 actions x 8 random next states, 30 alternating sweeps each
// (medians, a stand-alone copy of both loops over the same arrays): 2 threads 28.6-31.0 ms
// against 35.2-73.7 ms row by row, 1 thread 52.8-60.1 ms against 72.9-121 ms; the row sweep's time
// moved with the load of the host's shared cache, the tiled one's much less (on a quiet host a
// plain loop came within 3 %: 28.8 against 29.5 ms, BENCHMARKS.md of 2026-12-04). The gain grows
// once V outgrows the shared cache: 2,000,000 states 66 ms against 143 ms for a plain loop,
// 4,000,000 states 276 against 440 ms (2 threads, best of 8). Next states within 16 of the state:
// equal (14.7 against 15.1 ms), so the rule below leaves local models row by row and spares them
// the copy. The copy takes 12 bytes per entry (the row sweep's own 12: an index and a probability)
// while value iteration runs, and is freed with it. These timings were taken with the model and
// the copy on 4 KiB pages; both are on huge pages now where the kernel allows (large_array.h has
// the effect: 25.0-26.3 ms against 27.8-28.0 ms for this sweep on 2 threads).
#ifndef MDP_SOLVER_INTERNAL_TILED_SWEEP_H_
#define MDP_SOLVER_INTERNAL_TILED_SWEEP_H_

#include <cstdint>
#include <limits>
#include <optional>
#include <vector>

#include "solver/internal/large_array.h"
#include "solver/model.h"
#include "solver/options.h"

namespace mdp::internal {

// A tile's next states lie in one block of 2^kTileColumnBits consecutive states (256 KiB of
// V, a quarter of one core's L2 cache on the hosts we measure).
inline constexpr int kTileColumnBits = 15;
// A block of states holds at most this many rows (its sums, two per row, take 1 MiB).
inline constexpr RowId kTileMaxRows = RowId{1} << 16;

// The rule (TilingPays): at least this many states (V of 4 MiB, past L2) ...
inline constexpr StateId kTiledMinStates = StateId{1} << 19;
// ... and this many entries ...
inline constexpr int64_t kTiledMinEntries = int64_t{1} << 22;
// ... at least this fraction of them far from their state (FarEntryFraction, renumber.h).
inline constexpr double kTiledMinFarFraction = 0.2;
// Value iteration decides after this many sweeps (ShouldTile) ...
inline constexpr int64_t kTiledDecideAfterSweeps = 4;
// ... and builds the copy only when its residual is still this many sweeps from its target at
// the discount's rate. Building took as long as 13-16 sweeps of the random 1M x 4 x 8 model
// (0.35-0.45 s against 28 ms), and on a quiet host the copy saved as little as 2-5 % of a
// sweep there, so only long runs repay it at that size.
inline constexpr double kTiledMinSweepsLeft = 200.0;

class TiledEntries {
 public:
  // The copy of m's entries, or nullopt when some state has more than kTileMaxRows rows.
  // Time O(entries), parallel over blocks of states; `threads` as resolved (>= 1).
  static std::optional<TiledEntries> Build(const Model& m, int threads);

  // out = T in with m's discount; returns sup |out - in|. SyncSweep(m, in, out, threads,
  // KernelSet::kPortable), bit for bit. REQUIRES: this was built from m. Not for concurrent
  // calls on one object (each thread's row sums are kept between calls).
  double Sweep(const Model& m, const double* in, double* out, int threads) const;

  int64_t num_blocks() const { return static_cast<int64_t>(block_state_begin_.size()) - 1; }
  int64_t num_column_blocks() const { return column_blocks_; }

 private:
  template <bool kMaximize>
  double SweepT(const Model& m, const double* in, double* out, int threads) const;

  std::vector<StateId> block_state_begin_;  // Blocks of states, each <= kTileMaxRows rows.
  int64_t column_blocks_ = 0;
  // Tile (block b, column block c) is [tile_begin_[b * column_blocks_ + c], ... + 1).
  std::vector<int64_t> tile_begin_;
  // Per entry: (2 * row within the block + parity) << kTileColumnBits | next within the
  // column block; and its probability.
  LargeVector<uint32_t> code_;
  LargeVector<double> probability_;
  mutable std::vector<std::vector<double>> sums_;  // Per thread, 2 per row of a block.
};

// True iff value iteration on m should sweep a TiledEntries copy: m has kTiledMinStates
// states, kTiledMinEntries entries, and FarEntryFraction(m) >= kTiledMinFarFraction.
bool TilingPays(const Model& m, int threads);

// Value iteration's decision after kTiledDecideAfterSweeps sweeps, the last of which changed V
// by `residual`, aiming at `target`: at discount g in (0, 1) the change shrinks by about g
// per sweep (by at least that factor: it may take fewer), so log(target / residual) / log(g)
// sweeps remain, of which the run's limits allow `sweeps_allowed` (its iteration limit, and
// its time limit at the pace so far); true iff the fewer of the two is at least
// kTiledMinSweepsLeft and TilingPays(m).
bool ShouldTile(const Model& m, int threads, double residual, double target,
                double sweeps_allowed = std::numeric_limits<double>::infinity());
// The sweeps a run's limits still allow after `iterations` iterations and `sweeps` sweeps in
// `elapsed_seconds`: its iterations left, and with a time limit no more than the time left
// at the pace so far.
double SweepsAllowed(const SolveOptions& options, int64_t iterations, int64_t sweeps,
                     double elapsed_seconds);

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_TILED_SWEEP_H_
