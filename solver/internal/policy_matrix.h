// The transition matrix of one deterministic policy, copied out of a Model into a compact CSR
// (one row per state), and an inexact solver for its values (I - g P_pi) x = r_pi.
//
// Why a copy: a policy sweep over the Model's own arrays touches one row in every state's
// block of rows, so it streams most of the model's cache lines for a quarter of their bytes.
// The copy is built once per policy (about one sweep's cost) and every evaluation step then
// reads only the chosen rows, contiguously. Not thread-safe to mutate; const members may be
// shared.
#ifndef MDP_SOLVER_INTERNAL_POLICY_MATRIX_H_
#define MDP_SOLVER_INTERNAL_POLICY_MATRIX_H_

#include <cstdint>
#include <functional>
#include <vector>

#include "solver/internal/bellman.h"
#include "solver/internal/bicgstab.h"  // Preconditioner, kLowerSolveCost.
#include "solver/internal/large_array.h"
#include "solver/model.h"

namespace mdp::internal {

class PolicyMatrix {
 public:
  // Copies row rows[s] of every state (an empty row with reward 0 where rows[s] < 0, as for
  // terminal states). Reuses its buffers across calls. The system's discount is the
  // model's, or `discount` (in (0, 1)) where given: average-reward policy iteration's warm
  // start solves the model at discounts near 1 (average_reward.cc).
  void Assign(const Model& m, const RowId* rows, int threads) {
    Assign(m, rows, m.discount(), threads);
  }
  void Assign(const Model& m, const RowId* rows, double discount, int threads);

  StateId size() const { return static_cast<StateId>(reward_.size()); }
  double discount() const { return discount_; }

  // y = r_pi + g P_pi x (the policy's Bellman operator); returns sup |y - x|.
  double Apply(const double* x, double* y, int threads) const;
  // In-place Gauss-Seidel sweep of x = r_pi + g P_pi x, states in index order; returns the
  // largest change.
  double GaussSeidel(double* x) const;
  // Solves (D - L) z = b where D - L is the lower triangle of the system's diagonal blocks
  // of kLowerSolveBlock states (the forward Gauss-Seidel preconditioner, bicgstab.h), the
  // blocks on `threads` threads. Entries must be sorted by next state.
  void LowerSolve(const double* b, double* z, int threads) const;
  // y = x - g P_pi x (the matrix of the evaluation system).
  void MultiplySystem(const double* x, double* y, int threads) const;
  // 1 - g p(s | s): the system's diagonal (never below 1 - g > 0).
  const std::vector<double>& diagonal() const { return diagonal_; }
  const std::vector<double>& reward() const { return reward_; }
  bool empty_row(StateId s) const { return begin_[s] == begin_[s + 1]; }

 private:
  double discount_ = 0.0;
  KernelSet kernels_ = KernelSet::kPortable;  // ChooseKernels of the model (bellman.h).
  LargeVector<int64_t> begin_;  // Size states + 1.
  LargeVector<StateId> next_;
  LargeVector<double> scaled_probability_;  // g p(s' | s, pi(s)).
  std::vector<double> reward_;
  std::vector<double> diagonal_;
};

// Work spent on each preconditioner when SolvePolicyValues probes them.
inline constexpr double kProbeWork = 24.0;
// The probe keeps the lower triangle only when its rate (log of the residual's fall per unit
// of work) beats the diagonal's by this factor. On the 1M-state near-state ring the two rates
// came within 4 % of each other (diagonal 0.0203; lower triangle 0.0199 over the whole
// triangle, 0.0206-0.0211 on blocks of 262,144 or 65,536 states), and the whole solve then took
// 392 units with the diagonal against 522-524 with the lower triangle; where the lower
// triangle pays the rates lie far apart (the 1M-cell grid with slip: 0.10-0.11 against 0).
inline constexpr double kLowerTriangleMargin = 1.1;

// What the evaluations of one solve learn and keep: policies of one model share their
// structure, so the preconditioner probed on the first serves the others.
struct EvaluationPlan {
  Preconditioner preconditioner = Preconditioner::kUnknown;
};

struct EvaluationResult {
  double residual = 0.0;  // sup |r_pi + g P_pi x - x| at the returned x, recomputed directly.
  double work = 0.0;      // Work units spent (see kLowerSolveCost).
  bool interrupted = false;  // `interrupted` fired before the target was met.
};

// Improves x towards V^pi until sup |r_pi + g P_pi x - x| <= target (or max_work is spent):
// BiCGSTAB restarted from the true residual, preconditioned as `plan` says (probed first if
// unknown), with forward Gauss-Seidel sweeps as the fallback when Krylov passes fail to
// halve the residual (the operator is a g-contraction, so sweeps always progress). x holds
// the warm start on entry. `interrupted` is polled about once per two products
// (cancellation, time limits).
EvaluationResult SolvePolicyValues(const PolicyMatrix& p, double target, double max_work,
                                   int threads, const std::function<bool()>& interrupted,
                                   EvaluationPlan& plan, std::vector<double>& x);

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_POLICY_MATRIX_H_
