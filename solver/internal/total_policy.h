// One policy of the total-reward criterion (total_reward.h) copied out of a Model into a
// compact CSR over the non-goal states that reach a goal, and an inexact, interruptible
// solver for its linear systems (I - P_mu) x = b: b = r_mu gives the policy's values, b = 1
// its expected steps to a goal. Entries into goals are dropped (a goal's value is 0).
//
// Why not PolicyMatrix (policy_matrix.h): it covers every state and scales by the model's
// discount, which the total criterion must ignore (a model of another criterion may be
// solved as total). Not thread-safe to mutate; const members may be shared.
#ifndef MDP_SOLVER_INTERNAL_TOTAL_POLICY_H_
#define MDP_SOLVER_INTERNAL_TOTAL_POLICY_H_

#include <cstdint>
#include <functional>
#include <span>
#include <vector>

#include "solver/internal/bicgstab.h"
#include "solver/internal/large_array.h"
#include "solver/internal/mmatrix_lu.h"
#include "solver/internal/stop_check.h"
#include "solver/model.h"
#include "solver/status.h"

namespace mdp::internal {

class TotalPolicyMatrix {
 public:
  // Local row i is row rows[states[i]]; next state t becomes column local[t], and is dropped
  // when local[t] < 0. REQUIRES: every such t is a goal. Drops the last policy's factors.
  // Reuses its buffers across calls.
  void Assign(const Model& m, const std::vector<StateId>& states, const std::vector<int32_t>& local,
              const std::vector<RowId>& rows, int threads);

  int64_t size() const { return static_cast<int64_t>(reward_.size()); }
  const std::vector<double>& reward() const { return reward_; }
  // Most terms in one row of b + P x - x, for rounding allowances.
  int64_t terms() const { return terms_; }

  // res = b + P x - x; returns the computed sup |res|.
  double Residual(const double* b, const double* x, double* res, int threads) const;
  // y = x - P x.
  void MultiplySystem(const double* x, double* y, int threads) const;
  // One forward Gauss-Seidel sweep of x = b + P x, in place.
  void GaussSeidel(const double* b, double* x) const;
  // Solves (D - L) z = b, D - L the lower triangle of the diagonal blocks of I - P of
  // kLowerSolveBlock unknowns (index order; bicgstab.h), the blocks on `threads` threads.
  void LowerSolve(const double* b, double* z, int threads) const;
  // 1 - p(s | s): the diagonal of I - P, positive for a proper policy.
  const std::vector<double>& diagonal() const { return diagonal_; }

  // Factors I - P (internal/mmatrix_lu.h: no pivoting, in a fill-reducing order, the fill
  // counted before a byte is spent on it) if the factors take at most budget_bytes and
  // max_multiply_adds; else, or if a pivot is not positive, leaves the policy unfactored.
  // Returns kCancelled or kDeadlineExceeded (unfactored) if `stop` fires while it factors.
  // Factors on `threads` threads (>= 1), the same factors on any number.
  Status Factor(double budget_bytes, double max_multiply_adds, const StopCheck& stop, int threads);
  bool factored() const { return factored_; }
  // x <- (I - P)^-1 x, up to rounding. REQUIRES: factored().
  void SolveFactored(std::span<double> x) const { factors_.Solve(x); }

 private:
  LargeVector<int64_t> begin_;  // Size size() + 1.
  LargeVector<int32_t> column_;
  LargeVector<double> probability_;
  std::vector<double> reward_;
  std::vector<double> diagonal_;
  std::vector<double> leak_;  // Probability of stepping into a goal, summed, not subtracted.
  int64_t terms_ = 1;
  MMatrixLu factors_;
  bool factored_ = false;
};

// Work of one BiCGSTAB pass before it restarts from the true residual.
inline constexpr double kPassWork = 4000.0;

// What the solves of one policy iteration learn and keep: policies of one model share their
// structure, so the preconditioner that let BiCGSTAB converge on one serves the others.
struct TotalSolvePlan {
  bool sweeps_only = false;  // Forward Gauss-Seidel sweeps only (LinearSolver::kSweeps).
  Preconditioner preconditioner = Preconditioner::kUnknown;  // Known once one succeeded.
};

struct TotalSolveResult {
  // Bound on the exact sup |b + P x - x| at the returned x: the computed residual plus the
  // rounding it may hide.
  double residual = 0.0;
  double aim = 0.0;          // The residual aimed at: max(target, 2 x rounding allowance).
  bool reached = false;      // residual <= aim.
  bool interrupted = false;  // Stopped by `interrupted` before reaching the aim.
  double work = 0.0;         // Products with P spent (a lower-triangle solve counts 0.8).
};

// Improves x (the warm start on entry, size p.size()) towards (I - P)^-1 b: if p is factored
// (and not plan.sweeps_only), by up to three rounds of the correction
// x += (I - P)^-1 (b + P x - x) through the factors; then, or else, by BiCGSTAB passes
// of up to kPassWork restarted from the true residual (diagonal preconditioner first, the
// lower triangle if that fails, then what `plan` learnt), then forward Gauss-Seidel sweeps
// if Krylov stops making progress (or only those, with plan.sweeps_only). Stops at the aim,
// after about max_work, when interrupted() (polled about once per two products) says so, or
// when sweeps stop making progress. REQUIRES: the policy is proper, so I - P is a
// nonsingular M-matrix and Gauss-Seidel converges (Varga 1962, Matrix Iterative Analysis,
// from memory).
TotalSolveResult SolveTotalSystem(const TotalPolicyMatrix& p, const std::vector<double>& b,
                                  double target, double max_work, int threads,
                                  const std::function<bool()>& interrupted, TotalSolvePlan& plan,
                                  std::vector<double>& x);

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_TOTAL_POLICY_H_
