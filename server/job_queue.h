// JobQueue: a fixed pool of worker threads behind a bounded FIFO queue. Submit() refuses
// work when the queue is full instead of growing; the HTTP threads only submit, never run
// jobs. Thread-safe. Shutdown() stops accepting, lets the workers finish what they are
// running, drops what is still queued (returning it to the caller) and joins them.
#ifndef MDP_SERVER_JOB_QUEUE_H_
#define MDP_SERVER_JOB_QUEUE_H_

#include <condition_variable>
#include <cstdint>
#include <deque>
#include <functional>
#include <mutex>
#include <thread>
#include <vector>

#include "solver/status.h"

namespace mdp::server {

class JobQueue {
 public:
  using Task = std::function<void()>;

  // Starts `workers` threads; at most `capacity` tasks wait at once (running ones excluded).
  // The workers raise their nice value by `niceness` (0 to 19; thread_setup.h) before
  // they take a task, so tasks and the threads they start yield the CPU to the HTTP threads.
  JobQueue(int workers, int64_t capacity, int niceness = 0);
  ~JobQueue();  // Calls Shutdown().

  // Queues `task`; kResourceExhausted if the queue is full, kUnavailable after Shutdown().
  Status Submit(Task task);

  int64_t queued() const;   // Tasks waiting.
  int64_t running() const;  // Tasks being run.

  // Idempotent. Returns the number of queued tasks that were dropped unrun.
  int64_t Shutdown();

 private:
  void WorkerLoop();

  const int64_t capacity_;
  const int niceness_;
  mutable std::mutex mu_;
  std::condition_variable work_available_;
  std::deque<Task> tasks_;  // GUARDED_BY(mu_)
  int64_t running_ = 0;     // GUARDED_BY(mu_)
  bool stopping_ = false;   // GUARDED_BY(mu_)
  std::vector<std::thread> workers_;  // Constant after construction until Shutdown().
};

}  // namespace mdp::server

#endif  // MDP_SERVER_JOB_QUEUE_H_
