// A blocking TCP client on 127.0.0.1 for the fuzz targets that talk to a server
// (http_transport_fuzz, service_api_fuzz). Each function aborts through fuzz::Fail when the
// connection cannot be made.
#ifndef MDP_TESTS_FUZZ_LOOPBACK_H_
#define MDP_TESTS_FUZZ_LOOPBACK_H_

#include <cstddef>
#include <string>

namespace mdp::fuzz {

// A connected socket to 127.0.0.1:port.
int Connect(int port);

// Sends what the socket takes of the bytes (the peer may close early: that ends the send).
// Every call here retries system calls that a signal interrupted (libFuzzer's timer).
void SendAll(int fd, const char* p, size_t n);

// Reads until the peer closes, appending to *out when given; false if it has not closed
// after `seconds`.
bool ReadUntilClosed(int fd, std::string* out, int seconds);

// Closes without TIME_WAIT (a reset). The targets half-close first, so an orderly close
// would leave every connection in TIME_WAIT for a minute, and at thousands of inputs a second
// the ephemeral ports ran out after about 80,000 inputs. Use once the peer has closed.
void CloseAtOnce(int fd);

// Sends `request` on a new connection, half-closes it and returns what the server answered
// before closing; fails (fuzz::Fail) if it has not closed after `seconds`.
std::string Exchange(int port, const std::string& request, int seconds);

}  // namespace mdp::fuzz

#endif  // MDP_TESTS_FUZZ_LOOPBACK_H_
