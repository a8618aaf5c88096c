#include "solver/internal/bellman.h"

#include <omp.h>

#include <algorithm>
#include <cstdint>
#include <limits>

#if defined(__GNUC__) && (defined(__x86_64__) || defined(__i386__))
#include <immintrin.h>
#define MDP_BELLMAN_HAVE_GATHER_COPY 1
#endif

namespace mdp::internal {

int ThreadCount(int threads) { return threads > 0 ? threads : UsableCpuCount(); }

namespace {

// One set of entry points per compiled copy of the kernels.
#define MDP_BELLMAN_ENTRY_POINTS                                                               \
  double SyncSweep(const Model& m, const double* in, double* out, double g, int threads) {    \
    return m.objective() == Objective::kMaximize ? SyncSweepT<true>(m, in, out, g, threads)   \
                                                 : SyncSweepT<false>(m, in, out, g, threads); \
  }                                                                                            \
  double GaussSeidelSweep(const Model& m, double* v) {                                         \
    return m.objective() == Objective::kMaximize ? GaussSeidelSweepT<true>(m, v)              \
                                                 : GaussSeidelSweepT<false>(m, v);            \
  }                                                                                            \
  double BlockGaussSeidelSweep(const Model& m, const double* in, double* out, int threads,    \
                               StateId chunk) {                                                \
    return m.objective() == Objective::kMaximize                                              \
               ? BlockGaussSeidelSweepT<true>(m, in, out, threads, chunk)                     \
               : BlockGaussSeidelSweepT<false>(m, in, out, threads, chunk);                   \
  }                                                                                            \
  double PolicySweep(const Model& m, const RowId* rows, const double* in, double* out,        \
                     int threads) {                                                            \
    return PolicySweepT(m, rows, in, out, threads);                                            \
  }                                                                                            \
  Improvement ImprovePolicy(const Model& m, const double* v, double keep_slack, RowId* rows,  \
                            int threads) {                                                     \
    return m.objective() == Objective::kMaximize                                              \
               ? ImprovePolicyT<true>(m, v, keep_slack, rows, threads)                        \
               : ImprovePolicyT<false>(m, v, keep_slack, rows, threads);                      \
  }                                                                                            \
  double CsrCombine(const int64_t* begin, const StateId* next, const double* p, StateId n,    \
                    const double* base, double sign, const double* x, double* y,               \
                    int threads) {                                                             \
    return CsrCombineT(begin, next, p, n, base, sign, x, y, threads);                         \
  }                                                                                            \
  double GreedySweep(const Model& m, const double* in, double* out, RowId* rows,              \
                     int threads) {                                                            \
    return m.objective() == Objective::kMaximize                                              \
               ? GreedySweepT<true>(m, in, out, rows, threads)                                \
               : GreedySweepT<false>(m, in, out, rows, threads);                              \
  }

namespace portable {
#include "solver/internal/bellman_kernels.inc"
MDP_BELLMAN_ENTRY_POINTS
}  // namespace portable

#ifdef MDP_BELLMAN_HAVE_GATHER_COPY
// The copy's functions are compiled for AVX2 and FMA: GCC's pragma, or clang's (the fuzz
// build, tests/fuzz/README.md, compiles with clang).
#if defined(__clang__)
#pragma clang attribute push(__attribute__((target("avx2,fma"))), apply_to = function)
#else
#pragma GCC push_options
#pragma GCC target("avx2,fma")
#endif
namespace gather {
#define MDP_BELLMAN_GATHER 1
#include "solver/internal/bellman_kernels.inc"
#undef MDP_BELLMAN_GATHER
MDP_BELLMAN_ENTRY_POINTS
}  // namespace gather
#if defined(__clang__)
#pragma clang attribute pop
#else
#pragma GCC pop_options
#endif
#endif

#undef MDP_BELLMAN_ENTRY_POINTS

bool CpuHasGather() {
#ifdef MDP_BELLMAN_HAVE_GATHER_COPY
  return __builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma");
#else
  return false;
#endif
}

}  // namespace

KernelSet ChooseKernels(const Model& /*m*/) { return KernelSet::kPortable; }

#ifdef MDP_BELLMAN_HAVE_GATHER_COPY
#define MDP_BELLMAN_DISPATCH(kernels, call) \
  return (kernels) == KernelSet::kGather && CpuHasGather() ? gather::call : portable::call
#else
#define MDP_BELLMAN_DISPATCH(kernels, call) return portable::call
#endif

double SyncSweep(const Model& m, const double* in, double* out, int threads, KernelSet k) {
  MDP_BELLMAN_DISPATCH(k, SyncSweep(m, in, out, m.discount(), threads));
}

void StageSweep(const Model& m, const double* next, double discount, double* out,
                int threads) {
  const KernelSet k = ChooseKernels(m);
#ifdef MDP_BELLMAN_HAVE_GATHER_COPY
  if (k == KernelSet::kGather && CpuHasGather()) {
    gather::SyncSweep(m, next, out, discount, threads);
    return;
  }
#endif
  portable::SyncSweep(m, next, out, discount, threads);
}

double SyncSweep(const Model& m, const double* in, double* out, int threads) {
  return SyncSweep(m, in, out, threads, ChooseKernels(m));
}

double GaussSeidelSweep(const Model& m, double* v, KernelSet k) {
  MDP_BELLMAN_DISPATCH(k, GaussSeidelSweep(m, v));
}

double GaussSeidelSweep(const Model& m, double* v) {
  return GaussSeidelSweep(m, v, ChooseKernels(m));
}

double BlockGaussSeidelSweep(const Model& m, const double* in, double* out, int threads,
                             KernelSet k, StateId chunk_states) {
  MDP_BELLMAN_DISPATCH(k, BlockGaussSeidelSweep(m, in, out, threads, chunk_states));
}

double BlockGaussSeidelSweep(const Model& m, const double* in, double* out, int threads) {
  return BlockGaussSeidelSweep(m, in, out, threads, ChooseKernels(m), kGaussSeidelChunkStates);
}

double PolicySweep(const Model& m, const RowId* rows, const double* in, double* out,
                   int threads) {
  MDP_BELLMAN_DISPATCH(ChooseKernels(m), PolicySweep(m, rows, in, out, threads));
}

Improvement ImprovePolicy(const Model& m, const double* v, double keep_slack, RowId* rows,
                          int threads) {
  MDP_BELLMAN_DISPATCH(ChooseKernels(m), ImprovePolicy(m, v, keep_slack, rows, threads));
}

double CsrCombine(const int64_t* begin, const StateId* next, const double* p, StateId n,
                  const double* base, double sign, const double* x, double* y, int threads,
                  KernelSet k) {
  MDP_BELLMAN_DISPATCH(k, CsrCombine(begin, next, p, n, base, sign, x, y, threads));
}

double GreedySweep(const Model& m, const double* in, double* out, RowId* rows, int threads) {
  MDP_BELLMAN_DISPATCH(ChooseKernels(m), GreedySweep(m, in, out, rows, threads));
}

#undef MDP_BELLMAN_DISPATCH

double BackupRoundingAllowance(const Model& m, const double* in, const double* out) {
  double scale = 0.0;
  for (StateId s = 0; s < m.num_states(); ++s) {
    scale = std::max({scale, std::fabs(in[s]), std::fabs(out[s])});
  }
  int64_t longest_row = 0;
  for (RowId r = 0; r < m.num_rows(); ++r) {
    longest_row = std::max(longest_row, m.entry_end(r) - m.entry_begin(r));
    scale = std::max(scale, std::fabs(m.row_reward(r)));
  }
  return static_cast<double>(longest_row + 4) * std::numeric_limits<double>::epsilon() * scale;
}

}  // namespace mdp::internal
