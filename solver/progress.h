// How a running solve reports progress and hears "stop". The solver calls a ProgressFn
// (from the solving thread, once per iteration) and polls a CancelToken; it never logs.
// CancelToken is thread-safe: any thread may call Cancel() while a solve polls it.
#ifndef MDP_SOLVER_PROGRESS_H_
#define MDP_SOLVER_PROGRESS_H_

#include <atomic>
#include <cstdint>
#include <functional>
#include <memory>
#include <string_view>

namespace mdp {

struct Progress {
  int64_t iteration = 0;         // Iterations completed (improvements for policy iteration).
  int64_t sweeps = 0;            // Full passes over the model so far.
  double residual = 0.0;         // Sup-norm difference of the last two iterates.
  double error_bound = 0.0;      // Bound on sup |V - V*| implied by `residual`.
  double elapsed_seconds = 0.0;  // Wall time since the solve started.
  std::string_view phase;        // "sweep", "evaluate", "improve", "finalize".
};

// Called from the solving thread. Must not throw; should return quickly.
using ProgressFn = std::function<void(const Progress&)>;

// A shareable stop flag. Copies share the flag.
class CancelToken {
 public:
  CancelToken() : flag_(std::make_shared<std::atomic<bool>>(false)) {}
  void Cancel() const { flag_->store(true, std::memory_order_relaxed); }
  bool cancelled() const { return flag_->load(std::memory_order_relaxed); }

 private:
  std::shared_ptr<std::atomic<bool>> flag_;
};

}  // namespace mdp

#endif  // MDP_SOLVER_PROGRESS_H_
