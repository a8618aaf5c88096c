#include "server/config.h"

#include <CLI/CLI.hpp>
#include <charconv>
#include <string>
#include <system_error>

#include "server/thread_setup.h"

namespace mdp::server {

void AddServeOptions(CLI::App* app, ServerConfig& c) {
  app->add_option("--listen", c.listen, "address to listen on, HOST:PORT (port 0: any free)")
      ->envname("MDPSERVE_LISTEN")
      ->capture_default_str();
  app->add_option("--data-dir", c.data_dir, "directory of the embedded store")
      ->envname("MDPSERVE_DATA_DIR")
      ->capture_default_str();
  app->add_flag("--memory-store", c.memory_store, "keep everything in memory only")
      ->envname("MDPSERVE_MEMORY_STORE");
  app->add_option("--workers", c.workers, "solve worker threads")
      ->envname("MDPSERVE_WORKERS")
      ->capture_default_str()
      ->check(CLI::Range(1, 256));
  app->add_option("--solver-threads", c.solver_threads,
                  "threads each solve uses for sweeps; 0 = automatic (every core the process "
                  "may run on, for models of at least 262144 transitions, else 1)")
      ->envname("MDPSERVE_SOLVER_THREADS")
      ->capture_default_str()
      ->check(CLI::Range(0, 256));
  app->add_option("--http-threads", c.http_threads,
                  "HTTP threads: they read requests and run their handlers; an idle or "
                  "half-sent connection holds none, so this bounds the requests handled at "
                  "once, not the open connections; 0 = automatic (1 per core the process may "
                  "run on, at least 2)")
      ->envname("MDPSERVE_HTTP_THREADS")
      ->capture_default_str()
      ->check(CLI::Range(0, 1024));
  app->add_option("--http-slice-us", c.http_slice_us,
                  "time slice, in microseconds, the HTTP threads ask the Linux scheduler for "
                  "(100 to 100000; Linux 6.12 or later, no privilege needed): a thread with "
                  "a short slice that wakes for a request can preempt other work on its core "
                  "instead of waiting for that work's slice to end, which shortens the "
                  "queries' latency tail on a busy host; 0 = the kernel's default")
      ->envname("MDPSERVE_HTTP_SLICE_US")
      ->capture_default_str()
      ->check([](const std::string& text) -> std::string {
        int us = -1;
        const auto [end, error] = std::from_chars(text.data(), text.data() + text.size(), us);
        const bool in_range =
            us == 0 || (us >= kMinSliceMicroseconds && us <= kMaxSliceMicroseconds);
        if (error != std::errc() || end != text.data() + text.size() || !in_range) {
          return "must be 0 or an integer in [" + std::to_string(kMinSliceMicroseconds) + ", " +
                 std::to_string(kMaxSliceMicroseconds) + "], got " + text;
        }
        return "";
      });
  app->add_flag("--warm-start,!--no-warm-start", c.warm_start,
                "on by default: after a start, load the stored models that have solutions, "
                "with those solutions, into the cache on a background thread (newest first, "
                "while they fit in --cache-bytes), so that the first queries do not wait for "
                "the store; the service answers meanwhile, and a query of a model being loaded "
                "waits for that load")
      ->envname("MDPSERVE_WARM_START")
      ->capture_default_str();
  app->add_option("--background-niceness", c.background_niceness,
                  "how far below the HTTP threads the long work runs (solve jobs, the threads "
                  "each solve sweeps with, the thread that parses large uploads, and the warm "
                  "start): added to their Linux nice value, 0 to 19, 0 = the same priority; it "
                  "leaves the queries their CPU while a solve runs; a solve still takes every "
                  "core the queries leave idle, but other programs on the machine at normal "
                  "priority come first")
      ->envname("MDPSERVE_BACKGROUND_NICENESS")
      ->capture_default_str()
      ->check(CLI::Range(0, 19));
  app->add_option("--idle-timeout", c.idle_timeout_seconds,
                  "seconds after which a connection that sends nothing (idle keep-alive, or a "
                  "request arriving too slowly) is closed")
      ->envname("MDPSERVE_IDLE_TIMEOUT")
      ->capture_default_str()
      ->check(CLI::Range(1, 3600));
  app->add_option("--body-limit", c.body_limit, "request body limit in bytes")
      ->envname("MDPSERVE_BODY_LIMIT")
      ->capture_default_str()
      ->check(CLI::Range(int64_t{1024}, int64_t{1} << 40));
  app->add_option("--store-value-limit", c.store_value_limit,
                  "largest model (stored form) or solution the store keeps, in bytes; 0 = the "
                  "store's own limit (embedded store: 1,000,000,000); larger models get 413")
      ->envname("MDPSERVE_STORE_VALUE_LIMIT")
      ->capture_default_str()
      ->check(CLI::Range(int64_t{0}, int64_t{1} << 50));
  app->add_option("--cache-bytes", c.cache_bytes, "byte budget of the model/solution cache")
      ->envname("MDPSERVE_CACHE_BYTES")
      ->capture_default_str()
      ->check(CLI::Range(int64_t{0}, int64_t{1} << 50));
  app->add_option("--queue-length", c.queue_length, "solve jobs waiting at most (then 429)")
      ->envname("MDPSERVE_QUEUE_LENGTH")
      ->capture_default_str()
      ->check(CLI::Range(int64_t{1}, int64_t{1000000}));
  app->add_option("--token-file", c.token_file,
                  "file holding a bearer token required on every route but /healthz, /readyz")
      ->envname("MDPSERVE_TOKEN_FILE");
  app->add_option("--log-level", c.log_level, "trace, debug, info, warn, error or off")
      ->envname("MDPSERVE_LOG_LEVEL")
      ->capture_default_str()
      ->check(CLI::IsMember({"trace", "debug", "info", "warn", "error", "off"}));
  app->add_option("--shutdown-deadline", c.shutdown_deadline,
                  "seconds running jobs may finish after SIGTERM before they are cancelled")
      ->envname("MDPSERVE_SHUTDOWN_DEADLINE")
      ->capture_default_str()
      ->check(CLI::Range(0.0, 86400.0));
  app->add_option("--drain-seconds", c.drain_seconds,
                  "after SIGTERM, seconds /readyz answers 503 before the listener closes")
      ->envname("MDPSERVE_DRAIN_SECONDS")
      ->capture_default_str()
      ->check(CLI::Range(0.0, 600.0));
  app->add_option("--port-file", c.port_file, "write the bound port to this file")
      ->envname("MDPSERVE_PORT_FILE");
  app->add_option("--preload", c.preload, "model files to upload and solve before serving");
}

Status ParseListen(const std::string& listen, std::string* host, int* port) {
  const size_t colon = listen.rfind(':');
  if (colon == std::string::npos || colon == 0) {
    return InvalidArgumentError("--listen must be HOST:PORT, got '" + listen + "'");
  }
  *host = listen.substr(0, colon);
  if (host->size() > 2 && host->front() == '[' && host->back() == ']') {
    *host = host->substr(1, host->size() - 2);
  }
  try {
    size_t used = 0;
    *port = std::stoi(listen.substr(colon + 1), &used);
    if (used != listen.size() - colon - 1 || *port < 0 || *port > 65535) throw 0;
  } catch (...) {
    return InvalidArgumentError("--listen port must be 0..65535, got '" + listen + "'");
  }
  return Status::Ok();
}

}  // namespace mdp::server
