#include "server/thread_setup.h"

#include <pthread.h>
#include <sys/resource.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
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

Status CheckThreadNiceness(int increment) {
  Status status = Status::Ok();
  std::thread probe([&status, increment] { status = RaiseThisThreadNiceness(increment); });
  probe.join();
  return status;
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
