#include "server/file_io.h"

#include <fcntl.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstdio>
#include <cstring>
#include <iostream>
#include <iterator>
#include <sstream>

namespace mdp::server {

Result<std::string> ReadWholeFile(const std::string& path) {
  if (path == "-") {
    std::ostringstream buffer;
    buffer << std::cin.rdbuf();
    return buffer.str();
  }
  const int fd = ::open(path.c_str(), O_RDONLY | O_CLOEXEC);
  if (fd < 0) return InvalidArgumentError("cannot open " + path + ": " + std::strerror(errno));
  std::string data;
  // A regular file's size is known: one allocation instead of doubling through 64 KiB
  // appends (measured 1.6-2.0 s -> 0.55 s on a 1.16 GB document).
  struct stat st;
  if (::fstat(fd, &st) == 0 && S_ISREG(st.st_mode) && st.st_size > 0) {
    data.reserve(static_cast<size_t>(st.st_size));
  }
  char chunk[1 << 16];
  for (;;) {
    const ssize_t n = ::read(fd, chunk, sizeof chunk);
    if (n == 0) break;
    if (n < 0) {
      if (errno == EINTR) continue;
      const std::string reason = std::strerror(errno);
      ::close(fd);
      return InvalidArgumentError("cannot read " + path + ": " + reason);
    }
    data.append(chunk, static_cast<size_t>(n));
  }
  ::close(fd);
  return data;
}

Status WriteFileAtomically(const std::string& path, const std::string& contents) {
  const std::string tmp = path + ".tmp." + std::to_string(::getpid());
  const int fd = ::open(tmp.c_str(), O_WRONLY | O_CREAT | O_TRUNC | O_CLOEXEC, 0644);
  if (fd < 0) return InvalidArgumentError("cannot write " + tmp + ": " + std::strerror(errno));
  size_t done = 0;
  while (done < contents.size()) {
    const ssize_t n = ::write(fd, contents.data() + done, contents.size() - done);
    if (n < 0 && errno == EINTR) continue;
    if (n < 0) {
      const std::string reason = std::strerror(errno);
      ::close(fd);
      ::unlink(tmp.c_str());
      return InvalidArgumentError("cannot write " + tmp + ": " + reason);
    }
    done += static_cast<size_t>(n);
  }
  if (::fsync(fd) != 0 || ::close(fd) != 0) {
    ::unlink(tmp.c_str());
    return InvalidArgumentError("cannot sync " + tmp + ": " + std::strerror(errno));
  }
  if (std::rename(tmp.c_str(), path.c_str()) != 0) {
    const std::string reason = std::strerror(errno);
    ::unlink(tmp.c_str());
    return InvalidArgumentError("cannot rename " + tmp + " to " + path + ": " + reason);
  }
  return Status::Ok();
}

}  // namespace mdp::server
