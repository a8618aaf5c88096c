#include "solver/internal/total_policy.h"

#include <algorithm>
#include <cmath>

#include "solver/internal/row_dot.h"

namespace mdp::internal {

void TotalPolicyMatrix::Assign(const Model& m, const std::vector<StateId>& states,
                               const std::vector<int32_t>& local, const std::vector<RowId>& rows,
                               int threads) {
  const int64_t n = static_cast<int64_t>(states.size());
  begin_.resize(static_cast<size_t>(n) + 1);
  reward_.resize(n);
  diagonal_.resize(n);
  leak_.resize(n);
  begin_[0] = 0;
  terms_ = 1;
  for (int64_t i = 0; i < n; ++i) {
    const RowId r = rows[states[i]];
    int64_t kept = 0;
    for (int64_t e = m.entry_begin(r), end = m.entry_end(r); e < end; ++e) {
      kept += local[m.entry_next(e)] >= 0;
    }
    begin_[i + 1] = begin_[i] + kept;
    terms_ = std::max<int64_t>(terms_, m.entry_end(r) - m.entry_begin(r) + 1);
  }
  column_.resize(begin_[n]);
  probability_.resize(begin_[n]);
#pragma omp parallel for num_threads(threads) schedule(static, 4096)
  for (int64_t i = 0; i < n; ++i) {
    const RowId r = rows[states[i]];
    reward_[i] = m.row_reward(r);
    double self = 0.0, leak = 0.0;
    int64_t out = begin_[i];
    for (int64_t e = m.entry_begin(r), end = m.entry_end(r); e < end; ++e) {
      const int32_t j = local[m.entry_next(e)];
      if (j < 0) {  // A goal: value 0.
        leak += m.entry_probability(e);
        continue;
      }
      column_[out] = j;
      probability_[out++] = m.entry_probability(e);
      if (j == i) self = m.entry_probability(e);
    }
    diagonal_[i] = 1.0 - self;
    leak_[i] = leak;
  }
  // factors_ keeps its buffers for the next policy's factors (Factor() refills them; until
  // then factored_ says they are stale): fresh pages each time cost the kernel's zeroing.
  factored_ = false;
}

Status TotalPolicyMatrix::Factor(double budget_bytes, double max_multiply_adds,
                                 const StopCheck& stop, int threads) {
  factored_ = false;
  const int64_t n = size();
  LeakySystem system;
  system.size = static_cast<int32_t>(n);
  system.row_begin.assign(static_cast<size_t>(n) + 1, 0);
  system.col.reserve(column_.size());
  system.weight.reserve(column_.size());
  system.leak = leak_;
  for (int64_t i = 0; i < n; ++i) {
    for (int64_t e = begin_[i]; e < begin_[i + 1]; ++e) {
      if (column_[e] == i) continue;  // A self-loop is neither an entry nor leak.
      system.col.push_back(column_[e]);
      system.weight.push_back(probability_[e]);
    }
    system.row_begin[i + 1] = static_cast<int64_t>(system.col.size());
  }
  // A band only: a policy that reaches a goal is solved fast by iterations unless it
  // lingers, as on a long line or ring. Nested dissection's factors of a grid (about 1e9
  // multiply-adds at 100,000 cells) took 7.0 s over 8 policies on the benchmark grid with a
  // goal every 100th cell, which BiCGSTAB evaluated in 0.5 s in all.
  FactorPlan plan = PlanWithin(system, budget_bytes, FactorOrdering::kCuthillMcKee);
  if (!plan.complete || plan.bytes() > budget_bytes || plan.multiply_adds > max_multiply_adds) {
    return Status::Ok();
  }
  const Status status = factors_.Factorize(system, std::move(plan), stop, threads);
  factored_ = status.ok();
  if (!factored_) factors_ = MMatrixLu();
  if (status.code() == StatusCode::kCancelled || status.code() == StatusCode::kDeadlineExceeded) {
    return status;
  }
  return Status::Ok();  // Else factored, or a pivot was not positive: iterate instead.
}

double TotalPolicyMatrix::Residual(const double* b, const double* x, double* res,
                                   int threads) const {
  const int64_t n = size();
  double sup = 0.0;
#pragma omp parallel for num_threads(threads) reduction(max : sup) schedule(static, 4096)
  for (int64_t i = 0; i < n; ++i) {
    const int64_t e = begin_[i];
    const double acc =
        b[i] + RowDot(column_.data() + e, probability_.data() + e, begin_[i + 1] - e, x,
                      e + 8 <= begin_[n]);
    res[i] = acc - x[i];
    sup = std::max(sup, std::fabs(res[i]));
  }
  return sup;
}

void TotalPolicyMatrix::MultiplySystem(const double* x, double* y, int threads) const {
  const int64_t n = size();
#pragma omp parallel for num_threads(threads) schedule(static, 4096)
  for (int64_t i = 0; i < n; ++i) {
    const int64_t e = begin_[i];
    y[i] = x[i] - RowDot(column_.data() + e, probability_.data() + e, begin_[i + 1] - e, x,
                         e + 8 <= begin_[n]);
  }
}

void TotalPolicyMatrix::GaussSeidel(const double* b, double* x) const {
  for (int64_t i = 0, n = size(); i < n; ++i) {
    double acc = b[i];
    for (int64_t e = begin_[i], end = begin_[i + 1]; e < end; ++e) {
      if (column_[e] != i) acc += probability_[e] * x[column_[e]];
    }
    x[i] = acc / diagonal_[i];
  }
}

void TotalPolicyMatrix::LowerSolve(const double* b, double* z, int threads) const {
  ForEachLowerSolveBlock(size(), threads, [&](int64_t lo, int64_t hi) {
    for (int64_t i = lo; i < hi; ++i) {
      double acc = b[i];
      for (int64_t e = begin_[i], end = begin_[i + 1]; e < end; ++e) {
        if (column_[e] < i && column_[e] >= lo) acc += probability_[e] * z[column_[e]];
      }
      z[i] = acc / diagonal_[i];
    }
  });
}

namespace {

constexpr double kUnitRoundoff = 1.2e-16;  // 2^-53, rounded up.
// The lowest aim, in rounding allowances: the computed residual must then fall to one
// allowance, a worst case that actual rounding (of order u max|x| sqrt(terms)) stays far
// below; so the bound can still come within twice its floor.
constexpr double kFloor = 2.0;
// How close to its aim a stagnating BiCGSTAB pass must be to be restarted (BiCgStab::Pass in
// bicgstab.h).
constexpr double kNearAim = 10.0;

double SupNorm(const std::vector<double>& v, int threads) {
  double sup = 0.0;
  const int64_t n = static_cast<int64_t>(v.size());
#pragma omp parallel for num_threads(threads) reduction(max : sup) schedule(static, 4096)
  for (int64_t i = 0; i < n; ++i) sup = std::max(sup, std::fabs(v[i]));
  return sup;
}

// The true residual of x: its sup norm as a bound (what the caller's error bounds need) and
// its 2-norm (what BiCGSTAB reduces; the sup norm can lag behind it for many iterations, so
// progress is judged by the 2-norm).
class Tracker {
 public:
  Tracker(const TotalPolicyMatrix& p, const std::vector<double>& b, double target, int threads)
      : p_(p),
        b_(b),
        target_(target),
        threads_(threads),
        b_sup_(SupNorm(b, threads)),
        res_(p.size()) {}

  // Recomputes the residual of x (one product); returns true iff it meets the aim.
  bool Check(const std::vector<double>& x, TotalSolveResult& out) {
    const double computed = p_.Residual(b_.data(), x.data(), res_.data(), threads_);
    out.work += 1.0;
    double sum = 0.0;
    const int64_t n = p_.size();
#pragma omp parallel for num_threads(threads_) reduction(+ : sum) schedule(static, 4096)
    for (int64_t i = 0; i < n; ++i) sum += res_[i] * res_[i];
    norm_ = std::sqrt(sum);
    // Each entry of the computed b + P x - x carries at most (terms + 2) u (|b| + 2 max|x|) of
    // rounding, P being substochastic (the gamma_k bound: Higham 2002, Accuracy and Stability
    // of Numerical Algorithms, ch. 3, from memory).
    allowance_ =
        static_cast<double>(p_.terms() + 2) * kUnitRoundoff * (b_sup_ + 2.0 * SupNorm(x, threads_));
    out.residual = std::isfinite(computed) ? computed + allowance_ : computed;
    out.aim = std::max(target_, kFloor * allowance_);
    return out.residual <= out.aim;
  }
  // Whether x meets the aim, and its residual's 2-norm, computed into a scratch vector (the
  // Krylov state stays intact) and left out of `out` but for the work.
  BiCgStabLook Look(const std::vector<double>& x, TotalSolveResult& out) {
    scratch_.resize(res_.size());
    const double computed = p_.Residual(b_.data(), x.data(), scratch_.data(), threads_);
    out.work += 1.0;
    const double allowance =
        static_cast<double>(p_.terms() + 2) * kUnitRoundoff * (b_sup_ + 2.0 * SupNorm(x, threads_));
    double sum = 0.0;
    const int64_t n = p_.size();
#pragma omp parallel for num_threads(threads_) reduction(+ : sum) schedule(static, 4096)
    for (int64_t i = 0; i < n; ++i) sum += scratch_[i] * scratch_[i];
    const double aim = std::max(target_, kFloor * allowance);
    return {computed + allowance <= aim, computed + allowance <= kNearAim * aim, std::sqrt(sum)};
  }
  // What BiCGSTAB's recursive residual should reach so that the true one meets the aim.
  double KrylovAim(const TotalSolveResult& out) const { return 0.5 * (out.aim - allowance_); }
  double norm() const { return norm_; }  // 2-norm of the last checked residual.
  std::vector<double>& residual() { return res_; }

 private:
  const TotalPolicyMatrix& p_;
  const std::vector<double>& b_;
  const double target_;
  const int threads_;
  const double b_sup_;
  std::vector<double> res_, scratch_;
  double allowance_ = 0.0;
  double norm_ = 0.0;
};

}  // namespace

TotalSolveResult SolveTotalSystem(const TotalPolicyMatrix& p, const std::vector<double>& b,
                                  double target, double max_work, int threads,
                                  const std::function<bool()>& interrupted, TotalSolvePlan& plan,
                                  std::vector<double>& x) {
  TotalSolveResult out;
  if (p.size() == 0) {
    out.reached = true;
    return out;
  }
  for (double& value : x) {
    if (!std::isfinite(value)) value = 0.0;  // A warm start gone wrong.
  }
  Tracker tracker(p, b, target, threads);
  out.reached = tracker.Check(x, out);
  auto go_on = [&] { return !out.reached && out.work < max_work && !interrupted(); };
  if (p.factored() && !plan.sweeps_only) {
    // Iterative refinement with the factors: one round reaches the rounding floor unless the
    // system is badly conditioned; the others mop up.
    std::vector<double> correction;
    for (int round = 0; round < 3 && go_on(); ++round) {
      correction = tracker.residual();
      p.SolveFactored(correction);
      for (int64_t i = 0; i < p.size(); ++i) x[i] += correction[i];
      out.work += 1.0;
      out.reached = tracker.Check(x, out);
    }
  }
  if (!plan.sweeps_only && go_on()) {
    // BiCGSTAB, restarted only after kPassWork. Its residual is far from monotone (on a
    // 100,000-state grid with one goal it grew 10^7-fold within 25 iterations before
    // converging), so short passes judged one by one fail where one long pass succeeds. A
    // pass that does not halve the residual is undone if it grew it; then the other
    // preconditioner is tried if none has succeeded yet, else sweeps take over.
    BiCgStab<TotalPolicyMatrix> krylov(p, threads);
    Preconditioner preconditioner = plan.preconditioner == Preconditioner::kUnknown
                                        ? Preconditioner::kDiagonal
                                        : plan.preconditioner;
    const BiCgStabLookFn look = [&](const std::vector<double>& y) { return tracker.Look(y, out); };
    std::vector<double> start;
    while (go_on()) {
      const double before = tracker.norm();
      start = x;
      out.work += krylov.Pass(preconditioner, tracker.KrylovAim(out),
                              std::min(kPassWork, max_work - out.work), interrupted, look, x,
                              tracker.residual());
      out.reached = tracker.Check(x, out);
      if (tracker.norm() < 0.5 * before) {
        plan.preconditioner = preconditioner;  // It works: later solves start with it.
        continue;
      }
      if (!(tracker.norm() <= before)) {  // Grown, or not a number.
        x.swap(start);
        out.reached = tracker.Check(x, out);
      }
      if (plan.preconditioner != Preconditioner::kUnknown ||
          preconditioner == Preconditioner::kLowerTriangle) {
        break;
      }
      preconditioner = Preconditioner::kLowerTriangle;
    }
  }
  // Forward Gauss-Seidel: converges for a proper policy, if slowly. It stops early only when
  // kSweepStall checks in a row bring no new smallest residual (rounding noise).
  constexpr int kSweepsPerCheck = 4;
  constexpr int kSweepStall = 256;
  double smallest = tracker.norm();
  for (int since = 0; go_on() && since < kSweepStall;) {
    for (int k = 0; k < kSweepsPerCheck; ++k) p.GaussSeidel(b.data(), x.data());
    out.work += kSweepsPerCheck;
    out.reached = tracker.Check(x, out);
    since = tracker.norm() < smallest ? 0 : since + 1;
    smallest = std::min(smallest, tracker.norm());
  }
  out.interrupted = !out.reached && interrupted();
  return out;
}

}  // namespace mdp::internal
