// ByteWriter and ByteReader: the store's binary records (solution_blob.h,
// model_store_codec.h) written and read as values and arrays in the host's byte order
// (little-endian hosts only). ByteReader treats its input as hostile: every read checks the
// bytes left before it copies or allocates, so a lying count fails here instead of reaching
// the allocator. Not thread-safe.
#ifndef MDP_SERVER_BYTE_IO_H_
#define MDP_SERVER_BYTE_IO_H_

#include <cstdint>
#include <cstring>
#include <string>
#include <string_view>
#include <type_traits>
#include <utility>
#include <vector>

namespace mdp::server {

class ByteWriter {
 public:
  template <typename T>
  void Put(T value) {
    static_assert(std::is_trivially_copyable_v<T>);
    out_.append(reinterpret_cast<const char*>(&value), sizeof value);
  }
  template <typename T>
  void PutArray(const std::vector<T>& values) {
    static_assert(std::is_trivially_copyable_v<T>);
    if (values.empty()) return;  // data() may be null.
    out_.append(reinterpret_cast<const char*>(values.data()), values.size() * sizeof(T));
  }
  void Reserve(size_t bytes) { out_.reserve(bytes); }
  std::string Take() { return std::move(out_); }

 protected:
  std::string out_;
};

class ByteReader {
 public:
  explicit ByteReader(std::string_view in) : in_(in) {}

  template <typename T>
  bool Get(T* value) {
    static_assert(std::is_trivially_copyable_v<T>);
    if (in_.size() < sizeof(T)) return false;
    std::memcpy(value, in_.data(), sizeof(T));
    in_.remove_prefix(sizeof(T));
    return true;
  }

  // `count` values of T; false (and nothing allocated) unless that many bytes are left.
  template <typename T>
  bool GetArray(std::vector<T>* values, int64_t count) {
    static_assert(std::is_trivially_copyable_v<T>);
    if (count < 0 || static_cast<uint64_t>(count) > in_.size() / sizeof(T)) return false;
    const size_t bytes = static_cast<size_t>(count) * sizeof(T);
    values->resize(static_cast<size_t>(count));
    if (bytes > 0) std::memcpy(values->data(), in_.data(), bytes);  // data() may be null at 0.
    in_.remove_prefix(bytes);
    return true;
  }

  bool AtEnd() const { return in_.empty(); }

 protected:
  std::string_view in_;
};

}  // namespace mdp::server

#endif  // MDP_SERVER_BYTE_IO_H_
