// HttpServer: the HTTP front of the planning service (API: api-schema/openapi.json). Over its
// transport (http_transport.h: an epoll set served by a fixed pool of threads, which idle
// connections do not hold), it checks the bearer token, body size and content type, routes
// requests to thin handlers (routes.cc), records per-route metrics and logs one line per
// request (at debug when answered with 2xx or 3xx; info when refused: 4xx, 501 and 505, at
// most as many as a LogBudget allows (log_budget.h); warn for the other 5xx). Solves never
// run on its threads. Serve() blocks; Stop() may be called from any
// thread.
#ifndef MDP_SERVER_HTTP_SERVER_H_
#define MDP_SERVER_HTTP_SERVER_H_

#include <cstdint>
#include <memory>
#include <string>

#include "server/metrics.h"
#include "server/planning_service.h"
#include "solver/status.h"

namespace mdp::server {

struct HttpOptions {
  std::string host = "127.0.0.1";
  int port = 8080;  // 0: any free port (see HttpServer::port()).
  // Threads that read requests and run handlers; 0: 1 per usable core, at least 2.
  int threads = 0;
  int64_t body_limit = int64_t{256} << 20;  // Bytes; larger bodies get 413.
  int idle_timeout_seconds = 30;            // A connection silent this long is closed.
  std::string token;                        // Non-empty: required as "Bearer <token>".
  int large_request_niceness = 0;  // Added to the large-request thread's nice value, 0 to 19.
  // Time slice of the threads that answer requests, in microseconds (thread_setup.h); 0: the
  // kernel's default.
  int thread_slice_us = 0;
};

class HttpServer {
 public:
  HttpServer(PlanningService& service, MetricsRegistry& registry, HttpOptions options);
  ~HttpServer();

  // Binds the listening socket. kUnavailable if the address cannot be bound.
  Status Bind();
  int port() const;
  // Accepts connections until Stop(). REQUIRES: Bind() succeeded.
  void Serve();
  void Stop();

 private:
  struct Impl;
  std::unique_ptr<Impl> impl_;
};

// The OpenAPI document served at /v1/openapi.json (generated from api-schema/openapi.json).
extern const char* const kOpenApiDocument;

}  // namespace mdp::server

#endif  // MDP_SERVER_HTTP_SERVER_H_
