#include "solver/internal/policy_matrix.h"

#include <algorithm>
#include <cmath>

namespace mdp::internal {

void PolicyMatrix::Assign(const Model& m, const RowId* rows, double discount, int threads) {
  const StateId n = m.num_states();
  discount_ = discount;
  kernels_ = ChooseKernels(m);
  begin_.resize(static_cast<size_t>(n) + 1);
  reward_.resize(n);
  diagonal_.resize(n);
  begin_[0] = 0;
  for (StateId s = 0; s < n; ++s) {
    const int64_t length = rows[s] < 0 ? 0 : m.entry_end(rows[s]) - m.entry_begin(rows[s]);
    begin_[s + 1] = begin_[s] + length;
  }
  next_.resize(begin_[n]);
  scaled_probability_.resize(begin_[n]);
  const StateId* next = m.entry_next_data();
  const double* probability = m.entry_probability_data();
#pragma omp parallel for num_threads(threads) schedule(static, 4096)
  for (StateId s = 0; s < n; ++s) {
    double self = 0.0;
    reward_[s] = rows[s] < 0 ? 0.0 : m.row_reward(rows[s]);
    int64_t out = begin_[s];
    if (rows[s] >= 0) {
      for (int64_t e = m.entry_begin(rows[s]), end = m.entry_end(rows[s]); e < end; ++e, ++out) {
        next_[out] = next[e];
        scaled_probability_[out] = discount_ * probability[e];
        if (next[e] == s) self = scaled_probability_[out];
      }
    }
    diagonal_[s] = 1.0 - self;
  }
}

double PolicyMatrix::Apply(const double* x, double* y, int threads) const {
  return CsrCombine(begin_.data(), next_.data(), scaled_probability_.data(), size(),
                    reward_.data(), 1.0, x, y, threads, kernels_);
}

double PolicyMatrix::GaussSeidel(double* x) const {
  const StateId n = size();
  double diff = 0.0;
  for (StateId s = 0; s < n; ++s) {
    double acc = reward_[s];
    double self = 0.0;
    for (int64_t e = begin_[s], end = begin_[s + 1]; e < end; ++e) {
      if (next_[e] == s) {
        self = scaled_probability_[e];
      } else {
        acc += scaled_probability_[e] * x[next_[e]];
      }
    }
    const double y = acc / (1.0 - self);
    diff = std::max(diff, std::fabs(y - x[s]));
    x[s] = y;
  }
  return diff;
}

void PolicyMatrix::LowerSolve(const double* b, double* z, int threads) const {
  ForEachLowerSolveBlock(size(), threads, [&](int64_t lo, int64_t hi) {
    for (int64_t s = lo; s < hi; ++s) {
      double acc = b[s];
      for (int64_t e = begin_[s], end = begin_[s + 1]; e < end && next_[e] < s; ++e) {
        if (next_[e] >= lo) acc += scaled_probability_[e] * z[next_[e]];
      }
      z[s] = acc / diagonal_[s];
    }
  });
}

void PolicyMatrix::MultiplySystem(const double* x, double* y, int threads) const {
  CsrCombine(begin_.data(), next_.data(), scaled_probability_.data(), size(), x, -1.0, x, y,
             threads, kernels_);
}

namespace {

// True residual res = r + g P x - x; returns its sup norm. `scratch` receives T_pi x.
double TrueResidual(const PolicyMatrix& p, const std::vector<double>& x,
                    std::vector<double>& scratch, std::vector<double>& res, int threads) {
  const double sup = p.Apply(x.data(), scratch.data(), threads);
  for (size_t s = 0; s < x.size(); ++s) res[s] = scratch[s] - x[s];
  return sup;
}

// Residual after x <- (forward Gauss-Seidel sweep)^4: the fallback when Krylov passes fail.
// Each sweep is a g-contraction (Puterman 1994, sec. 6.3.3, from memory), so it always
// progresses.
double GaussSeidelRound(const PolicyMatrix& p, std::vector<double>& x,
                        std::vector<double>& scratch, std::vector<double>& res, int threads) {
  for (int k = 0; k < 4; ++k) p.GaussSeidel(x.data());
  return TrueResidual(p, x, scratch, res, threads);
}

}  // namespace

EvaluationResult SolvePolicyValues(const PolicyMatrix& p, double target, double max_work,
                                   int threads, const std::function<bool()>& interrupted,
                                   EvaluationPlan& plan, std::vector<double>& x) {
  EvaluationResult out;
  // A row without entries (terminal state) reads x = r exactly; set it, and every Krylov
  // vector then stays exactly 0 there.
  for (StateId s = 0; s < p.size(); ++s) {
    if (p.empty_row(s)) x[s] = p.reward()[s];
  }
  std::vector<double> scratch(p.size()), res(p.size());
  out.residual = TrueResidual(p, x, scratch, res, threads);
  out.work += 1.0;
  // No looks: the true residual is checked after each pass.
  BiCgStab<PolicyMatrix> krylov(p, threads);
  // Aim below the target: the recursive residual drifts from the true one.
  const double aim = 0.5 * target;
  if (plan.preconditioner == Preconditioner::kUnknown && out.residual > target) {
    // Probe: a short pass with each preconditioner from the same start; keep the one that
    // shrank the residual faster per unit of work, and its iterate.
    const std::vector<double> start = x, start_res = res;
    const double before = out.residual;
    double rate[2] = {0.0, 0.0};
    std::vector<double> best_x;
    double best_residual = before;
    for (Preconditioner c : {Preconditioner::kDiagonal, Preconditioner::kLowerTriangle}) {
      x = start;
      res = start_res;
      const double work = krylov.Pass(c, aim, kProbeWork, interrupted, {}, x, res) + 1.0;
      const double after = TrueResidual(p, x, scratch, res, threads);
      out.work += work;
      const int i = c == Preconditioner::kDiagonal ? 0 : 1;
      if (std::isfinite(after) && after < before) rate[i] = std::log(before / after) / work;
      if (std::isfinite(after) && after < best_residual) {
        best_residual = after;
        best_x = x;
      }
    }
    plan.preconditioner = rate[1] > kLowerTriangleMargin * rate[0] ? Preconditioner::kLowerTriangle
                                                                   : Preconditioner::kDiagonal;
    x = best_x.empty() ? start : best_x;
    out.residual = TrueResidual(p, x, scratch, res, threads);
    out.work += 1.0;
  }
  // A pass that does not halve the true residual counts as a failure; after two, Gauss-Seidel
  // sweeps take over.
  int failures = 0;
  while (failures < 2 && out.residual > target && out.work < max_work && !interrupted()) {
    const double before = out.residual;
    const std::vector<double> start = x;
    out.work += krylov.Pass(plan.preconditioner, aim, max_work - out.work, interrupted, {}, x, res);
    out.residual = TrueResidual(p, x, scratch, res, threads);
    out.work += 1.0;
    if (std::isfinite(out.residual) && out.residual < 0.5 * before) continue;
    ++failures;
    if (!std::isfinite(out.residual) || out.residual > before) {
      x = start;
      out.residual = TrueResidual(p, x, scratch, res, threads);
      out.work += 1.0;
    }
  }
  while (out.residual > target && out.work < max_work && !interrupted()) {
    out.residual = GaussSeidelRound(p, x, scratch, res, threads);
    out.work += 5.0;
  }
  out.interrupted = out.residual > target && interrupted();
  return out;
}

}  // namespace mdp::internal
