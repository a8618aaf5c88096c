// Internal to the HTTP layer: what handlers get, and the helpers they share. Only
// http_server.cc and routes.cc include this (and with it cpp-httplib).
#ifndef MDP_SERVER_HTTP_CONTEXT_H_
#define MDP_SERVER_HTTP_CONTEXT_H_

#include <httplib.h>

#include <array>
#include <functional>
#include <string>
#include <string_view>
#include <vector>

#include "server/metrics.h"
#include "server/planning_service.h"
#include "server/problem.h"

namespace mdp::server {

// One per request (the service and registry are shared by all).
struct HttpContext {
  PlanningService& service;
  MetricsRegistry& registry;
  // The path's {parameter} segments in the route's order ({id}, then {sid}); "" beyond.
  std::array<std::string, 2> path_params{};
};

using Handler = std::function<void(HttpContext&, const httplib::Request&, httplib::Response&)>;
// A handler given the request body to keep: `body` is the request's whole body, read by the
// server into a string of its own (not req.body), which the handler may move away and free
// early.
using BodyHandler = std::function<void(HttpContext&, const httplib::Request&, std::string body,
                                       httplib::Response&)>;

struct Route {
  const char* method;  // "GET", "POST", "DELETE".
  // The path template, also the route's name in metrics and logs: "/v1/models/{id}". A
  // {parameter} segment matches 1 to 64 of [0-9a-zA-Z_-]; any other segment itself.
  const char* route;
  Handler handler;  // For requests without a body (and every request if no body_handler).
  BodyHandler body_handler = nullptr;  // POST only: for requests with a body.
};

// The route table (routes.cc): every URL leads to its handler from here.
const std::vector<Route>& ApiRoutes();

// True iff `path` (percent-decoded) matches the template `route`; then `params` holds its
// {parameter} segments in order. At most params->size() parameters.
bool MatchRoute(std::string_view route, std::string_view path, std::array<std::string, 2>* params);

void WriteJson(httplib::Response& res, int status, const std::string& body);
void WriteProblem(httplib::Response& res, const Problem& problem);
inline void WriteProblem(httplib::Response& res, const Status& status) {
  WriteProblem(res, MakeProblem(status));
}
// True iff the request body is declared as JSON; otherwise writes 415 and returns false.
bool RequireJsonBody(const httplib::Request& req, httplib::Response& res);

}  // namespace mdp::server

#endif  // MDP_SERVER_HTTP_CONTEXT_H_
