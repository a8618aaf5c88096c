#include "tests/fuzz/loopback.h"

#include <arpa/inet.h>
#include <netinet/in.h>
#include <poll.h>
#include <sys/socket.h>
#include <unistd.h>

#include <cerrno>
#include <chrono>
#include <cstdint>
#include <cstring>

#include "tests/fuzz/fuzz_checks.h"

namespace mdp::fuzz {

int Connect(int port) {
  const int fd = ::socket(AF_INET, SOCK_STREAM, 0);
  if (fd < 0) Fail(std::string("socket() failed: ") + std::strerror(errno));
  sockaddr_in addr{};
  addr.sin_family = AF_INET;
  addr.sin_port = htons(static_cast<uint16_t>(port));
  addr.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
  // libFuzzer's timer (SIGALRM) interrupts system calls: an interrupted connect goes on in
  // the background, so wait for it to finish and read its outcome.
  int error = 0;
  if (::connect(fd, reinterpret_cast<sockaddr*>(&addr), sizeof addr) != 0) {
    error = errno;
    if (error == EINTR || error == EINPROGRESS) {
      pollfd p{fd, POLLOUT, 0};
      while (::poll(&p, 1, -1) < 0 && errno == EINTR) {
      }
      socklen_t size = sizeof error;
      if (::getsockopt(fd, SOL_SOCKET, SO_ERROR, &error, &size) != 0) error = errno;
    }
  }
  if (error != 0) Fail(std::string("cannot connect to the server: ") + std::strerror(error));
  return fd;
}

void SendAll(int fd, const char* p, size_t n) {
  while (n > 0) {
    const ssize_t k = ::send(fd, p, n, MSG_NOSIGNAL);
    if (k < 0 && errno == EINTR) continue;
    if (k <= 0) return;
    p += k;
    n -= static_cast<size_t>(k);
  }
}

bool ReadUntilClosed(int fd, std::string* out, int seconds) {
  using Clock = std::chrono::steady_clock;
  const auto deadline = Clock::now() + std::chrono::seconds(seconds);
  char buf[16384];
  while (Clock::now() < deadline) {
    pollfd p{fd, POLLIN, 0};
    const auto left =
        std::chrono::duration_cast<std::chrono::milliseconds>(deadline - Clock::now());
    if (::poll(&p, 1, static_cast<int>(left.count()) + 1) <= 0) continue;
    const ssize_t k = ::recv(fd, buf, sizeof buf, 0);
    if (k < 0 && errno == EINTR) continue;
    if (k <= 0) return true;  // Closed (or reset).
    if (out != nullptr) out->append(buf, static_cast<size_t>(k));
  }
  return false;
}

void CloseAtOnce(int fd) {
  const linger now{1, 0};
  ::setsockopt(fd, SOL_SOCKET, SO_LINGER, &now, sizeof now);
  ::close(fd);
}

std::string Exchange(int port, const std::string& request, int seconds) {
  const int fd = Connect(port);
  SendAll(fd, request.data(), request.size());
  ::shutdown(fd, SHUT_WR);
  std::string answer;
  const bool closed = ReadUntilClosed(fd, &answer, seconds);
  CloseAtOnce(fd);
  if (!closed) {
    Fail("the server kept a half-closed connection open for " + std::to_string(seconds) +
         " s after: " + request.substr(0, 200));
  }
  return answer;
}

}  // namespace mdp::fuzz
