#include "solver/internal/bellman.h"

#include <algorithm>
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
