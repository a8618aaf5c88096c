// Status and Result<T>: how the solver core reports that a call could not be carried out.
// A Status is a small value (code + message); Result<T> holds either a T or a non-OK Status.
// Both are cheap to move and safe to hand between threads; neither is internally synchronised.
// A solver *answer* (converged, iteration limit, ...) is not a Status: see SolveOutcome.
#ifndef MDP_SOLVER_STATUS_H_
#define MDP_SOLVER_STATUS_H_

#include <cassert>
#include <optional>
#include <string>
#include <string_view>
#include <utility>
#include <variant>

namespace mdp {

enum class StatusCode {
  kOk = 0,
  kInvalidArgument,     // The input is wrong: fix it and try again.
  kNotFound,            // A named thing does not exist.
  kFailedPrecondition,  // The call is not valid in the current state.
  kResourceExhausted,   // Out of memory, queue full, over a size cap.
  kCancelled,           // The caller asked to stop.
  kDeadlineExceeded,    // A time limit passed.
  kInternal,            // A broken invariant or an unexpected failure.
  kUnavailable,         // Try again later (shutting down, store busy).
};

// Returns the lower_snake_case name of `code`, e.g. "invalid_argument".
std::string_view StatusCodeName(StatusCode code);

class [[nodiscard]] Status {
 public:
  Status() = default;  // OK.
  Status(StatusCode code, std::string message) : code_(code), message_(std::move(message)) {}

  static Status Ok() { return Status(); }
  bool ok() const { return code_ == StatusCode::kOk; }
  StatusCode code() const { return code_; }
  const std::string& message() const { return message_; }
  // "invalid_argument: state 17, action 2: probabilities sum to 0.97".
  std::string ToString() const;

 private:
  StatusCode code_ = StatusCode::kOk;
  std::string message_;
};

inline Status InvalidArgumentError(std::string m) {
  return Status(StatusCode::kInvalidArgument, std::move(m));
}
inline Status InternalError(std::string m) { return Status(StatusCode::kInternal, std::move(m)); }
inline Status ResourceExhaustedError(std::string m) {
  return Status(StatusCode::kResourceExhausted, std::move(m));
}
inline Status NotFoundError(std::string m) { return Status(StatusCode::kNotFound, std::move(m)); }
inline Status FailedPreconditionError(std::string m) {
  return Status(StatusCode::kFailedPrecondition, std::move(m));
}

// Either a value of type T or a non-OK Status. REQUIRES: constructed from a non-OK Status only.
template <typename T>
class [[nodiscard]] Result {
 public:
  Result(T value) : value_(std::move(value)) {}  // NOLINT: implicit by design.
  Result(Status status) : status_(std::move(status)) { assert(!status_.ok()); }  // NOLINT

  bool ok() const { return value_.has_value(); }
  const Status& status() const { return status_; }
  T& value() & { assert(ok()); return *value_; }
  const T& value() const& { assert(ok()); return *value_; }
  T&& value() && { assert(ok()); return std::move(*value_); }
  T& operator*() & { return value(); }
  const T& operator*() const& { return value(); }
  T&& operator*() && { return std::move(*this).value(); }
  T* operator->() { return &value(); }
  const T* operator->() const { return &value(); }

 private:
  Status status_;
  std::optional<T> value_;
};

}  // namespace mdp

#define MDP_RETURN_IF_ERROR(expr)            \
  do {                                       \
    ::mdp::Status mdp_status_ = (expr);      \
    if (!mdp_status_.ok()) return mdp_status_; \
  } while (0)

#endif  // MDP_SOLVER_STATUS_H_
