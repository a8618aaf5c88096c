// StopCheck: when a long computation inside one step of a method (a factorisation, a Krylov
// solve) must give up: the caller's cancel token fired or the run's deadline passed. A small
// value; polling is thread-safe (the token is atomic), the token is owned by the caller.
#ifndef MDP_SOLVER_INTERNAL_STOP_CHECK_H_
#define MDP_SOLVER_INTERNAL_STOP_CHECK_H_

#include <chrono>

#include "solver/progress.h"
#include "solver/status.h"

namespace mdp::internal {

struct StopCheck {
  using Clock = std::chrono::steady_clock;

  const CancelToken* cancel = nullptr;                    // May be null: never cancelled.
  Clock::time_point deadline = Clock::time_point::max();  // max(): no deadline.

  // The deadline `seconds` from now; 0 or less means none.
  static Clock::time_point DeadlineIn(double seconds) {
    if (!(seconds > 0.0)) return Clock::time_point::max();
    return Clock::now() +
           std::chrono::duration_cast<Clock::duration>(std::chrono::duration<double>(seconds));
  }

  // kCancelled if the token fired, kDeadlineExceeded if the deadline passed, else OK.
  Status Poll() const {
    if (cancel != nullptr && cancel->cancelled()) {
      return Status(StatusCode::kCancelled, "cancelled during policy evaluation");
    }
    if (deadline != Clock::time_point::max() && Clock::now() >= deadline) {
      return Status(StatusCode::kDeadlineExceeded, "time limit reached during policy evaluation");
    }
    return Status::Ok();
  }
};

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_STOP_CHECK_H_
