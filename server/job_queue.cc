#include "server/job_queue.h"

#include "server/thread_setup.h"

namespace mdp::server {

JobQueue::JobQueue(int workers, int64_t capacity, int niceness)
    : capacity_(capacity), niceness_(niceness) {
  for (int i = 0; i < workers; ++i) workers_.emplace_back([this] { WorkerLoop(); });
}

JobQueue::~JobQueue() { Shutdown(); }

Status JobQueue::Submit(Task task) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (stopping_) return Status(StatusCode::kUnavailable, "the service is shutting down");
    if (static_cast<int64_t>(tasks_.size()) >= capacity_) {
      return ResourceExhaustedError("the solve queue is full (" + std::to_string(capacity_) +
                                    " jobs waiting); try again later");
    }
    tasks_.push_back(std::move(task));
  }
  work_available_.notify_one();
  return Status::Ok();
}

int64_t JobQueue::queued() const {
  std::lock_guard<std::mutex> lock(mu_);
  return static_cast<int64_t>(tasks_.size());
}

int64_t JobQueue::running() const {
  std::lock_guard<std::mutex> lock(mu_);
  return running_;
}

int64_t JobQueue::Shutdown() {
  int64_t dropped = 0;
  {
    std::lock_guard<std::mutex> lock(mu_);
    if (!stopping_) {
      stopping_ = true;
      dropped = static_cast<int64_t>(tasks_.size());
      tasks_.clear();
    }
  }
  work_available_.notify_all();
  for (std::thread& t : workers_) {
    if (t.joinable()) t.join();
  }
  return dropped;
}

void JobQueue::WorkerLoop() {
  BecomeBackgroundThread("mdp-solve", niceness_);
  for (;;) {
    Task task;
    {
      std::unique_lock<std::mutex> lock(mu_);
      work_available_.wait(lock, [this] { return stopping_ || !tasks_.empty(); });
      if (tasks_.empty()) return;  // Stopping and nothing left.
      task = std::move(tasks_.front());
      tasks_.pop_front();
      ++running_;
    }
    task();
    std::lock_guard<std::mutex> lock(mu_);
    --running_;
  }
}

}  // namespace mdp::server
