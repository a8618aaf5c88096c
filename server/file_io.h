// Whole-file reads and crash-safe writes for the command line. The functions are stateless
// and thread-safe.
#ifndef MDP_SERVER_FILE_IO_H_
#define MDP_SERVER_FILE_IO_H_

#include <cstddef>
#include <string>
#include <string_view>

#include "solver/status.h"

namespace mdp::server {

// Reads the whole file at `path` ("-" reads standard input).
Result<std::string> ReadWholeFile(const std::string& path);

// The bytes of a whole file, for large documents read once: a regular file is mapped
// read-only (its pages are the page cache's, so nothing is copied), anything else ("-" for
// standard input, pipes) is read into memory. The file must not be truncated while mapped.
// Move-only; text() is valid while the object lives. Not synchronised.
class FileText {
 public:
  // Opens `path` ("-" reads standard input).
  static Result<FileText> Open(const std::string& path);

  FileText(FileText&& other) noexcept;
  FileText& operator=(FileText&& other) noexcept;
  FileText(const FileText&) = delete;
  FileText& operator=(const FileText&) = delete;
  ~FileText();

  std::string_view text() const {
    return mapped_ != nullptr ? std::string_view(mapped_, mapped_size_) : std::string_view(read_);
  }

 private:
  FileText() = default;

  const char* mapped_ = nullptr;  // Owned mapping of mapped_size_ bytes, or null.
  size_t mapped_size_ = 0;
  std::string read_;  // The bytes when not mapped.
};

// Writes `contents` to `path` atomically: a temporary file beside it, flushed and synced,
// then renamed over `path`, so readers see the old file or the new one, never a torn one.
Status WriteFileAtomically(const std::string& path, const std::string& contents);

}  // namespace mdp::server

#endif  // MDP_SERVER_FILE_IO_H_
