#include "solver/internal/tiled_sweep.h"

#include <omp.h>

#include <algorithm>
#include <cmath>

#include "solver/internal/renumber.h"

namespace mdp::internal {
namespace {

constexpr uint32_t kColumnMask = (uint32_t{1} << kTileColumnBits) - 1;

// Sorts a tile's entries by next state (the low kTileColumnBits of the code), keeping the
// order of entries with the same next state: two stable counting passes, 8 bits then the
// rest. `code_tmp` and `p_tmp` hold at least `size` entries.
void SortTileByColumn(uint32_t* code, double* p, int64_t size, uint32_t* code_tmp,
                      double* p_tmp) {
  static_assert(kTileColumnBits > 8 && kTileColumnBits <= 16);
  if (size < 2) return;
  auto pass = [size](const uint32_t* from_code, const double* from_p, uint32_t* to_code,
                     double* to_p, int shift, uint32_t buckets) {
    int64_t start[257] = {};
    for (int64_t i = 0; i < size; ++i) {
      ++start[((from_code[i] & kColumnMask) >> shift & (buckets - 1)) + 1];
    }
    for (uint32_t b = 0; b < buckets; ++b) start[b + 1] += start[b];
    for (int64_t i = 0; i < size; ++i) {
      const int64_t at = start[(from_code[i] & kColumnMask) >> shift & (buckets - 1)]++;
      to_code[at] = from_code[i];
      to_p[at] = from_p[i];
    }
  };
  pass(code, p, code_tmp, p_tmp, 0, 256);
  pass(code_tmp, p_tmp, code, p, 8, uint32_t{1} << (kTileColumnBits - 8));
}

}  // namespace

std::optional<TiledEntries> TiledEntries::Build(const Model& m, int threads) {
  const StateId n = m.num_states();
  const RowId* rb = m.state_row_begin_data();
  const int64_t* eb = m.row_entry_begin_data();
  const StateId* next = m.entry_next_data();
  const double* prob = m.entry_probability_data();
  const int64_t total = m.num_entries();
  TiledEntries t;
  t.block_state_begin_.push_back(0);
  RowId most_rows = 0;
  for (StateId s = 0; s < n; ++s) {
    if (rb[s + 1] - rb[s] > kTileMaxRows) return std::nullopt;
    if (rb[s + 1] - rb[t.block_state_begin_.back()] > kTileMaxRows) {
      most_rows = std::max(most_rows, rb[s] - rb[t.block_state_begin_.back()]);
      t.block_state_begin_.push_back(s);
    }
  }
  if (n > 0) {
    most_rows = std::max(most_rows, rb[n] - rb[t.block_state_begin_.back()]);
    t.block_state_begin_.push_back(n);
  }
  const int64_t blocks = t.num_blocks();
  t.column_blocks_ = (int64_t{n} + kColumnMask) >> kTileColumnBits;
  const int64_t cb = t.column_blocks_;
  t.tile_begin_.assign(static_cast<size_t>(blocks * cb + 1), 0);
  // Each block counts into its own tiles: no two threads write one counter.
#pragma omp parallel for num_threads(threads) schedule(dynamic, 1)
  for (int64_t b = 0; b < blocks; ++b) {
    int64_t* count = t.tile_begin_.data() + b * cb + 1;
    const int64_t first = eb[rb[t.block_state_begin_[b]]];
    const int64_t last = eb[rb[t.block_state_begin_[b + 1]]];
    for (int64_t e = first; e < last; ++e) ++count[next[e] >> kTileColumnBits];
  }
  for (size_t i = 1; i < t.tile_begin_.size(); ++i) t.tile_begin_[i] += t.tile_begin_[i - 1];
  t.code_.resize(static_cast<size_t>(total));
  t.probability_.resize(static_cast<size_t>(total));
#pragma omp parallel num_threads(threads)
  {
    std::vector<int64_t> cursor(static_cast<size_t>(cb));
    std::vector<uint32_t> code_tmp;
    std::vector<double> p_tmp;
#pragma omp for schedule(dynamic, 1)
    for (int64_t b = 0; b < blocks; ++b) {
      const int64_t* tiles = t.tile_begin_.data() + b * cb;
      std::copy(tiles, tiles + cb, cursor.begin());
      const RowId r0 = rb[t.block_state_begin_[b]];
      const RowId r1 = rb[t.block_state_begin_[b + 1]];
      for (RowId r = r0; r < r1; ++r) {
        const int64_t first = eb[r], count = eb[r + 1] - first;
        // row_dot.h's RowDot: a window of 8 adds even and odd entries apart.
        const bool window = count <= 8 && first + 8 <= total;
        for (int64_t k = 0; k < count; ++k) {
          const StateId j = next[first + k];
          const uint32_t slot = static_cast<uint32_t>(2 * (r - r0) + (window ? (k & 1) : 0));
          const int64_t at = cursor[j >> kTileColumnBits]++;
          t.code_[at] = slot << kTileColumnBits | (static_cast<uint32_t>(j) & kColumnMask);
          t.probability_[at] = prob[first + k];
        }
      }
      for (int64_t c = 0; c < cb; ++c) {
        const int64_t size = tiles[c + 1] - tiles[c];
        if (static_cast<int64_t>(code_tmp.size()) < size) {
          code_tmp.resize(static_cast<size_t>(size));
          p_tmp.resize(static_cast<size_t>(size));
        }
        SortTileByColumn(t.code_.data() + tiles[c], t.probability_.data() + tiles[c], size,
                         code_tmp.data(), p_tmp.data());
      }
    }
  }
  t.sums_.assign(static_cast<size_t>(std::max(threads, 1)),
                 std::vector<double>(static_cast<size_t>(2 * most_rows)));
  return t;
}

template <bool kMaximize>
double TiledEntries::SweepT(const Model& m, const double* in, double* out, int threads) const {
  const RowId* rb = m.state_row_begin_data();
  const double* reward = m.row_reward_data();
  const double g = m.discount();
  const int64_t blocks = num_blocks();
  const int64_t* tile_begin = tile_begin_.data();
  const uint32_t* code = code_.data();
  const double* probability = probability_.data();
  double diff = 0.0;
#pragma omp parallel num_threads(threads) reduction(max : diff)
  {
    double* sum = sums_[omp_get_thread_num()].data();
    // Blocks on demand, as the row sweep hands out its chunks (bellman_kernels.inc).
#pragma omp for schedule(dynamic, 1)
    for (int64_t b = 0; b < blocks; ++b) {
      const StateId s0 = block_state_begin_[b], s1 = block_state_begin_[b + 1];
      const RowId r0 = rb[s0];
      std::fill_n(sum, 2 * (rb[s1] - r0), 0.0);
      for (int64_t c = 0; c < column_blocks_; ++c) {
        const double* v = in + (c << kTileColumnBits);
        const int64_t tile = b * column_blocks_ + c;
        for (int64_t e = tile_begin[tile], end = tile_begin[tile + 1]; e < end; ++e) {
          const uint32_t x = code[e];
          sum[x >> kTileColumnBits] += probability[e] * v[x & kColumnMask];
        }
      }
      // As SyncSweepT: the running best is a plain max (min) from the first row.
      for (StateId s = s0; s < s1; ++s) {
        double best = 0.0;
        for (RowId r = rb[s], end = rb[s + 1]; r < end; ++r) {
          const RowId k = 2 * (r - r0);
          const double q = reward[r] + g * (sum[k] + sum[k + 1]);
          best = r == rb[s] ? q : kMaximize ? std::max(best, q) : std::min(best, q);
        }
        diff = std::max(diff, std::fabs(best - in[s]));
        out[s] = best;
      }
    }
  }
  return diff;
}

double TiledEntries::Sweep(const Model& m, const double* in, double* out, int threads) const {
  threads = std::max(threads, 1);
  if (static_cast<int>(sums_.size()) < threads) {
    const size_t size = sums_.empty() ? 0 : sums_.front().size();
    sums_.resize(static_cast<size_t>(threads), std::vector<double>(size));
  }
  return m.objective() == Objective::kMaximize ? SweepT<true>(m, in, out, threads)
                                               : SweepT<false>(m, in, out, threads);
}

bool TilingPays(const Model& m, int threads) {
  return m.num_states() >= kTiledMinStates && m.num_entries() >= kTiledMinEntries &&
         FarEntryFraction(m, {}, threads) >= kTiledMinFarFraction;
}

bool ShouldTile(const Model& m, int threads, double residual, double target,
                double sweeps_allowed) {
  const double g = m.discount();
  if (!(g > 0.0 && g < 1.0) || !(residual > target) || !(target > 0.0)) return false;
  const double left = std::log(target / residual) / std::log(g);
  return std::min(left, sweeps_allowed) >= kTiledMinSweepsLeft && TilingPays(m, threads);
}

double SweepsAllowed(const SolveOptions& options, int64_t iterations, int64_t sweeps,
                     double elapsed_seconds) {
  double allowed = static_cast<double>(options.max_iterations - iterations);
  if (options.time_limit_seconds > 0 && sweeps > 0) {
    const double pace = std::max(elapsed_seconds / static_cast<double>(sweeps), 1e-9);
    allowed = std::min(allowed, (options.time_limit_seconds - elapsed_seconds) / pace);
  }
  return allowed;
}

}  // namespace mdp::internal
