#include "server/thread_setup.h"

#include <pthread.h>
#include <sys/resource.h>
#include <sys/syscall.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <cstdint>
#include <cstdlib>
#include <cstring>
#include <string>
#include <thread>

namespace mdp::server {

void NameThisThread(const char* name) {
  char shortened[16] = {};
  std::strncpy(shortened, name, sizeof shortened - 1);
  ::pthread_setname_np(::pthread_self(), shortened);
}

int ThisThreadNiceness() {
  errno = 0;
  const int nice = ::getpriority(PRIO_PROCESS, static_cast<id_t>(::gettid()));
  return errno == 0 ? nice : 0;
}

Status RaiseThisThreadNiceness(int increment) {
  if (increment < 0 || increment > 19) {
    return InvalidArgumentError("a nice increment must be in [0, 19], got " +
                                std::to_string(increment));
  }
  if (increment == 0) return Status::Ok();
  const int target = std::min(19, ThisThreadNiceness() + increment);
  if (::setpriority(PRIO_PROCESS, static_cast<id_t>(::gettid()), target) != 0) {
    return Status(StatusCode::kUnavailable,
                  "cannot raise the nice value of a background thread to " +
                      std::to_string(target) + ": " + std::strerror(errno));
  }
  return Status::Ok();
}

void BecomeBackgroundThread(const char* name, int increment) {
  NameThisThread(name);
  (void)RaiseThisThreadNiceness(increment);
}

namespace {

// What `setting` returns when run on a short-lived thread of its own, so that the caller's
// scheduling is unchanged.
template <typename Setting>
Status OnProbeThread(Setting setting) {
  Status status = Status::Ok();
  std::thread probe([&status, &setting] { status = setting(); });
  probe.join();
  return status;
}

}  // namespace

Status CheckThreadNiceness(int increment) {
  return OnProbeThread([increment] { return RaiseThisThreadNiceness(increment); });
}

namespace {

// The kernel's struct sched_attr (include/uapi/linux/sched/types.h), first version (48 bytes)
// plus the utilisation clamps (56): glibc before 2.41 has neither the struct nor the calls.
struct SchedAttr {
  uint32_t size;
  uint32_t sched_policy;
  uint64_t sched_flags;
  int32_t sched_nice;
  uint32_t sched_priority;
  uint64_t sched_runtime;  // For the fair policies: the time slice, in ns (Linux 6.12+).
  uint64_t sched_deadline;
  uint64_t sched_period;
  uint32_t sched_util_min;
  uint32_t sched_util_max;
};

bool GetThisThreadAttr(SchedAttr* attr) {
  *attr = SchedAttr{};
  attr->size = sizeof(SchedAttr);
  return ::syscall(SYS_sched_getattr, 0, attr, sizeof(SchedAttr), 0) == 0;
}

}  // namespace

int64_t ThisThreadSliceMicroseconds() {
  SchedAttr attr;
  if (!GetThisThreadAttr(&attr)) return 0;
  return static_cast<int64_t>(attr.sched_runtime / 1000);
}

Status SetThisThreadSlice(int microseconds) {
  if (microseconds < kMinSliceMicroseconds || microseconds > kMaxSliceMicroseconds) {
    return InvalidArgumentError("a time slice must be in [" +
                                std::to_string(kMinSliceMicroseconds) + ", " +
                                std::to_string(kMaxSliceMicroseconds) + "] microseconds, got " +
                                std::to_string(microseconds));
  }
  SchedAttr attr;
  if (!GetThisThreadAttr(&attr)) {
    return Status(
        StatusCode::kUnavailable,
        std::string("cannot read the thread's scheduling attributes: ") + std::strerror(errno));
  }
  // The policy and nice value just read are written back unchanged; only the slice changes.
  attr.size = sizeof(SchedAttr);
  attr.sched_flags = 0;
  attr.sched_runtime = static_cast<uint64_t>(microseconds) * 1000;
  if (::syscall(SYS_sched_setattr, 0, &attr, 0) != 0) {
    return Status(StatusCode::kUnavailable, "cannot set a time slice of " +
                                                std::to_string(microseconds) +
                                                " us: " + std::strerror(errno));
  }
  if (ThisThreadSliceMicroseconds() != microseconds) {
    return Status(StatusCode::kUnavailable,
                  "this kernel has no per-thread time slices (Linux 6.12 or later has them)");
  }
  return Status::Ok();
}

Status CheckThreadSlice(int microseconds) {
  return OnProbeThread([microseconds] { return SetThisThreadSlice(microseconds); });
}

void ExecAgainWithOpenMpSpinCount(char** argv) {
  if (std::getenv("OMP_WAIT_POLICY") != nullptr || std::getenv("GOMP_SPINCOUNT") != nullptr) {
    return;
  }
  if (setenv("GOMP_SPINCOUNT", kOpenMpSpinCount, 0) != 0) return;
  execv("/proc/self/exe", argv);
  // No /proc, or the binary is gone: run on with the default, and say so to no child.
  unsetenv("GOMP_SPINCOUNT");
}

}  // namespace mdp::server
