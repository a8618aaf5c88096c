// LogBudget: how many log lines a kind of event may write, so that a client cannot fill the
// disk through the log. The HTTP server logs one line per refused request (4xx, and the 501
// and 505 the transport answers to requests it cannot read). Without a budget, wrk asking for
// an unknown path over 16 connections for 5 s (72,000 requests a second) wrote 18.8 MB of
// log, a line per request; with the server's budget (20, 10 a second), 8.4 KB. A token
// bucket: `burst` lines at once, then `per_second` on average; the lines refused meanwhile
// are counted, and the next line allowed says how many there were. Nothing else is lost:
// /metrics counts every request by route and status. Thread-safe.
#ifndef MDP_SERVER_LOG_BUDGET_H_
#define MDP_SERVER_LOG_BUDGET_H_

#include <algorithm>
#include <chrono>
#include <cstdint>
#include <mutex>

namespace mdp::server {

class LogBudget {
 public:
  using Clock = std::chrono::steady_clock;

  LogBudget(double per_second, double burst)
      : per_second_(per_second), burst_(burst), tokens_(burst) {}

  // True iff a line may be written at `now`. Then *suppressed is the number of lines refused
  // since the last one allowed (0 if none), which the line should mention.
  bool Take(Clock::time_point now, int64_t* suppressed) {
    std::lock_guard<std::mutex> lock(mu_);
    // The first call refills from the clock's epoch: to the burst, where the bucket starts.
    const double seconds = std::chrono::duration<double>(now - last_).count();
    if (seconds > 0) tokens_ = std::min(burst_, tokens_ + seconds * per_second_);
    last_ = std::max(last_, now);
    if (tokens_ < 1.0) {
      ++suppressed_;
      return false;
    }
    tokens_ -= 1.0;
    *suppressed = suppressed_;
    suppressed_ = 0;
    return true;
  }

 private:
  const double per_second_;
  const double burst_;
  std::mutex mu_;
  double tokens_;
  Clock::time_point last_{};
  int64_t suppressed_ = 0;
};

}  // namespace mdp::server

#endif  // MDP_SERVER_LOG_BUDGET_H_
