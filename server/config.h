// ServerConfig: the settings of `mdpserve serve`, each a flag with an environment-variable
// fallback (MDPSERVE_*), all declared in config.cc with their defaults and help. Built once
// by the command line and passed down; a plain value.
#ifndef MDP_SERVER_CONFIG_H_
#define MDP_SERVER_CONFIG_H_

#include <cstdint>
#include <string>
#include <vector>

#include "solver/status.h"

namespace CLI {
class App;
}

namespace mdp::server {

struct ServerConfig {
  std::string listen = "127.0.0.1:8080";   // HOST:PORT; port 0 picks a free one.
  std::string data_dir = "mdpserve-data";  // Embedded store lives here.
  bool memory_store = false;               // Keep nothing on disk (tests, demos).
  int workers = 1;                         // Solve worker threads.
  int solver_threads = 0;                  // Threads per solve for sweeps; 0 = automatic.
  int http_threads = 0;                    // HTTP threads (requests handled at once); 0: auto.
  int http_slice_us = 100;  // Time slice the HTTP threads ask for (thread_setup.h); 0: default.
  bool warm_start = true;   // Load stored models with solutions into the cache after a start.
  int background_niceness = 10;   // Added to the nice value of solve and large-upload threads.
  int idle_timeout_seconds = 30;  // Silent connections are closed after this.
  int64_t body_limit = int64_t{256} << 20;  // Request body cap in bytes.
  int64_t cache_bytes = int64_t{2} << 30;   // Model/solution cache budget in bytes.
  int64_t store_value_limit = 0;     // Largest stored model/solution in bytes; 0: the store's own.
  int64_t queue_length = 64;         // Solve jobs waiting at most.
  std::string token_file;            // If set, bearer token required (not health).
  std::string log_level = "info";    // trace, debug, info, warn, error, off.
  double shutdown_deadline = 10.0;   // Seconds running jobs get on SIGTERM.
  double drain_seconds = 0.5;        // Not-ready time before the listener closes.
  std::string port_file;             // If set, the bound port is written here.
  std::vector<std::string> preload;  // Model files to upload and solve at start.
};

// Declares the serve options on `app`, bound to `config`.
void AddServeOptions(CLI::App* app, ServerConfig& config);

// Splits "host:port"; kInvalidArgument if malformed.
Status ParseListen(const std::string& listen, std::string* host, int* port);

}  // namespace mdp::server

#endif  // MDP_SERVER_CONFIG_H_
