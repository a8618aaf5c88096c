#include "server/http_server.h"

#include <openssl/crypto.h>
#include <spdlog/spdlog.h>

#include <algorithm>
#include <array>
#include <cctype>
#include <chrono>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "server/canonical.h"
#include "server/http_context.h"
#include "server/http_transport.h"
#include "server/log_budget.h"
#include "solver/options.h"

namespace mdp::server {
namespace {

bool IsPublic(const std::string& path) { return path == "/healthz" || path == "/readyz"; }

// The problem for a request body over --body-limit.
Problem BodyOverLimit() {
  return MakeProblem(InvalidArgumentError("the request body is over the limit"),
                     ProblemKind::kPayloadTooLarge);
}

// A problem whose "status" member is `status` (for statuses the transport answers itself:
// 400 for an unreadable request, 414 for a long target, ...).
Problem ProblemWithStatus(int status, const std::string& reason) {
  const bool client_error = status >= 400 && status < 500;
  const std::string detail = reason + " (HTTP " + std::to_string(status) + ")";
  Problem p = MakeProblem(client_error ? InvalidArgumentError(detail) : InternalError(detail));
  Json body = Json::parse(p.body);
  body["status"] = status;
  p.body = DumpJson(body);
  p.status = status;
  return p;
}

// What the exception being handled says (inside a catch block only).
std::string CurrentException() {
  try {
    throw;
  } catch (const std::exception& e) {
    return e.what();
  } catch (...) {
    return "unknown exception";
  }
}

}  // namespace

void WriteJson(httplib::Response& res, int status, const std::string& body) {
  res.status = status;
  res.set_content(body, "application/json");
}

void WriteProblem(httplib::Response& res, const Problem& problem) {
  res.status = problem.status;
  if (problem.retry_after > 0) res.set_header("Retry-After", std::to_string(problem.retry_after));
  res.set_content(problem.body, kProblemContentType);
}

bool RequireJsonBody(const httplib::Request& req, httplib::Response& res) {
  const std::string type = req.get_header_value("Content-Type");
  const std::string base = type.substr(0, type.find(';'));
  if (base == "application/json") return true;
  WriteProblem(res, MakeProblem(InvalidArgumentError("send the body as application/json, not '" +
                                                     type + "'"),
                                ProblemKind::kUnsupportedMediaType));
  return false;
}

// Segment by segment, where std::regex_match took 7.5 % of the server's CPU samples under
// query load (perf cpu-clock, wrk -t1 -c64).
bool MatchRoute(std::string_view route, std::string_view path, std::array<std::string, 2>* params) {
  size_t count = 0;
  for (;;) {
    const size_t route_end = std::min(route.find('/', 1), route.size());
    const size_t path_end = std::min(path.find('/', 1), path.size());
    const std::string_view want = route.substr(0, route_end);
    const std::string_view got = path.substr(0, path_end);
    if (want.size() > 2 && want[1] == '{') {  // "/{name}"
      const std::string_view value = got.substr(got.empty() ? 0 : 1);
      if (got.empty() || got[0] != '/' || value.empty() || value.size() > 64 ||
          count == params->size()) {
        return false;
      }
      for (const char c : value) {
        if (!std::isalnum(static_cast<unsigned char>(c)) && c != '_' && c != '-') return false;
      }
      (*params)[count++] = std::string(value);
    } else if (want != got) {
      return false;
    }
    route.remove_prefix(route_end);
    path.remove_prefix(path_end);
    if (route.empty() || path.empty()) break;
  }
  if (!route.empty() || !path.empty()) return false;
  for (size_t i = count; i < params->size(); ++i) (*params)[i].clear();
  return true;
}

struct HttpServer::Impl {
  Impl(PlanningService& service, MetricsRegistry& registry, HttpOptions options)
      : context{service, registry},
        options(std::move(options)),
        metrics(&registry, RouteList()),
        token_digest(this->options.token.empty() ? "" : Sha256Hex(this->options.token)),
        unmatched(metrics.For(HttpMetrics::kUnmatchedRoute, HttpMetrics::kUnmatchedMethod)),
        transport(
            TransportOptionsOf(this->options),
            [this](httplib::Request& req, std::string body, httplib::Response& res) {
              Handle(req, std::move(body), res);
            },
            [this](const httplib::Request& req, int status, const std::string& reason,
                   httplib::Response& res) { Refuse(req, status, reason, res); }) {
    for (const Route& route : ApiRoutes()) {
      routes.push_back({&route, metrics.For(route.route, route.method)});
    }
  }

  static std::vector<RouteMethod> RouteList() {
    std::vector<RouteMethod> list;
    for (const Route& r : ApiRoutes()) list.push_back({r.route, r.method});
    return list;
  }

  static TransportOptions TransportOptionsOf(const HttpOptions& o) {
    TransportOptions t;
    t.host = o.host;
    t.port = o.port;
    // One thread per core the process may run on, as nginx runs one worker per core: a thread
    // more than the cores is preempted while it holds a connection, and that request waits a
    // whole time slice. scripts/bench_queries.sh with 1 wrk thread, 2-core host, 5 s rounds
    // alternating with nginx: 16 connections, 2 threads p99 0.43-1.20 ms in 6 rounds against
    // 4 threads 0.43-6.06 ms (4 of 6 rounds over 2 ms); 64 connections, p99 1.44-1.71 ms
    // against 1.41-1.50 ms. (Earlier, with 2 wrk threads: 4 threads 74-89k req/s, 8 threads
    // 67-69k, 16 threads 49-52k.) At least 2: large uploads have a thread of their own
    // (TransportOptions::large_request_threads), but on the 2-core host 1 thread gave p99 up to
    // 1.99 ms where 2 gave 1.13-1.15 ms (wrk -t1 -c64, 4 rounds each, after the transport
    // stopped zero-filling its read buffer; 1 thread served 115k req/s, 2 threads 88k).
    t.threads = o.threads > 0 ? o.threads : std::max(2, UsableCpuCount());
    t.body_limit = o.body_limit;
    t.idle_timeout_seconds = o.idle_timeout_seconds;
    t.large_request_niceness = o.large_request_niceness;
    t.thread_slice_us = o.thread_slice_us;
    return t;
  }

  // True iff the request carries the bearer token. Compares digests in constant time, so
  // neither the content nor the length of the token leaks through timing.
  bool Authorized(const httplib::Request& req) const {
    const std::string header = req.get_header_value("Authorization");
    const std::string prefix = "Bearer ";
    if (header.compare(0, prefix.size(), prefix) != 0) return false;
    const std::string given = Sha256Hex(header.substr(prefix.size()));
    return given.size() == token_digest.size() &&
           CRYPTO_memcmp(given.data(), token_digest.data(), given.size()) == 0;
  }

  // Authorisation, routing (HEAD as GET), the handler, then metrics and the log line.
  void Handle(httplib::Request& req, std::string body, httplib::Response& res) {
    const auto start = std::chrono::steady_clock::now();
    HttpMetrics::RequestHandle* handle = unmatched;
    const char* route_name = "unmatched";
    try {
      if (!options.token.empty() && !IsPublic(req.path) && !Authorized(req)) {
        res.set_header("WWW-Authenticate", "Bearer");
        WriteProblem(res, MakeProblem(InvalidArgumentError("a valid bearer token is required"),
                                      ProblemKind::kUnauthorized));
      } else {
        const std::string_view method =
            req.method == "HEAD" ? std::string_view("GET") : std::string_view(req.method);
        const CompiledRoute* found = nullptr;
        HttpContext request_context{context.service, context.registry};
        for (const CompiledRoute& r : routes) {
          if (method == r.route->method &&
              MatchRoute(r.route->route, req.path, &request_context.path_params)) {
            found = &r;
            break;
          }
        }
        if (found == nullptr) {
          WriteProblem(res,
                       MakeProblem(NotFoundError("no route for " + req.method + " " + req.path),
                                   ProblemKind::kNotFoundRoute));
        } else {
          handle = found->handle;
          route_name = found->route->route;
          if (found->route->body_handler) {
            found->route->body_handler(request_context, req, std::move(body), res);
          } else {
            req.body = std::move(body);
            found->route->handler(request_context, req, res);
          }
        }
      }
    } catch (...) {
      spdlog::error("{} {}: unhandled exception: {}", req.method, req.path, CurrentException());
      res = httplib::Response();
      WriteProblem(res, MakeProblem(InternalError("internal error")));
    }
    if (res.status == -1) res.status = 200;
    Record(req, route_name, handle, res.status, start);
  }

  void Refuse(const httplib::Request& req, int status, const std::string& reason,
              httplib::Response& res) {
    const auto start = std::chrono::steady_clock::now();
    WriteProblem(res, status == 413   ? BodyOverLimit()
                      : status == 429 ? MakeProblem(ResourceExhaustedError(reason))
                                      : ProblemWithStatus(status, reason));
    Record(req, "unmatched", unmatched, status, start);
  }

  void Record(const httplib::Request& req, const char* route_name,
              HttpMetrics::RequestHandle* handle, int status,
              std::chrono::steady_clock::time_point start) {
    const auto now = std::chrono::steady_clock::now();
    const double seconds = std::chrono::duration<double>(now - start).count();
    HttpMetrics::Record(handle, status, seconds);
    // Answered requests at debug: at the default level (info) a line per query cost the
    // query benchmark p99 1.50-1.85 ms against 1.11-1.31 ms (4 alternating rounds, wrk -t1
    // -c64, log to a file) and wrote 5 MB/s; /metrics counts them by route and status.
    // 501 and 505 answer requests the transport cannot read: the client's fault, like a 4xx.
    const bool server_fault = status >= 500 && status != 501 && status != 505;
    const bool refused = !server_fault && status >= 400;
    const spdlog::level::level_enum level = server_fault ? spdlog::level::warn
                                            : refused    ? spdlog::level::info
                                                         : spdlog::level::debug;
    if (!spdlog::should_log(level)) return;
    int64_t suppressed = 0;
    if (refused && !refused_log.Take(now, &suppressed)) return;
    spdlog::log(level, "{} {} {} {}us{}", req.method, route_name, status,
                static_cast<int64_t>(seconds * 1e6),
                suppressed == 0 ? std::string()
                                : fmt::format(" ({} more refused requests since the last such "
                                              "line were not logged; /metrics counts them)",
                                              suppressed));
  }

  struct CompiledRoute {
    const Route* route;
    HttpMetrics::RequestHandle* handle;
  };

  HttpContext context;
  HttpOptions options;
  HttpMetrics metrics;
  // Lines for refused requests: 20 at once, then 10 a second (log_budget.h).
  LogBudget refused_log{10.0, 20.0};
  std::string token_digest;
  HttpMetrics::RequestHandle* unmatched;
  std::vector<CompiledRoute> routes;
  HttpTransport transport;
};

HttpServer::HttpServer(PlanningService& service, MetricsRegistry& registry, HttpOptions options)
    : impl_(std::make_unique<Impl>(service, registry, std::move(options))) {}

HttpServer::~HttpServer() { Stop(); }

Status HttpServer::Bind() { return impl_->transport.Bind(); }

int HttpServer::port() const { return impl_->transport.port(); }

void HttpServer::Serve() { impl_->transport.Serve(); }

void HttpServer::Stop() {
  if (impl_) impl_->transport.Stop();
}

}  // namespace mdp::server
