// Whole-file reads and crash-safe writes for the command line. Stateless; thread-safe.
#ifndef MDP_SERVER_FILE_IO_H_
#define MDP_SERVER_FILE_IO_H_

#include <string>

#include "solver/status.h"

namespace mdp::server {

// Reads the whole file at `path` ("-" reads standard input).
Result<std::string> ReadWholeFile(const std::string& path);

// Writes `contents` to `path` atomically: a temporary file beside it, flushed and synced,
// then renamed over `path`, so readers see the old file or the new one, never a torn one.
Status WriteFileAtomically(const std::string& path, const std::string& contents);

}  // namespace mdp::server

#endif  // MDP_SERVER_FILE_IO_H_
