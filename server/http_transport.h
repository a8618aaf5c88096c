// HttpTransport: the HTTP/1.1 connection handling under HttpServer (internal to the HTTP
// layer). One epoll set holds the listening socket and every open connection; a fixed pool
// of threads waits on it, and the thread woken for a connection reads what has arrived,
// parses it and, once a request is complete, runs the application's handler and writes what
// the socket takes of the answer before it gives the connection back to the set (EPOLLONESHOT:
// one thread at a time per connection). A connection that is idle, whose request is still
// arriving or whose answer waits for the client to read holds no thread: any number of slow
// or silent clients cannot take the threads away from the others (with a thread per
// connection, 128 silent connections stopped the service for 30 s). A streamed answer (a
// content provider) is asked for one piece per turn, once the client has taken the last. A
// request with a large body is answered on a thread of its own (large_request_threads), so
// that parsing it does not hold a thread that answers the small ones; while those threads
// are busy, a few wait their turn and more are refused with 429.
//
// Framing follows RFC 9112: Content-Length or the chunked coding for request bodies (held to
// the body limit, a chunked body over it read to its end and dropped so that the connection
// stays usable), "Expect: 100-continue", keep-alive by version and Connection header, and
// pipelined requests answered in order. Timeouts: idle and partial connections are closed
// after idle_timeout_seconds without a byte; a write stalled for write_timeout_seconds
// closes its connection.
#ifndef MDP_SERVER_HTTP_TRANSPORT_H_
#define MDP_SERVER_HTTP_TRANSPORT_H_

#include <httplib.h>

#include <cstdint>
#include <functional>
#include <memory>
#include <string>

#include "solver/status.h"

namespace mdp::server {

struct TransportOptions {
  std::string host = "127.0.0.1";
  int port = 8080;   // 0: any free port.
  int threads = 16;  // Threads that read requests and run handlers.
  int64_t body_limit = int64_t{256} << 20;
  int idle_timeout_seconds = 30;
  int write_timeout_seconds = 30;
  int max_connections = 10000;  // Further connections are accepted and closed at once.
  // A request whose body has at least large_request_bytes is answered on one of
  // large_request_threads threads of its own (0: on the connection threads like the others),
  // so that parsing a large model does not hold a thread that answers queries.
  int large_request_threads = 1;
  int64_t large_request_bytes = int64_t{1} << 20;
  // Large requests waiting for those threads, at most; one more is refused with 429, so
  // that bodies read while the threads are busy cannot pile up in memory.
  int large_request_queue = 2;
  // Added to the large-request threads' nice value (thread_setup.h), 0 to 19: parsing a
  // large upload yields the CPU to the threads answering queries.
  int large_request_niceness = 0;
  // The time slice the request threads ask the kernel for, in microseconds (thread_setup.h,
  // SetThisThreadSlice); 0: the kernel's default.
  int thread_slice_us = 0;
};

// A complete request: method, target, path (percent-decoded), params (the query string,
// decoded), version and headers filled in; `body` is the whole request body. The handler
// fills `res`. Called on a transport thread; may block (it holds only its own connection).
// A content provider set in `res` is called again for each further piece, on any transport
// thread (one at a time), after the handler has returned: it must own what it reads.
using RequestHandler =
    std::function<void(httplib::Request& req, std::string body, httplib::Response& res)>;
// A request the transport refuses before any handler sees it (status 400, 413, 414, 429,
// 431, 501 or 505, with a reason): fills `res`, typically with a problem document.
using RefusalHandler = std::function<void(const httplib::Request& req, int status,
                                          const std::string& reason, httplib::Response& res)>;

class HttpTransport {
 public:
  HttpTransport(TransportOptions options, RequestHandler handler, RefusalHandler refusal);
  ~HttpTransport();
  HttpTransport(const HttpTransport&) = delete;
  HttpTransport& operator=(const HttpTransport&) = delete;

  // Binds and listens. kUnavailable if the address cannot be bound.
  Status Bind();
  int port() const;
  // Runs the threads until Stop(). REQUIRES: Bind() succeeded.
  void Serve();
  // Makes Serve() return once the threads have finished the requests they are running.
  void Stop();

 private:
  struct Impl;
  std::unique_ptr<Impl> impl_;
};

}  // namespace mdp::server

#endif  // MDP_SERVER_HTTP_TRANSPORT_H_
