// `mdpserve serve`: builds the store, the planning service, the metrics and the HTTP server
// from a ServerConfig, optionally preloads models, serves until SIGTERM or SIGINT, then shuts
// down in order (stop accepting, give running jobs the deadline, close the store).
#ifndef MDP_SERVER_SERVE_H_
#define MDP_SERVER_SERVE_H_

#include <iosfwd>

#include "server/config.h"

namespace mdp::server {

// Returns the process exit code: 0 after a clean shutdown, 2 if the configuration or the
// store is unusable. Prints the preload summary and example queries to `out`.
int RunServe(const ServerConfig& config, std::ostream& out);

}  // namespace mdp::server

#endif  // MDP_SERVER_SERVE_H_
