// Sparse LU factors of the linear systems of a Markov chain restricted to a set of states:
// A = I - Q, Q >= 0 the transition probabilities among the set, which the chain leaves with
// probability leak(i) from state i. Such an A is an M-matrix, nonsingular iff the chain
// leaves the set from every state eventually. It is factorised without pivoting in a
// fill-reducing order, each pivot computed from the leaks without subtraction, so the
// factors, and A^-1 b and A^-T b for b >= 0, are accurate entry by entry however slowly the
// chain leaves (Grassmann, Taksar and Heyman 1985, "Regenerative analysis and steady state
// distributions for Markov chains", Operations Research 33(5); from memory).
// Plain values: a factorisation is immutable once built, so its solves may run on any number
// of threads at once; it owns its memory. Internal: the server never includes this.
#ifndef MDP_SOLVER_INTERNAL_MMATRIX_LU_H_
#define MDP_SOLVER_INTERNAL_MMATRIX_LU_H_

#include <cstdint>
#include <span>
#include <vector>

#include "solver/internal/large_array.h"
#include "solver/internal/stop_check.h"
#include "solver/status.h"

namespace mdp::internal {

// A = I - Q by rows: the off-diagonal entries of Q (a self-loop is left out: its probability
// is neither an entry nor leak) and each row's leak. A(i, i) = leak(i) + sum_j Q(i, j),
// which is 1 - Q(i, i) when the row's probabilities sum to 1.
struct LeakySystem {
  int32_t size = 0;
  std::vector<int64_t> row_begin = {0};  // Size size + 1.
  std::vector<int32_t> col;              // j != i, each at most once per row.
  std::vector<double> weight;            // Q(i, j) > 0.
  std::vector<double> leak;              // Per row, >= 0.

  int64_t entries() const { return row_begin.back(); }
};

// How PlanFactors orders the unknowns.
enum class FactorOrdering {
  kAutomatic,     // Cuthill-McKee; nested dissection too when that does not fit or is wide.
  kCuthillMcKee,  // Reverse Cuthill-McKee only: a band.
  kDissection,    // Nested dissection only.
};

// The elimination order and the predicted size and work of the factors.
struct FactorPlan {
  std::vector<int32_t> order;          // order[k]: the unknown eliminated k-th.
  std::vector<int32_t> position;       // Inverse of order.
  std::vector<int32_t> parent;         // Elimination tree (by position), -1 at roots.
  std::vector<int64_t> pattern_begin;  // The pattern of A + A^T without the diagonal,
  std::vector<int32_t> pattern;        // by rows (by unknown, not position).
  // Entries strictly below the diagonal of L, and so strictly above it in U (the pattern is
  // that of A + A^T). Exact for that pattern, an upper bound for A's own.
  int64_t lower_entries = 0;
  double multiply_adds = 0.0;  // The factorisation's work: sum over columns of count^2.
  // Per position k: entries of row k of L and of column k (row k of U), for that pattern.
  std::vector<int32_t> row_count;
  std::vector<int32_t> column_count;
  // False iff planning gave up (a wide search layer, or the count passed the cap); the
  // order and the counts are then not to be used.
  bool complete = false;
  FactorOrdering ordering = FactorOrdering::kAutomatic;  // The order tried last.

  // Bytes the factors take (indices and values of L and U, the pivots).
  double bytes() const;
};

// Orders the unknowns and counts the factors' entries, giving up with complete = false once
// they pass max_lower_entries. kAutomatic first tries reverse Cuthill-McKee on the pattern
// of A + A^T (each connected part searched from a pseudo-peripheral unknown), which keeps
// chains on a line or a ring in a narrow band; when that does not fit, or fits in a band
// wider than about 128, it also tries nested dissection, which keeps the factors of a grid
// near n log n entries where a band holds n^1.5, and keeps the plan with less work. Each
// order is skipped without counting when searches from two spread unknowns meet a layer
// too wide for it (an expander; see the .cc). Time O(entries log n + min(count, cap)) per
// order tried.
FactorPlan PlanFactors(const LeakySystem& a, int64_t max_lower_entries,
                       FactorOrdering ordering = FactorOrdering::kAutomatic);
// PlanFactors counting no further than `budget_bytes` of factors allow (each entry of L and
// of U holds an index and a value, FactorPlan::bytes).
FactorPlan PlanWithin(const LeakySystem& a, double budget_bytes,
                      FactorOrdering ordering = FactorOrdering::kAutomatic);

// A band (FactorizeByRows) is factored on several threads only when its plan counts at
// least this many multiply-adds per row: the threads wait for each other's last rows, and
// the rows are written into slots that are closed up afterwards. On 2 threads a ring whose
// chain moves up to 64 states either way (300,000 states, 12,000 per row) factored in
// 2.83-2.86 s against 3.98-4.03 s on one; up to 32 (3,100 per row) 1.50 against 1.58 s; up
// to 16 (1,000,000 states, 800 per row) 1.23 against 0.81 s.
inline constexpr double kBandRowWorkForThreads = 8192.0;

class MMatrixLu {
 public:
  // Factorises `a` in the order of `plan`. Returns kCancelled or kDeadlineExceeded when
  // `stop` says so (polled every few rows), kFailedPrecondition if a pivot is not positive:
  // A is singular, or its leak underflows (some part of the set keeps the chain for more
  // than about 1e308 steps); singular_at() then names an unknown of that part. The rows are
  // eliminated on up to `threads` threads (>= 1, as resolved), with the same factors and the
  // same singular_at() on any number.
  // REQUIRES: plan.complete, plan came from PlanFactors(a, ...).
  Status Factorize(const LeakySystem& a, FactorPlan plan, const StopCheck& stop, int threads = 1);

  // After Factorize returned kFailedPrecondition: the unknown whose pivot vanished; else -1.
  int32_t singular_at() const { return singular_at_; }

  // x <- A^-1 x. REQUIRES: Factorize succeeded, x.size() == size.
  void Solve(std::span<double> x) const;
  // x <- A^-T x. Same requirements.
  void SolveTransposed(std::span<double> x) const;

  int32_t size() const { return static_cast<int32_t>(pivot_.size()); }
  int64_t lower_entries() const { return static_cast<int64_t>(l_col_.size()); }
  int64_t upper_entries() const { return static_cast<int64_t>(u_col_.size()); }

 private:
  // Factorize's two kernels (see there): the rows' patterns found during the elimination, or
  // all of them first. Both start from order_ set and the other members cleared.
  struct RowScratch;
  Status FactorizeByRows(const LeakySystem& a, const FactorPlan& plan, const StopCheck& stop,
                         int threads);
  template <typename UEnd, typename Wait, typename EmitL, typename EmitU>
  bool EliminateByRows(int32_t k, const LeakySystem& a, const FactorPlan& plan,
                       const std::vector<double>& schur_leak, RowScratch& x, UEnd u_end, Wait wait,
                       EmitL emit_l, EmitU emit_u, double& leak, double& diagonal) const;
  Status FactorizeByPattern(const LeakySystem& a, const FactorPlan& plan, const StopCheck& stop,
                            int threads);
  Status SetPivot(int32_t k, double leak, double diagonal, std::vector<double>& schur_leak);
  // Records row k as singular (singular_at_) and returns kFailedPrecondition.
  Status Singular(int32_t k);

  std::vector<int32_t> order_;    // As FactorPlan::order.
  std::vector<int64_t> l_begin_;  // L by rows (unit diagonal not stored), by position.
  LargeVector<int32_t> l_col_;
  LargeVector<double> l_value_;
  std::vector<int64_t> u_begin_;  // U by rows, strictly upper part, by position.
  LargeVector<int32_t> u_col_;
  LargeVector<double> u_value_;
  std::vector<double> pivot_;  // U's diagonal.
  int32_t singular_at_ = -1;
};

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_MMATRIX_LU_H_
