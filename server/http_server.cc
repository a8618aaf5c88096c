#include "server/http_server.h"

#include <openssl/crypto.h>
#include <sys/socket.h>
#include <spdlog/spdlog.h>

#include <chrono>
#include <cstdlib>
#include <new>
#include <optional>
#include <string>
#include <utility>

#include "server/canonical.h"
#include "server/http_context.h"

namespace mdp::server {
namespace {

// Per-request state of the connection thread serving it: set before routing, read by the
// logger after the response is written (cpp-httplib runs both on the same thread).
thread_local std::chrono::steady_clock::time_point tl_start;
thread_local HttpMetrics::RequestHandle* tl_handle = nullptr;
thread_local const char* tl_route = "unmatched";

bool IsPublic(const std::string& path) { return path == "/healthz" || path == "/readyz"; }

// The problem for a request body over --body-limit (read here or refused by cpp-httplib).
Problem BodyOverLimit() {
  return MakeProblem(InvalidArgumentError("the request body is over the limit"),
                     ProblemKind::kPayloadTooLarge);
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

struct HttpServer::Impl {
  Impl(PlanningService& service, MetricsRegistry& registry, HttpOptions options)
      : context{service, registry},
        options(std::move(options)),
        metrics(&registry, RouteList()),
        token_digest(this->options.token.empty() ? "" : Sha256Hex(this->options.token)) {}

  static std::vector<RouteMethod> RouteList() {
    std::vector<RouteMethod> list;
    for (const Route& r : ApiRoutes()) list.push_back({r.route, r.method});
    return list;
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

  // The whole request body, or nullopt after writing the problem: 413 over the body limit
  // (cpp-httplib refuses a declared Content-Length over it and skips the body; a chunked
  // body is counted here as it arrives, and the rest read and dropped, so the connection
  // stays in step for its next request), 400 if the client stopped sending before the end.
  std::optional<std::string> ReadBody(const httplib::Request& req, httplib::Response& res,
                                      const httplib::ContentReader& reader) const {
    const auto limit = static_cast<size_t>(options.body_limit);
    std::string body;
    const std::string declared = req.get_header_value("Content-Length");
    char* end = nullptr;
    const unsigned long long length = std::strtoull(declared.c_str(), &end, 10);
    if (!declared.empty() && *end == '\0' && length <= limit) {
      // Address space only: pages cost memory when the body fills them. A declared length
      // the process cannot even reserve is read with growth instead.
      try {
        body.reserve(length);
      } catch (const std::bad_alloc&) {
      }
    }
    bool over_limit = false;
    const bool read = reader([&](const char* data, size_t size) {
      if (!over_limit && size > limit - body.size()) {
        over_limit = true;
        std::string().swap(body);
      }
      if (!over_limit) body.append(data, size);
      return true;
    });
    if (read && !over_limit) return body;
    if (over_limit || res.status == 413) {
      WriteProblem(res, BodyOverLimit());
    } else {
      WriteProblem(res, MakeProblem(InvalidArgumentError(
                            "the request body could not be read to its end")));
    }
    return std::nullopt;
  }

  void Install() {
    // Debian's cpp-httplib is a shared library built with a listen backlog of 5 and
    // SO_REUSEPORT. Take the socket options over (SO_REUSEADDR only, so a second server on
    // the same port fails to bind instead of silently sharing it) and remember the socket so
    // Bind() can enlarge the backlog: with 5, bursts of new connections are dropped by the
    // kernel and retried a second or more later.
    server.set_socket_options([this](socket_t sock) {
      int yes = 1;
      ::setsockopt(sock, SOL_SOCKET, SO_REUSEADDR, &yes, sizeof yes);
      listen_fd = sock;
    });
    server.set_tcp_nodelay(true);  // Small answers must not wait on Nagle + delayed ACK.
    server.set_keep_alive_max_count(1000);  // Busy connections give their thread back now and then.
    server.set_keep_alive_timeout(30);
    server.set_read_timeout(30);
    server.set_payload_max_length(static_cast<size_t>(options.body_limit));
    const int threads = options.threads;
    server.new_task_queue = [threads] { return new httplib::ThreadPool(threads); };
    unmatched = metrics.For(HttpMetrics::kUnmatchedRoute, HttpMetrics::kUnmatchedMethod);
    server.set_pre_routing_handler([this](const httplib::Request& req, httplib::Response& res) {
      tl_start = std::chrono::steady_clock::now();
      tl_handle = unmatched;
      tl_route = "unmatched";
      if (!options.token.empty() && !IsPublic(req.path) && !Authorized(req)) {
        res.set_header("WWW-Authenticate", "Bearer");
        WriteProblem(res, MakeProblem(InvalidArgumentError("a valid bearer token is required"),
                                      ProblemKind::kUnauthorized));
        return httplib::Server::HandlerResponse::Handled;
      }
      return httplib::Server::HandlerResponse::Unhandled;
    });
    for (const Route& route : ApiRoutes()) {
      HttpMetrics::RequestHandle* handle = metrics.For(route.route, route.method);
      auto run = [this, &route, handle](const httplib::Request& req, httplib::Response& res) {
        tl_handle = handle;
        tl_route = route.route;
        route.handler(context, req, res);
      };
      const std::string method = route.method;
      if (method == "GET") server.Get(route.pattern, run);
      if (method == "POST") server.Post(route.pattern, run);
      if (method == "DELETE") server.Delete(route.pattern, run);
      if (method == "POST") {
        // cpp-httplib tries these first for requests with a body, before reading it. The
        // body is read here, into a string of our own: sized once from Content-Length, and
        // held to the body limit in the chunked coding too, which cpp-httplib does not limit.
        server.Post(route.pattern, [this, &route, handle](const httplib::Request& req,
                                                          httplib::Response& res,
                                                          const httplib::ContentReader& reader) {
          tl_handle = handle;
          tl_route = route.route;
          std::optional<std::string> body = ReadBody(req, res, reader);
          if (!body) return;
          if (route.body_handler) return route.body_handler(context, req, std::move(*body), res);
          httplib::Request with_body = req;
          with_body.body = std::move(*body);
          route.handler(context, with_body, res);
        });
      }
    }
    server.set_error_handler([](const httplib::Request& req, httplib::Response& res) {
      if (!res.body.empty()) return;
      if (res.status == 413) {
        WriteProblem(res, BodyOverLimit());
      } else if (res.status == 404) {
        WriteProblem(res, MakeProblem(NotFoundError("no route for " + req.method + " " + req.path),
                                      ProblemKind::kNotFoundRoute));
      } else {
        // Statuses cpp-httplib sets itself (400 for an unreadable request, 414 for a long
        // URI, ...): the problem's "status" member must be the response's status.
        const bool client_error = res.status >= 400 && res.status < 500;
        const std::string detail =
            "the request could not be handled (HTTP " + std::to_string(res.status) + ")";
        Problem p = MakeProblem(client_error ? InvalidArgumentError(detail) : InternalError(detail));
        Json body = Json::parse(p.body);
        body["status"] = res.status;
        p.body = body.dump();
        p.status = res.status;
        WriteProblem(res, p);
      }
    });
    server.set_exception_handler(
        [](const httplib::Request& req, httplib::Response& res, std::exception_ptr ep) {
          std::string what = "unknown exception";
          try {
            if (ep) std::rethrow_exception(ep);
          } catch (const std::exception& e) {
            what = e.what();
          } catch (...) {
          }
          spdlog::error("{} {}: unhandled exception: {}", req.method, req.path, what);
          WriteProblem(res, MakeProblem(InternalError("internal error")));
        });
    server.set_logger([](const httplib::Request& req, const httplib::Response& res) {
      const double seconds =
          std::chrono::duration<double>(std::chrono::steady_clock::now() - tl_start).count();
      if (tl_handle != nullptr) HttpMetrics::Record(tl_handle, res.status, seconds);
      spdlog::info("{} {} {} {}us", req.method, tl_route, res.status,
                   static_cast<int64_t>(seconds * 1e6));
    });
  }

  HttpContext context;
  HttpOptions options;
  HttpMetrics metrics;
  std::string token_digest;
  HttpMetrics::RequestHandle* unmatched = nullptr;
  httplib::Server server;
  int bound_port = -1;
  socket_t listen_fd = -1;  // Set by the socket options callback during Bind().
};

HttpServer::HttpServer(PlanningService& service, MetricsRegistry& registry, HttpOptions options)
    : impl_(std::make_unique<Impl>(service, registry, std::move(options))) {
  impl_->Install();
}

HttpServer::~HttpServer() { Stop(); }

Status HttpServer::Bind() {
  const HttpOptions& o = impl_->options;
  if (o.port == 0) {
    impl_->bound_port = impl_->server.bind_to_any_port(o.host);
  } else {
    impl_->bound_port = impl_->server.bind_to_port(o.host, o.port) ? o.port : -1;
  }
  if (impl_->bound_port < 0 || impl_->listen_fd < 0 ||
      ::listen(impl_->listen_fd, SOMAXCONN) != 0) {
    return Status(StatusCode::kUnavailable,
                  "cannot listen on " + o.host + ":" + std::to_string(o.port));
  }
  return Status::Ok();
}

int HttpServer::port() const { return impl_->bound_port; }

void HttpServer::Serve() { impl_->server.listen_after_bind(); }

void HttpServer::Stop() {
  if (impl_ && impl_->server.is_running()) impl_->server.stop();
}

}  // namespace mdp::server
