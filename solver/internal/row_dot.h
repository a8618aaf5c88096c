// The sum over one row of a compiled Model, sum_k p[k] * v[next[k]], as every portable loop
// of the solver computes it: the Bellman kernels' portable copy (bellman_kernels.inc) and the
// expectations of the other criteria, so a row's sum has the same bits wherever it is taken.
// Header-only, so that it inlines into each loop. Internal: the server never includes this.
#ifndef MDP_SOLVER_INTERNAL_ROW_DOT_H_
#define MDP_SOLVER_INTERNAL_ROW_DOT_H_

#include <cstdint>

#if defined(__SSE2__)
#include <emmintrin.h>
#endif

#include "solver/model.h"

namespace mdp::internal {

// A row of at most 8 entries whose 8-entry window [next, next + 8) lies inside the entry
// arrays (`window8`) is summed in 8 fixed steps on two accumulators (even and odd entries),
// each step's product kept only for the row's own entries, so the step count does not depend
// on the row and the chains of additions are half as long. Longer rows, and rows near the
// end of the arrays, add in entry order.
//
// The window's loads are unconditional and the products outside the row are masked off with
// a bitwise AND (SSE2, part of every x86-64 CPU), so that no branch depends on the row's
// length: the earlier form (`k < count ? p[k] * v[next[k]] : 0.0`) kept the load under a
// branch that the compiler could not remove, and models whose rows have different lengths
// paid a mispredicted branch in most rows. The sum is the same, bit for bit: lane 0 holds the
// even entries' running sum and lane 1 the odd ones', each from +0.0, then lane 0 + lane 1.
// Measured on 1,000,000 states x 4 x 8 (next states near the state, duplicates merged, so 40 %
// of rows hold 8 entries and the rest 5-7), best of 7 sweeps: 24.1 ms on one thread against
// 35.3 ms for the branching form, 12.0 against 17.3 ms on two; random next states (every row
// 8 entries, nothing to mispredict) 25.5-27.9 ms against 27.6-30.9 ms on two threads.
#if defined(__SSE2__)
// kKeepLanes[c][k / 2] keeps entries k and k + 1 of a row of c entries.
alignas(16) inline constexpr uint64_t kKeepLanes[9][8] = {
    {0, 0, 0, 0, 0, 0, 0, 0},
    {~0ull, 0, 0, 0, 0, 0, 0, 0},
    {~0ull, ~0ull, 0, 0, 0, 0, 0, 0},
    {~0ull, ~0ull, ~0ull, 0, 0, 0, 0, 0},
    {~0ull, ~0ull, ~0ull, ~0ull, 0, 0, 0, 0},
    {~0ull, ~0ull, ~0ull, ~0ull, ~0ull, 0, 0, 0},
    {~0ull, ~0ull, ~0ull, ~0ull, ~0ull, ~0ull, 0, 0},
    {~0ull, ~0ull, ~0ull, ~0ull, ~0ull, ~0ull, ~0ull, 0},
    {~0ull, ~0ull, ~0ull, ~0ull, ~0ull, ~0ull, ~0ull, ~0ull}};

// Sum of the kept products of a window of 8, in the order described above. v_of(k) returns
// a pointer to entry k's next-state value. The four steps are unrolled (GCC and clang read
// the pragma; -O2 left them a loop that recomputed each step's mask address): the 1M-state
// near-state model, medians of 6 alternating rounds of 15 sweeps, two runs, 17.5-17.7 ms
// against 20.7 ms on one thread; on two threads 9.1-9.5 ms against 10.6-10.8 ms in the rounds
// where the host's memory ran at its fast rate, and equal (12.1-12.2 ms) where it ran slow and
// both read as fast as it allowed. A 1M-cell grid: 18.2 against 21.3 ms on one thread.
template <typename ValueOf>
inline double Window8Dot(const double* p, int64_t count, ValueOf v_of) {
  const __m128d* keep = reinterpret_cast<const __m128d*>(kKeepLanes[count]);
  __m128d acc = _mm_setzero_pd();
#pragma GCC unroll 4
  for (int k = 0; k < 8; k += 2) {
    const __m128d vk = _mm_loadh_pd(_mm_load_sd(v_of(k)), v_of(k + 1));
    acc = _mm_add_pd(acc, _mm_and_pd(_mm_mul_pd(_mm_loadu_pd(p + k), vk), keep[k / 2]));
  }
  return _mm_cvtsd_f64(_mm_add_sd(acc, _mm_unpackhi_pd(acc, acc)));
}
#else
template <typename ValueOf>
inline double Window8Dot(const double* p, int64_t count, ValueOf v_of) {
  double a0 = 0.0, a1 = 0.0;
#pragma GCC unroll 4
  for (int k = 0; k < 8; k += 2) {
    a0 += k < count ? p[k] * *v_of(k) : 0.0;
    a1 += k + 1 < count ? p[k + 1] * *v_of(k + 1) : 0.0;
  }
  return a0 + a1;
}
#endif

inline double RowDot(const StateId* next, const double* p, int64_t count, const double* v,
                     bool window8) {
  if (count <= 8 && window8) {
    return Window8Dot(p, count, [&](int k) { return v + next[k]; });
  }
  double acc = 0.0;
  for (int64_t k = 0; k < count; ++k) acc += p[k] * v[next[k]];
  return acc;
}

// RowDot over row `r` of `m`.
inline double RowSum(const Model& m, RowId r, const double* v) {
  const int64_t b = m.row_entry_begin_data()[r];
  return RowDot(m.entry_next_data() + b, m.entry_probability_data() + b,
                m.row_entry_begin_data()[r + 1] - b, v, b + 8 <= m.num_entries());
}

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_ROW_DOT_H_
