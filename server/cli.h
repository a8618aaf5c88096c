// The command-line front end: `mdpserve validate | solve | verify | evaluate`. Each command
// reads files, calls the solver core, prints JSON documents (api-schema/) to stdout or a file
// and plain-word errors with JSON Pointers to stderr. Exit codes: kExitOk, kExitVerdictFailed,
// kExitBadInput. Not thread-safe (writes to the given streams).
#ifndef MDP_SERVER_CLI_H_
#define MDP_SERVER_CLI_H_

#include <iosfwd>

namespace mdp::server {

inline constexpr int kExitOk = 0;
inline constexpr int kExitVerdictFailed = 1;
inline constexpr int kExitBadInput = 2;

// Parses argv and runs the chosen command; returns the process exit code.
int RunCli(int argc, char** argv, std::ostream& out, std::ostream& err);

}  // namespace mdp::server

#endif  // MDP_SERVER_CLI_H_
