// Fuzz target: raw bytes on a connection to the whole HTTP API (server/http_server.h over a
// PlanningService with a memory store): token check, routing, path and query parameters,
// every handler. Before the first input, a small model (tests/testing/documents.h) is
// uploaded and solved. In the input, "@ID@" is replaced by that model's id, so that seeds
// (corpus/service_api_fuzz/) and their mutations reach the routes under /v1/models/{id}.
// Per input:
//  - the bytes are sent on a new connection, which is then half-closed; the server must
//    answer what it can, never with 500, and close it within 5 s;
//  - then GET /healthz must answer 200, and the best action of the model's state "dry" must
//    still be "water" (answered 200): the service keeps running and loses nothing. An input
//    that deletes the model (it holds "DELETE") is followed by uploading and solving it again.
// Memory errors in the server's threads abort the process under the sanitizers.
#include <chrono>
#include <cstddef>
#include <cstdint>
#include <memory>
#include <string>
#include <thread>

#include "server/http_server.h"
#include "server/metrics.h"
#include "server/planning_service.h"
#include "server/store.h"
#include "tests/fuzz/fuzz_checks.h"
#include "tests/fuzz/loopback.h"
#include "tests/testing/documents.h"

namespace {

using mdp::fuzz::Fail;
using Clock = std::chrono::steady_clock;

constexpr int kCloseSeconds = 5;

struct Service {
  std::unique_ptr<mdp::server::Store> store = mdp::server::NewMemoryStore();
  mdp::server::MetricsRegistry registry;
  std::unique_ptr<mdp::server::PlanningService> planning;
  std::unique_ptr<mdp::server::HttpServer> http;
  std::string model_id;
};

// Uploads the model and solves it; returns its id.
std::string UploadAndSolve(mdp::server::PlanningService& service) {
  mdp::Result<mdp::server::UploadResult> upload =
      service.UploadModelOwned(std::string(mdp::server::test_documents::kGreenhouse));
  if (!upload.ok() || !upload->errors.empty()) Fail("the fixed model does not upload");
  mdp::Result<mdp::server::SolveStart> start =
      service.StartSolve(upload->record.id, mdp::SolveOptions{});
  if (!start.ok() && start.status().code() == mdp::StatusCode::kResourceExhausted) {
    // The queue is full of the inputs' jobs (a simulation may ask for 10^8 episodes): cancel
    // them, as a client may, and ask again.
    for (auto status : {mdp::server::JobStatus::kQueued, mdp::server::JobStatus::kRunning}) {
      mdp::Result<std::vector<mdp::server::JobView>> jobs = service.ListJobs("", status, 1000);
      if (!jobs.ok()) continue;
      for (const mdp::server::JobView& job : *jobs) (void)service.CancelJob(job.record.id);
    }
    start = service.StartSolve(upload->record.id, mdp::SolveOptions{});
  }
  if (!start.ok()) Fail("the fixed model's solve does not start: " + start.status().ToString());
  if (start->job) {
    const auto deadline = Clock::now() + std::chrono::seconds(30);
    for (;;) {
      mdp::Result<mdp::server::JobView> job = service.GetJob(start->job->record.id);
      if (!job.ok()) Fail("the fixed model's solve job is lost");
      if (job->record.status == mdp::server::JobStatus::kSucceeded) break;
      if (job->record.status == mdp::server::JobStatus::kFailed || Clock::now() > deadline) {
        Fail("the fixed model's solve failed or took over 30 s");
      }
      std::this_thread::sleep_for(std::chrono::milliseconds(5));
    }
  }
  return upload->record.id;
}

Service& TheService() {
  static Service* service = [] {
    auto* s = new Service;
    mdp::server::ServiceOptions options;
    options.workers = 1;
    options.queue_capacity = 4;
    options.cache_bytes = int64_t{64} << 20;
    options.solver_threads = 1;
    options.limits.max_states = 10'000;
    options.limits.max_outcomes = 100'000;
    s->planning = std::make_unique<mdp::server::PlanningService>(*s->store, options);
    if (!s->planning->Start().ok()) Fail("the planning service does not start");
    s->model_id = UploadAndSolve(*s->planning);
    mdp::server::HttpOptions http;
    http.host = "127.0.0.1";
    http.port = 0;
    http.threads = 2;
    http.body_limit = 64 << 10;
    http.idle_timeout_seconds = 2;
    s->http = std::make_unique<mdp::server::HttpServer>(*s->planning, s->registry, http);
    if (!s->http->Bind().ok()) Fail("the server cannot bind 127.0.0.1");
    std::thread([s] { s->http->Serve(); }).detach();
    return s;
  }();
  return *service;
}

int Port() { return TheService().http->port(); }

// The answer to GET `target`.
std::string Ask(const std::string& target) {
  return mdp::fuzz::Exchange(
      Port(), "GET " + target + " HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n",
      kCloseSeconds);
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  Service& service = TheService();
  std::string bytes(reinterpret_cast<const char*>(data), size);
  for (size_t at = bytes.find("@ID@"); at != std::string::npos; at = bytes.find("@ID@", at)) {
    bytes.replace(at, 4, service.model_id);
    at += service.model_id.size();
  }
  const std::string answers = mdp::fuzz::Exchange(Port(), bytes, kCloseSeconds);
  // A bad request is the client's error: 4xx with a problem document, never 500.
  for (size_t at = answers.find("HTTP/1.1 500 "); at != std::string::npos;
       at = answers.find("HTTP/1.1 500 ", at + 1)) {
    if (at == 0 || answers[at - 1] == '\n') {
      Fail("a request was answered 500: " + answers.substr(at, 400));
    }
  }

  if (Ask("/healthz").rfind("HTTP/1.1 200", 0) != 0) Fail("/healthz is not answered 200");
  const std::string query = "/v1/models/" + service.model_id + "/policy?state=dry";
  std::string answer = Ask(query);
  if (answer.rfind("HTTP/1.1 200", 0) != 0 && bytes.find("DELETE") != std::string::npos) {
    UploadAndSolve(*service.planning);
    answer = Ask(query);
  }
  if (answer.rfind("HTTP/1.1 200", 0) != 0 || answer.find("\"water\"") == std::string::npos) {
    Fail("the model's best action is no longer answered: " + answer.substr(0, 200));
  }
  return 0;
}
