// Fuzz target: raw bytes on a connection to the HTTP transport (server/http_transport.h), as
// any client on the network may send them. One transport runs for the whole process, on
// 127.0.0.1 at an ephemeral port, with 2 connection threads and a large-request thread, a
// 4 KiB "large request" threshold and a 64 KiB body limit, so that short inputs reach every
// path: heads, chunked and Content-Length bodies, 100-continue, pipelining, refusals, the
// large-request queue and a streamed (chunked) answer for targets under /stream. Per input:
//  - the bytes are sent on a new connection, which is then half-closed; the transport must
//    answer what it can and close the connection within 5 s (a connection that outlives its
//    client's last byte by that long holds resources it should not);
//  - then a well-formed request on a fresh connection must be answered 200: whatever came
//    before, the service keeps running.
// Memory errors in the transport's threads abort the process under the sanitizers.
#include <arpa/inet.h>
#include <netinet/in.h>
#include <poll.h>
#include <sys/socket.h>
#include <unistd.h>

#include <cerrno>
#include <chrono>
#include <cstddef>
#include <cstdint>
#include <cstring>
#include <memory>
#include <string>
#include <thread>

#include "server/http_transport.h"
#include "tests/fuzz/fuzz_checks.h"

namespace {

using mdp::fuzz::Fail;
using Clock = std::chrono::steady_clock;

constexpr int kCloseSeconds = 5;

void Handle(httplib::Request& req, std::string body, httplib::Response& res) {
  if (req.path.rfind("/stream", 0) == 0) {
    auto left = std::make_shared<int>(4);
    res.set_chunked_content_provider("text/plain", [left](size_t, httplib::DataSink& sink) {
      const std::string piece(1000, 'x');
      if (!sink.write(piece.data(), piece.size())) return false;
      if (--*left == 0) sink.done();
      return true;
    });
    return;
  }
  res.status = 200;
  res.set_content(req.method + " " + req.path + " " + std::to_string(body.size()) + "\n",
                  "text/plain");
}

int Port() {
  static const int port = [] {
    mdp::server::TransportOptions options;
    options.host = "127.0.0.1";
    options.port = 0;
    options.threads = 2;
    options.body_limit = 64 << 10;
    options.idle_timeout_seconds = 2;
    options.write_timeout_seconds = 2;
    options.large_request_threads = 1;
    options.large_request_bytes = 4 << 10;
    options.large_request_queue = 1;
    auto* transport = new mdp::server::HttpTransport(
        options, Handle,
        [](const httplib::Request&, int status, const std::string& reason, httplib::Response& res) {
          res.status = status;
          res.set_content(reason, "text/plain");
        });
    if (!transport->Bind().ok()) Fail("the transport cannot bind 127.0.0.1");
    std::thread([transport] { transport->Serve(); }).detach();
    return transport->port();
  }();
  return port;
}

int Connect() {
  const int fd = ::socket(AF_INET, SOCK_STREAM, 0);
  if (fd < 0) Fail("socket() failed");
  sockaddr_in addr{};
  addr.sin_family = AF_INET;
  addr.sin_port = htons(static_cast<uint16_t>(Port()));
  addr.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
  if (::connect(fd, reinterpret_cast<sockaddr*>(&addr), sizeof addr) != 0) {
    Fail(std::string("cannot connect to the transport: ") + std::strerror(errno));
  }
  return fd;
}

// Closes without TIME_WAIT (a reset): this side half-closes first, so an orderly close would
// leave each connection in TIME_WAIT for a minute, and at thousands of inputs a second the
// ephemeral ports ran out after about 80,000 inputs. Used once the peer has closed.
void CloseAtOnce(int fd) {
  const linger now{1, 0};
  ::setsockopt(fd, SOL_SOCKET, SO_LINGER, &now, sizeof now);
  ::close(fd);
}

// Sends what the socket takes of `bytes` (the peer may close early: that ends the send).
void SendAll(int fd, const char* p, size_t n) {
  while (n > 0) {
    const ssize_t k = ::send(fd, p, n, MSG_NOSIGNAL);
    if (k <= 0) return;
    p += k;
    n -= static_cast<size_t>(k);
  }
}

// Reads until the peer closes; false if it has not after kCloseSeconds.
bool ReadUntilClosed(int fd, std::string* out) {
  const auto deadline = Clock::now() + std::chrono::seconds(kCloseSeconds);
  char buf[16384];
  while (Clock::now() < deadline) {
    pollfd p{fd, POLLIN, 0};
    const auto left =
        std::chrono::duration_cast<std::chrono::milliseconds>(deadline - Clock::now());
    if (::poll(&p, 1, static_cast<int>(left.count()) + 1) <= 0) continue;
    const ssize_t k = ::recv(fd, buf, sizeof buf, 0);
    if (k <= 0) return true;  // Closed (or reset).
    if (out != nullptr) out->append(buf, static_cast<size_t>(k));
  }
  return false;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  const int fd = Connect();
  SendAll(fd, reinterpret_cast<const char*>(data), size);
  ::shutdown(fd, SHUT_WR);
  const bool closed = ReadUntilClosed(fd, nullptr);
  CloseAtOnce(fd);
  if (!closed) Fail("the transport kept a half-closed connection open for 5 s");

  const int probe = Connect();
  const std::string request = "GET /health HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n";
  SendAll(probe, request.data(), request.size());
  std::string answer;
  const bool answered = ReadUntilClosed(probe, &answer);
  CloseAtOnce(probe);
  if (!answered || answer.rfind("HTTP/1.1 200", 0) != 0) {
    Fail("a well-formed request after the input was not answered 200: " + answer.substr(0, 80));
  }
  return 0;
}
