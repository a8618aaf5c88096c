// One pass of BiCGSTAB (van der Vorst 1992), right-preconditioned, on a policy's evaluation
// system A dx = res, shared by the discounted (policy_matrix.h: A = I - g P) and the
// total-reward (total_policy.h: A = I - P) evaluations. A BiCgStab holds a reference to its
// operator (which must outlive it) and owns its work vectors; it runs one pass at a time (not
// thread-safe), each on `threads` OpenMP threads.
#ifndef MDP_SOLVER_INTERNAL_BICGSTAB_H_
#define MDP_SOLVER_INTERNAL_BICGSTAB_H_

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <functional>
#include <vector>

namespace mdp::internal {

// Work units: one product with P_pi is 1; a lower-triangle solve reads about half the
// entries.
inline constexpr double kLowerSolveCost = 0.8;

// The lower-triangle preconditioner is the lower triangle of A's diagonal blocks of this many
// unknowns (in index order): each block's forward substitution leaves out the entries that
// reach into earlier blocks, so the blocks are solved at once on all threads, and the result
// does not depend on the thread count. Forward substitution over the whole triangle kept one
// thread busy while the others waited. 1,000,000-cell grid with slip, policy iteration on 2
// threads, 6 runs each in 3 sets alternating with the whole-triangle build: 18.7-20.3 s against
// 23.8-25.2 s (3,001 against 2,922 work units); an inventory of 1,000,000 stock levels
// 2.41-2.58 s against 2.73-3.11 s.
inline constexpr int64_t kLowerSolveBlock = 65536;

// Calls solve_block(lo, hi) for each block [lo, hi) of kLowerSolveBlock unknowns (the last
// one shorter) that covers [0, n), the blocks handed out to `threads` threads on demand.
template <class SolveBlock>
void ForEachLowerSolveBlock(int64_t n, int threads, const SolveBlock& solve_block) {
  const int64_t blocks = (n + kLowerSolveBlock - 1) / kLowerSolveBlock;
#pragma omp parallel for num_threads(threads) schedule(dynamic, 1) if (blocks > 1)
  for (int64_t b = 0; b < blocks; ++b) {
    solve_block(b * kLowerSolveBlock, std::min(n, (b + 1) * kLowerSolveBlock));
  }
}

enum class Preconditioner {
  kUnknown,        // Not chosen yet: the next solve probes both.
  kDiagonal,       // Jacobi: cheap and parallel; good when next states scatter.
  kLowerTriangle,  // Forward Gauss-Seidel (D - L) within blocks of kLowerSolveBlock: follows
                   // transitions to lower indices of the same block in one pass (stock that
                   // drains, queues that empty).
};

// What a pass's `look` reports on the true residual of an iterate.
struct BiCgStabLook {
  bool meets = false;  // It meets the caller's aim: the pass ends.
  bool near = false;   // It is near that aim, where a stagnating pass had better restart.
  double norm = 0.0;   // Its 2-norm.
};
using BiCgStabLookFn = std::function<BiCgStabLook(const std::vector<double>& x)>;

// Operator provides: size(), the number of unknowns; MultiplySystem(x, y, threads), y = A x;
// LowerSolve(b, z, threads), solves (D - L) z = b for D - L the lower triangle of A's
// diagonal blocks of kLowerSolveBlock unknowns (ForEachLowerSolveBlock); and diagonal(), A's
// diagonal, every entry positive.
template <class Operator>
class BiCgStab {
 public:
  // Every kLookEvery work units, look(x) recomputes the true residual of x (one product,
  // counted by the caller): the pass ends when it meets the aim (the recursive residual can
  // stagnate above the aim while the true one is below it), or when, near the aim, its
  // 2-norm has not reached a new low (by 10 %) for kStaleLooks looks. Near the aim a restart
  // from the true residual is cheap and cures stagnation (on a 1,000,000-state grid one pass
  // stuck 10 % above its aim for 4,000 products; the restarted one met it within 66); far
  // from it the Krylov space built so far is worth keeping (restarts there made a
  // 100,000-state ring 60 % slower).
  static constexpr double kLookEvery = 64.0;
  static constexpr int kStaleLooks = 8;

  BiCgStab(const Operator& a, int threads)
      : a_(a),
        threads_(threads),
        n_(static_cast<int64_t>(a.size())),
        rhat_(n_),
        dir_(n_, 0.0),
        v_(n_, 0.0),
        y_(n_),
        z_(n_),
        t_(n_) {}

  // One pass on A dx = res, applied to x in place. REQUIRES: x and res have size() entries
  // and res holds the true residual of x; on return it holds the recursive one.
  // `preconditioner` is kDiagonal or kLowerTriangle. Stops when the recursive residual's sup
  // norm is at most `aim`, before an iteration that would take the work past `budget`, when
  // interrupted() (polled once per iteration, about once per two products) says so, when
  // `look` (if not empty) says so, or at a breakdown. Returns the work spent: a product is 1
  // unit, a lower-triangle solve kLowerSolveCost; look's products are not included.
  double Pass(Preconditioner preconditioner, double aim, double budget,
              const std::function<bool()>& interrupted, const BiCgStabLookFn& look,
              std::vector<double>& x, std::vector<double>& res) {
    const bool lower = preconditioner == Preconditioner::kLowerTriangle;
    const double half_step = lower ? 1.0 + kLowerSolveCost : 1.0;  // One product, one solve.
    const double* d = a_.diagonal().data();
    std::copy(res.begin(), res.end(), rhat_.begin());
    std::fill(dir_.begin(), dir_.end(), 0.0);
    std::fill(v_.begin(), v_.end(), 0.0);
    double rho = 1.0, alpha = 1.0, omega = 1.0, work = 0.0, next_look = kLookEvery;
    double lowest = look ? std::sqrt(Dot(res, res)) : 0.0;
    int stale = 0;
    while (work + 2.0 * half_step <= budget && !interrupted()) {
      if (look && work >= next_look) {
        next_look = work + kLookEvery;
        const BiCgStabLook seen = look(x);
        if (seen.meets) break;
        if (seen.norm < 0.9 * lowest) {
          lowest = seen.norm;
          stale = 0;
        } else if (++stale >= kStaleLooks && seen.near) {
          break;
        }
      }
      const double rho_next = Dot(rhat_, res);
      if (rho_next == 0.0 || !std::isfinite(rho_next)) break;
      const double beta = (rho_next / rho) * (alpha / omega);
      rho = rho_next;
      // y = M^-1 dir; a diagonal M in the same loop, one pass over memory instead of two.
#pragma omp parallel for num_threads(threads_) schedule(static, 4096)
      for (int64_t i = 0; i < n_; ++i) {
        dir_[i] = res[i] + beta * (dir_[i] - omega * v_[i]);
        if (!lower) y_[i] = dir_[i] / d[i];
      }
      if (lower) a_.LowerSolve(dir_.data(), y_.data(), threads_);
      a_.MultiplySystem(y_.data(), v_.data(), threads_);
      work += half_step;
      const double rv = Dot(rhat_, v_);
      if (rv == 0.0 || !std::isfinite(rv)) break;
      alpha = rho / rv;
      double sup_s = 0.0;
#pragma omp parallel for num_threads(threads_) reduction(max : sup_s) schedule(static, 4096)
      for (int64_t i = 0; i < n_; ++i) {
        res[i] -= alpha * v_[i];
        if (!lower) z_[i] = res[i] / d[i];
        sup_s = std::max(sup_s, std::fabs(res[i]));
      }
      if (sup_s <= aim) {
#pragma omp parallel for num_threads(threads_) schedule(static, 4096)
        for (int64_t i = 0; i < n_; ++i) x[i] += alpha * y_[i];
        break;
      }
      if (lower) a_.LowerSolve(res.data(), z_.data(), threads_);
      a_.MultiplySystem(z_.data(), t_.data(), threads_);
      work += half_step;
      double ts = 0.0, tt = 0.0;
#pragma omp parallel for num_threads(threads_) reduction(+ : ts, tt) schedule(static, 4096)
      for (int64_t i = 0; i < n_; ++i) {
        ts += t_[i] * res[i];
        tt += t_[i] * t_[i];
      }
      omega = tt == 0.0 ? 0.0 : ts / tt;
      double sup_r = 0.0;
#pragma omp parallel for num_threads(threads_) reduction(max : sup_r) schedule(static, 4096)
      for (int64_t i = 0; i < n_; ++i) {
        x[i] += alpha * y_[i] + omega * z_[i];
        res[i] -= omega * t_[i];
        sup_r = std::max(sup_r, std::fabs(res[i]));
      }
      if (sup_r <= aim || omega == 0.0 || !std::isfinite(sup_r)) break;
    }
    return work;
  }

 private:
  double Dot(const std::vector<double>& u, const std::vector<double>& w) const {
    double sum = 0.0;
#pragma omp parallel for num_threads(threads_) reduction(+ : sum) schedule(static, 4096)
    for (int64_t i = 0; i < n_; ++i) sum += u[i] * w[i];
    return sum;
  }

  const Operator& a_;
  const int threads_;
  const int64_t n_;
  std::vector<double> rhat_, dir_, v_, y_, z_, t_;
};

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_BICGSTAB_H_
