#include "server/serve.h"

#include <signal.h>
#include <spdlog/sinks/stdout_color_sinks.h>
#include <spdlog/spdlog.h>

#include <atomic>
#include <chrono>
#include <functional>
#include <ostream>
#include <thread>
#include <utility>

#include "server/api_codec.h"
#include "server/file_io.h"
#include "server/http_server.h"
#include "server/metrics.h"
#include "server/planning_service.h"
#include "server/thread_setup.h"

namespace mdp::server {
namespace {

constexpr int kExitBadConfig = 2;

void SetUpLogging(const std::string& level) {
  auto logger = spdlog::stderr_color_mt("mdpserve");
  spdlog::set_default_logger(logger);
  spdlog::set_level(spdlog::level::from_str(level));
  spdlog::set_pattern("%Y-%m-%dT%H:%M:%S.%e %^%l%$ %v");
}

Result<std::string> ReadToken(const std::string& path) {
  if (path.empty()) return std::string();
  Result<std::string> text = ReadWholeFile(path);
  if (!text.ok()) return text.status();
  std::string token = *text;
  while (!token.empty() && std::isspace(static_cast<unsigned char>(token.back()))) token.pop_back();
  if (token.empty()) return InvalidArgumentError("token file " + path + " is empty");
  return token;
}

void RegisterServiceMetrics(MetricsRegistry& registry, PlanningService& service) {
  registry.RegisterGaugeCallback("mdpserve_jobs_queued", "Jobs waiting for a worker.",
                                 [&service] { return double(service.queued_jobs()); });
  registry.RegisterGaugeCallback("mdpserve_jobs_running", "Jobs being run by a worker.",
                                 [&service] { return double(service.running_jobs()); });
  const ResultCache& cache = service.cache();
  registry.RegisterCollector(
      "mdpserve_cache_requests_total", "Cache lookups of models and solutions by result.",
      MetricType::kCounter, [&cache](std::vector<CollectedSample>* out) {
        out->push_back({{{"result", "hit"}}, double(cache.hits())});
        out->push_back({{{"result", "miss"}}, double(cache.misses())});
      });
  registry.RegisterGaugeCallback("mdpserve_cache_bytes", "Bytes held by the cache.",
                                 [&cache] { return double(cache.bytes()); });
  registry.RegisterGaugeCallback("mdpserve_cache_entries", "Entries held by the cache.",
                                 [&cache] { return double(cache.entries()); });
  registry.RegisterGaugeCallback("mdpserve_cache_budget_bytes", "Byte budget of the cache.",
                                 [&cache] { return double(cache.budget()); });
  registry.RegisterCollector(
      "mdpserve_cached_model_bytes", "Bytes held in memory by each cached model.",
      MetricType::kGauge, [&cache](std::vector<CollectedSample>* out) {
        for (const ResultCache::EntryBytes& e : cache.EntrySizes()) {
          if (e.model) out->push_back({{{"model", e.id}}, double(e.bytes)});
        }
      });
  registry.RegisterCollector(
      "mdpserve_cached_solution_bytes", "Bytes held in memory by each cached solution.",
      MetricType::kGauge, [&cache](std::vector<CollectedSample>* out) {
        for (const ResultCache::EntryBytes& e : cache.EntrySizes()) {
          if (!e.model) out->push_back({{{"solution", e.id}}, double(e.bytes)});
        }
      });
}

// Uploads and solves each preload file, waiting for the solves; prints what happened.
Status Preload(PlanningService& service, const std::vector<std::string>& files,
               std::vector<std::pair<std::string, std::string>>& loaded, std::ostream& out) {
  for (const std::string& file : files) {
    Result<std::string> text = ReadWholeFile(file);
    if (!text.ok()) return text.status();
    Result<UploadResult> upload = service.UploadModelOwned(std::move(*text));
    if (!upload.ok()) return upload.status();
    if (!upload->errors.empty()) {
      return InvalidArgumentError(file + ": " + upload->errors.front().pointer + ": " +
                                  upload->errors.front().message);
    }
    Result<SolveStart> start = service.StartSolve(upload->record.id, SolveOptions{});
    if (!start.ok()) return start.status();
    if (start->job) {
      for (;;) {
        Result<JobView> job = service.GetJob(start->job->record.id);
        if (!job.ok()) return job.status();
        if (job->record.status == JobStatus::kFailed) {
          return InternalError(file + ": solve failed: " + job->record.error);
        }
        if (job->record.status == JobStatus::kSucceeded) break;
        std::this_thread::sleep_for(std::chrono::milliseconds(20));
      }
    }
    out << "preloaded " << file << " as model " << upload->record.id << " ("
        << upload->record.states << " states), solved\n";
    Result<Plan> plan = service.GetPlan(upload->record.id, "");
    if (!plan.ok()) return plan.status();
    // The first state with more than one action makes the best example query.
    std::string example = plan->model->state_name(0);
    for (StateId s = 0; s < plan->model->num_states(); ++s) {
      if (plan->model->row_end(s) - plan->model->row_begin(s) > 1) {
        example = plan->model->state_name(s);
        break;
      }
    }
    loaded.emplace_back(upload->record.id, example);
  }
  return Status::Ok();
}

void PrintExamples(const std::string& base,
                   const std::vector<std::pair<std::string, std::string>>& loaded,
                   std::ostream& out) {
  if (loaded.empty()) return;
  const auto& [id, state] = loaded.front();
  out << "\nTry:\n"
      << "  curl -s '" << base << "/v1/models/" << id << "/policy?state=" << state << "'\n"
      << "  curl -s '" << base << "/v1/models/" << id << "/policy/explain?state=" << state
      << "'\n"
      << "  curl -s " << base << "/v1/models/" << id << "/solutions\n"
      << "  curl -s " << base << "/metrics\n"
      << "Stop with Ctrl-C (SIGINT) or SIGTERM.\n"
      << std::flush;
}

// The warm start (PlanningService::WarmUp), on a background thread below the HTTP threads'
// priority like the solves; logs what it loaded.
// `warming` is cleared when the cache is warm (the mdpserve_cache_warming gauge).
void WarmCache(PlanningService& service, int niceness, std::atomic<bool>& warming) {
  BecomeBackgroundThread("mdp-warm", niceness);
  const auto start = std::chrono::steady_clock::now();
  const PlanningService::WarmUpResult warmed = service.WarmUp();
  const double seconds =
      std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  warming = false;
  if (warmed.models + warmed.skipped + warmed.failed == 0) return;
  spdlog::info(
      "warm start: {} models with their solutions loaded into the cache in {:.1f} s ({} MB "
      "cached); {} did not fit in the cache budget, {} could not be loaded",
      warmed.models, seconds, service.cache().bytes() >> 20, warmed.skipped, warmed.failed);
}

}  // namespace

int RunServe(const ServerConfig& config, std::ostream& out) {
  // Block the stop signals before any thread starts, so that only the waiting thread below
  // receives them.
  sigset_t stop_signals;
  sigemptyset(&stop_signals);
  sigaddset(&stop_signals, SIGTERM);
  sigaddset(&stop_signals, SIGINT);
  pthread_sigmask(SIG_BLOCK, &stop_signals, nullptr);
  SetUpLogging(config.log_level);

  HttpOptions http;
  Status listen = ParseListen(config.listen, &http.host, &http.port);
  Result<std::string> token = ReadToken(config.token_file);
  if (!listen.ok() || !token.ok()) {
    spdlog::error("{}", !listen.ok() ? listen.message() : token.status().message());
    return kExitBadConfig;
  }
  http.token = *token;
  http.threads = config.http_threads;
  http.idle_timeout_seconds = config.idle_timeout_seconds;
  http.body_limit = config.body_limit;
  http.large_request_niceness = config.background_niceness;
  if (Status nice = CheckThreadNiceness(config.background_niceness); !nice.ok()) {
    spdlog::warn("{}: solves and large uploads run at the priority of the HTTP threads",
                 nice.message());
  }
  if (config.http_slice_us > 0) {
    if (Status slice = CheckThreadSlice(config.http_slice_us); slice.ok()) {
      http.thread_slice_us = config.http_slice_us;
    } else {
      spdlog::info("{}: the HTTP threads keep the kernel's default time slice", slice.message());
    }
  }

  std::unique_ptr<Store> store;
  if (config.memory_store) {
    store = config.store_value_limit > 0 ? NewMemoryStore(config.store_value_limit)
                                         : NewMemoryStore();
  } else {
    Result<std::unique_ptr<Store>> opened =
        OpenSqliteStore(config.data_dir, config.store_value_limit);
    if (!opened.ok()) {
      spdlog::error("cannot open the store in {}: {}", config.data_dir,
                    opened.status().message());
      return kExitBadConfig;
    }
    store = std::move(*opened);
  }

  MetricsRegistry registry;
  Histogram* solve_seconds = registry.GetHistogram(
      "mdpserve_job_duration_seconds", "Wall time of finished jobs.", {{"kind", "solve"}},
      {0.001, 0.01, 0.1, 0.5, 1, 2.5, 5, 10, 30, 60, 300, 1800});
  Histogram* verify_seconds = registry.GetHistogram(
      "mdpserve_job_duration_seconds", "Wall time of finished jobs.", {{"kind", "verify"}},
      {0.001, 0.01, 0.1, 0.5, 1, 2.5, 5, 10, 30, 60, 300, 1800});
  ServiceOptions service_options;
  service_options.workers = config.workers;
  service_options.queue_capacity = config.queue_length;
  service_options.cache_bytes = config.cache_bytes;
  service_options.solver_threads = config.solver_threads;
  service_options.worker_niceness = config.background_niceness;
  service_options.on_job_finished = [&registry, solve_seconds, verify_seconds](
                                        const JobRecord& job, double seconds) {
    (job.kind == "solve" ? solve_seconds : verify_seconds)->Observe(seconds);
    registry
        .GetCounter("mdpserve_jobs_finished_total", "Jobs finished, by kind and final status.",
                    {{"kind", job.kind}, {"status", std::string(JobStatusName(job.status))}})
        ->Add();
  };
  service_options.on_job_event = [](const JobRecord& job) {
    spdlog::info("job {} {} {} on model {}{}", job.id, job.kind, JobStatusName(job.status),
                 job.model_id, job.error.empty() ? "" : ": " + job.error);
  };
  PlanningService service(*store, service_options);
  Status started = service.Start();
  if (!started.ok()) {
    spdlog::error("cannot start: {}", started.message());
    return kExitBadConfig;
  }
  RegisterServiceMetrics(registry, service);
  std::atomic<bool> warming{config.warm_start};
  registry.RegisterGaugeCallback(
      "mdpserve_cache_warming",
      "1 while the warm start loads stored models and solutions into the cache, else 0.",
      [&warming] { return warming ? 1.0 : 0.0; });

  std::vector<std::pair<std::string, std::string>> loaded;
  Status preloaded = Preload(service, config.preload, loaded, out);
  if (!preloaded.ok()) {
    spdlog::error("preload failed: {}", preloaded.message());
    return kExitBadConfig;
  }

  HttpServer server(service, registry, http);
  Status bound = server.Bind();
  if (!bound.ok()) {
    spdlog::error("{}", bound.message());
    return kExitBadConfig;
  }
  if (!config.port_file.empty()) {
    Status written = WriteFileAtomically(config.port_file, std::to_string(server.port()) + "\n");
    if (!written.ok()) spdlog::error("{}", written.message());
  }
  const std::string base = "http://" + http.host + ":" + std::to_string(server.port());
  spdlog::info("listening on {} (store: {}; HTTP threads' time slice: {})", base,
               config.memory_store ? "memory" : config.data_dir,
               http.thread_slice_us > 0 ? std::to_string(http.thread_slice_us) + " us"
                                        : std::string("the kernel's default"));
  PrintExamples(base, loaded, out);

  std::thread warmer;
  if (config.warm_start) {
    warmer = std::thread(WarmCache, std::ref(service), config.background_niceness,
                         std::ref(warming));
  }

  const double drain = config.drain_seconds;
  std::thread waiter([&stop_signals, &server, &service, drain] {
    int signal_number = 0;
    sigwait(&stop_signals, &signal_number);
    spdlog::info("signal {}: not ready; closing the listener in {} s", signal_number, drain);
    service.StopAccepting();
    std::this_thread::sleep_for(std::chrono::duration<double>(drain));
    server.Stop();
  });
  server.Serve();
  // Serve() also returns if the listener fails; make sure the waiter can finish.
  pthread_kill(waiter.native_handle(), SIGTERM);
  waiter.join();
  if (warmer.joinable()) warmer.join();  // The waiter stopped accepting: it ends after a load.
  service.Shutdown(config.shutdown_deadline);
  spdlog::info("stopped cleanly");
  return 0;
}

}  // namespace mdp::server
