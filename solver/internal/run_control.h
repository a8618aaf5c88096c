// RunControl: the bookkeeping every iterative method shares — elapsed time, iteration and
// time limits, cancellation, stall detection and progress reports. One per solve; not
// thread-safe (lives on the solving thread).
#ifndef MDP_SOLVER_INTERNAL_RUN_CONTROL_H_
#define MDP_SOLVER_INTERNAL_RUN_CONTROL_H_

#include <chrono>
#include <optional>
#include <string_view>

#include "solver/options.h"
#include "solver/progress.h"
#include "solver/solution.h"

namespace mdp::internal {

class RunControl {
 public:
  RunControl(const SolveOptions& options, const ProgressFn* progress, const CancelToken* cancel)
      : options_(options), progress_(progress), cancel_(cancel),
        start_(std::chrono::steady_clock::now()) {}

  double elapsed_seconds() const {
    return std::chrono::duration<double>(std::chrono::steady_clock::now() - start_).count();
  }

  // Reports progress, then returns the outcome that must end the run now (cancelled, time or
  // iteration limit, stalled), or nullopt to go on. `iteration` counts completed iterations.
  std::optional<SolveOutcome> After(int64_t iteration, int64_t sweeps, double residual,
                                    double bound, std::string_view phase) {
    if (progress_ != nullptr && *progress_) {
      (*progress_)(Progress{iteration, sweeps, residual, bound, elapsed_seconds(), phase});
    }
    if (cancel_ != nullptr && cancel_->cancelled()) return SolveOutcome::kCancelled;
    if (options_.time_limit_seconds > 0 && elapsed_seconds() >= options_.time_limit_seconds) {
      return SolveOutcome::kTimeLimit;
    }
    if (iteration >= options_.max_iterations) return SolveOutcome::kIterationLimit;
    // Stall: no new smallest residual for kStallWindow iterations means rounding noise, not
    // convergence, is what is left.
    if (residual < best_residual_) {
      best_residual_ = residual;
      best_at_ = iteration;
    } else if (iteration - best_at_ >= kStallWindow) {
      return SolveOutcome::kStalled;
    }
    return std::nullopt;
  }

  bool cancelled() const { return cancel_ != nullptr && cancel_->cancelled(); }

 private:
  static constexpr int64_t kStallWindow = 200;
  const SolveOptions& options_;
  const ProgressFn* progress_;
  const CancelToken* cancel_;
  std::chrono::steady_clock::time_point start_;
  double best_residual_ = std::numeric_limits<double>::infinity();
  int64_t best_at_ = 0;
};

// The iterate-difference threshold below which g e / (1 - g) <= tolerance.
inline double ResidualTarget(double discount, double tolerance) {
  return discount == 0.0 ? std::numeric_limits<double>::infinity()
                         : tolerance * (1.0 - discount) / discount;
}

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_RUN_CONTROL_H_
