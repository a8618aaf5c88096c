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
#include <cstddef>
#include <cstdint>
#include <memory>
#include <string>
#include <thread>

#include "server/http_transport.h"
#include "tests/fuzz/fuzz_checks.h"
#include "tests/fuzz/loopback.h"

namespace {

using mdp::fuzz::Fail;

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

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  const int port = Port();
  (void)mdp::fuzz::Exchange(port, std::string(reinterpret_cast<const char*>(data), size),
                            kCloseSeconds);
  const std::string answer = mdp::fuzz::Exchange(
      port, "GET /health HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n", kCloseSeconds);
  if (answer.rfind("HTTP/1.1 200", 0) != 0) {
    Fail("a well-formed request after the input was not answered 200: " + answer.substr(0, 80));
  }
  return 0;
}
