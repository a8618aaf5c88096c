#include "server/file_io.h"

#include <fcntl.h>
#include <sys/mman.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstdio>
#include <cstring>
#include <iostream>
#include <iterator>
#include <sstream>
#include <utility>

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

Result<FileText> FileText::Open(const std::string& path) {
  FileText file;
  const int fd = path == "-" ? -1 : ::open(path.c_str(), O_RDONLY | O_CLOEXEC);
  struct stat st;
  if (fd >= 0 && ::fstat(fd, &st) == 0 && S_ISREG(st.st_mode) && st.st_size > 0) {
    // MAP_POPULATE maps the cached pages up front instead of one fault per page as the
    // decoder walks the text. A copy (ReadWholeFile) cost 0.5 s on a 1.1 GB document.
    void* map = ::mmap(nullptr, static_cast<size_t>(st.st_size), PROT_READ,
                       MAP_PRIVATE | MAP_POPULATE, fd, 0);
    if (map != MAP_FAILED) {
      ::close(fd);
      file.mapped_ = static_cast<const char*>(map);
      file.mapped_size_ = static_cast<size_t>(st.st_size);
      return file;
    }
  }
  if (fd >= 0) ::close(fd);
  Result<std::string> text = ReadWholeFile(path);  // Standard input, pipes, empty files.
  if (!text.ok()) return text.status();
  file.read_ = std::move(*text);
  return file;
}

FileText::FileText(FileText&& other) noexcept
    : mapped_(std::exchange(other.mapped_, nullptr)),
      mapped_size_(std::exchange(other.mapped_size_, 0)),
      read_(std::move(other.read_)) {}

FileText& FileText::operator=(FileText&& other) noexcept {
  if (this != &other) {
    if (mapped_ != nullptr) ::munmap(const_cast<char*>(mapped_), mapped_size_);
    mapped_ = std::exchange(other.mapped_, nullptr);
    mapped_size_ = std::exchange(other.mapped_size_, 0);
    read_ = std::move(other.read_);
  }
  return *this;
}

FileText::~FileText() {
  if (mapped_ != nullptr) ::munmap(const_cast<char*>(mapped_), mapped_size_);
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
