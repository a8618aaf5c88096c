#include "solver/internal/bellman.h"

#include <omp.h>

#include <algorithm>
#include <cstdint>
#include <thread>

namespace mdp::internal {

int ThreadCount(int threads) {
  if (threads > 0) return threads;
  return static_cast<int>(std::max(1u, std::thread::hardware_concurrency()));
}

namespace {

template <bool kMaximize>
double SyncSweepT(const Model& m, const double* in, double* out, int threads) {
  const StateId n = m.num_states();
  double diff = 0.0;
#pragma omp parallel for num_threads(threads) reduction(max : diff) schedule(static, 2048)
  for (StateId s = 0; s < n; ++s) {
    const double v = BackupState<kMaximize>(m, s, in, nullptr);
    diff = std::max(diff, std::fabs(v - in[s]));
    out[s] = v;
  }
  return diff;
}

template <bool kMaximize>
double GaussSeidelSweepT(const Model& m, double* v) {
  double diff = 0.0;
  for (StateId s = 0, n = m.num_states(); s < n; ++s) {
    const double x = BackupState<kMaximize>(m, s, v, nullptr);
    diff = std::max(diff, std::fabs(x - v[s]));
    v[s] = x;
  }
  return diff;
}

template <bool kMaximize>
double BlockGaussSeidelSweepT(const Model& m, const double* in, double* out, int threads) {
  const StateId n = m.num_states();
  const RowId* rb = m.state_row_begin_data();
  const int64_t* eb = m.row_entry_begin_data();
  const StateId* next = m.entry_next_data();
  const double* prob = m.entry_probability_data();
  const double* reward = m.row_reward_data();
  const double g = m.discount();
  double diff = 0.0;
#pragma omp parallel num_threads(threads) reduction(max : diff)
  {
    const int64_t t = omp_get_thread_num(), count = omp_get_num_threads();
    const StateId lo = static_cast<StateId>(n * t / count);
    const StateId hi = static_cast<StateId>(n * (t + 1) / count);
    const uint64_t width = static_cast<uint64_t>(hi - lo);
    std::copy(in + lo, in + hi, out + lo);
    for (StateId s = lo; s < hi; ++s) {
      RowId best = -1;
      double best_q = 0.0;
      for (RowId r = rb[s], end = rb[s + 1]; r < end; ++r) {
        double acc = 0.0;
        for (int64_t e = eb[r], e_end = eb[r + 1]; e < e_end; ++e) {
          const StateId j = next[e];
          // Own block: the value updated this sweep; elsewhere: last sweep's (branch-free).
          const double* source = static_cast<uint64_t>(j - lo) < width ? out : in;
          acc += prob[e] * source[j];
        }
        const double q = reward[r] + g * acc;
        if (best < 0 || Better<kMaximize>(q, best_q)) {
          best = r;
          best_q = q;
        }
      }
      diff = std::max(diff, std::fabs(best_q - out[s]));
      out[s] = best_q;
    }
  }
  return diff;
}

template <bool kMaximize>
Improvement ImprovePolicyT(const Model& m, const double* v, double keep_slack, RowId* rows,
                           int threads) {
  const StateId n = m.num_states();
  int64_t changed = 0;
  double residual = 0.0;
#pragma omp parallel for num_threads(threads) reduction(+ : changed) reduction(max : residual) \
    schedule(static, 2048)
  for (StateId s = 0; s < n; ++s) {
    RowId best = -1;
    const double best_q = BackupState<kMaximize>(m, s, v, &best);
    residual = std::max(residual, std::fabs(best_q - v[s]));
    const RowId current = rows[s];
    if (current >= 0 && best >= 0 && current != best) {
      const double current_q = RowQ(m, current, v);
      const double slack = keep_slack * std::max(1.0, std::fabs(best_q));
      if (!Better<kMaximize>(best_q, kMaximize ? current_q + slack : current_q - slack)) {
        continue;
      }
    }
    if (best != current) {
      rows[s] = best;
      ++changed;
    }
  }
  return Improvement{changed, residual};
}

template <bool kMaximize>
double GreedySweepT(const Model& m, const double* in, double* out, RowId* rows, int threads) {
  const StateId n = m.num_states();
  double diff = 0.0;
#pragma omp parallel for num_threads(threads) reduction(max : diff) schedule(static, 2048)
  for (StateId s = 0; s < n; ++s) {
    const double v = BackupState<kMaximize>(m, s, in, &rows[s]);
    diff = std::max(diff, std::fabs(v - in[s]));
    out[s] = v;
  }
  return diff;
}

}  // namespace

double SyncSweep(const Model& m, const double* in, double* out, int threads) {
  return m.objective() == Objective::kMaximize ? SyncSweepT<true>(m, in, out, threads)
                                               : SyncSweepT<false>(m, in, out, threads);
}

double GaussSeidelSweep(const Model& m, double* v) {
  return m.objective() == Objective::kMaximize ? GaussSeidelSweepT<true>(m, v)
                                               : GaussSeidelSweepT<false>(m, v);
}

double BlockGaussSeidelSweep(const Model& m, const double* in, double* out, int threads) {
  return m.objective() == Objective::kMaximize
             ? BlockGaussSeidelSweepT<true>(m, in, out, threads)
             : BlockGaussSeidelSweepT<false>(m, in, out, threads);
}

double PolicySweep(const Model& m, const RowId* rows, const double* in, double* out,
                   int threads) {
  const StateId n = m.num_states();
  double diff = 0.0;
#pragma omp parallel for num_threads(threads) reduction(max : diff) schedule(static, 2048)
  for (StateId s = 0; s < n; ++s) {
    const double v = rows[s] < 0 ? 0.0 : RowQ(m, rows[s], in);
    diff = std::max(diff, std::fabs(v - in[s]));
    out[s] = v;
  }
  return diff;
}

Improvement ImprovePolicy(const Model& m, const double* v, double keep_slack, RowId* rows,
                          int threads) {
  return m.objective() == Objective::kMaximize
             ? ImprovePolicyT<true>(m, v, keep_slack, rows, threads)
             : ImprovePolicyT<false>(m, v, keep_slack, rows, threads);
}

double GreedySweep(const Model& m, const double* in, double* out, RowId* rows, int threads) {
  return m.objective() == Objective::kMaximize ? GreedySweepT<true>(m, in, out, rows, threads)
                                               : GreedySweepT<false>(m, in, out, rows, threads);
}

}  // namespace mdp::internal
