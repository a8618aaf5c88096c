#include "solver/solution.h"

#include <algorithm>
#include <cmath>
#include <limits>

#include "solver/internal/bellman.h"

namespace mdp {

std::string_view SolveOutcomeName(SolveOutcome outcome) {
  switch (outcome) {
    case SolveOutcome::kConverged: return "converged";
    case SolveOutcome::kIterationLimit: return "iteration_limit";
    case SolveOutcome::kTimeLimit: return "time_limit";
    case SolveOutcome::kCancelled: return "cancelled";
    case SolveOutcome::kStalled: return "stalled";
  }
  return "unknown";
}

int64_t Solution::OptimalCount(const Model& m, StateId s) const {
  int64_t count = 0;
  for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) count += optimal_row[r];
  return count;
}

namespace {

// Fills q, values, best_row, optimal_row and action_gap for state s.
template <bool kMaximize>
int FinishState(const Model& m, StateId s, const double* v1, double tie, double pick_tie,
                Solution& out) {
  const RowId begin = m.row_begin(s);
  const RowId end = m.row_end(s);
  out.values[s] = 0.0;
  out.best_row[s] = -1;
  out.action_gap[s] = std::numeric_limits<double>::quiet_NaN();
  if (begin == end) return 0;
  RowId best_index = begin;
  for (RowId r = begin; r < end; ++r) {
    out.q[r] = internal::RowQ(m, r, v1);
    if (internal::Better<kMaximize>(out.q[r], out.q[best_index])) best_index = r;
  }
  const double best = out.q[best_index];
  if (end - begin >= 2) {
    double second = 0.0;
    bool have_second = false;
    for (RowId r = begin; r < end; ++r) {
      if (r == best_index) continue;
      if (!have_second || internal::Better<kMaximize>(out.q[r], second)) second = out.q[r];
      have_second = true;
    }
    out.action_gap[s] = std::fabs(best - second);
  }
  out.values[s] = best;
  // The pick: the first row (document order) within the caller's tie tolerance plus
  // rounding of the best Q. The set: every row within the wider tolerance that also covers
  // the solve's error bound.
  const double rounding = 1e-12 * std::max(1.0, std::fabs(best));
  int count = 0;
  for (RowId r = begin; r < end; ++r) {
    const double behind = std::fabs(out.q[r] - best);
    out.optimal_row[r] = behind <= tie + rounding ? 1 : 0;
    count += out.optimal_row[r];
    if (out.best_row[s] < 0 && behind <= pick_tie + rounding) out.best_row[s] = r;
  }
  return count;
}

template <bool kMaximize>
int64_t FinishAll(const Model& m, const double* v1, double tie, double pick_tie, int threads,
                  Solution& out) {
  int64_t tied = 0;
#pragma omp parallel for num_threads(threads) reduction(+ : tied) schedule(dynamic, 8192)
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (FinishState<kMaximize>(m, s, v1, tie, pick_tie, out) >= 2) ++tied;
  }
  return tied;
}

}  // namespace

void Finalize(const Model& m, std::span<const double> v, const SolveOptions& options,
              Solution& out) {
  const int threads = internal::ThreadCount(options.threads);
  const double g = m.discount();
  std::vector<double> v1(m.num_states());
  const double e = internal::SyncSweep(m, v.data(), v1.data(), threads);
  out.residual = e;
  // The bounds below hold in exact arithmetic; `a` covers the rounding of the computed
  // backups (BackupRoundingAllowance), so that they hold for the computed numbers too. It
  // matters when the values are large and the residual small beside them (the discounted
  // oracle fuzz target found a bound exceeded by 8e-5 with values near 2e8).
  const double a = internal::BackupRoundingAllowance(m, v.data(), v1.data());
  // |T v - V*| <= g |T v - v| / (1 - g), with T v = v1 within a, and |v1 - v| within e + a.
  const double v1_bound = g == 0.0 ? a : g * (e + 2.0 * a) / (1.0 - g) + a;
  // Q and values are computed from v1: exact Q(v1) is within g * v1_bound of Q*, the
  // computed Q within a more.
  out.q_error_bound = g * v1_bound + a;
  out.value_error_bound = g * v1_bound + a;
  out.policy_loss_bound = 2.0 * v1_bound;
  out.tie_tolerance = options.tie_tolerance + 2.0 * out.q_error_bound;
  out.values.assign(m.num_states(), 0.0);
  out.q.assign(m.num_rows(), 0.0);
  out.best_row.assign(m.num_states(), -1);
  out.optimal_row.assign(m.num_rows(), 0);
  out.action_gap.assign(m.num_states(), 0.0);
  const double pick = options.tie_tolerance;
  out.tied_states =
      m.objective() == Objective::kMaximize
          ? FinishAll<true>(m, v1.data(), out.tie_tolerance, pick, threads, out)
          : FinishAll<false>(m, v1.data(), out.tie_tolerance, pick, threads, out);
  // The pick may trail the best Q by up to pick + rounding, which costs at most that much
  // per step: add it, discounted over the horizon, to the greedy policy's loss bound.
  double largest = 0.0;
  for (double x : out.values) largest = std::max(largest, std::fabs(x));
  out.policy_loss_bound += (pick + 1e-12 * std::max(1.0, largest)) / (1.0 - g);
  out.sweeps += 2;
}

std::vector<std::pair<StateId, double>> SmallestGaps(const Model& m, const Solution& solution,
                                                     int k) {
  std::vector<std::pair<double, StateId>> gaps;
  for (StateId s = 0; s < m.num_states(); ++s) {
    const double gap = solution.action_gap[s];
    if (std::isnan(gap) || solution.OptimalCount(m, s) >= 2) continue;
    gaps.emplace_back(gap, s);
  }
  const size_t keep = std::min(gaps.size(), static_cast<size_t>(std::max(k, 0)));
  std::partial_sort(gaps.begin(), gaps.begin() + keep, gaps.end());
  std::vector<std::pair<StateId, double>> out;
  for (size_t i = 0; i < keep; ++i) out.emplace_back(gaps[i].second, gaps[i].first);
  return out;
}

}  // namespace mdp
