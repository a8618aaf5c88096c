#include "solver/internal/large_array.h"

#include <cstdint>
#include <cstdlib>

#if defined(__linux__)
#include <sys/mman.h>
#endif

namespace mdp::internal {

bool AdviseHugePages(void* p, std::size_t bytes) {
#if defined(__linux__) && defined(MADV_HUGEPAGE)
  return madvise(p, bytes, MADV_HUGEPAGE) == 0;
#else
  (void)p;
  (void)bytes;
  return false;
#endif
}

#if defined(__linux__)

// Maps one huge page more than asked and unmaps the unaligned head and the rest of the tail.
void* MapLarge(std::size_t bytes) {
  const std::size_t span = bytes + kHugePageBytes;
  void* mapped = mmap(nullptr, span, PROT_READ | PROT_WRITE, MAP_PRIVATE | MAP_ANONYMOUS, -1, 0);
  if (mapped == MAP_FAILED) return nullptr;
  const auto start = reinterpret_cast<std::uintptr_t>(mapped);
  const std::uintptr_t aligned = (start + kHugePageBytes - 1) & ~(kHugePageBytes - 1);
  if (aligned > start) munmap(mapped, aligned - start);
  const std::size_t tail = start + span - (aligned + bytes);
  if (tail > 0) munmap(reinterpret_cast<void*>(aligned + bytes), tail);
  void* p = reinterpret_cast<void*>(aligned);
  AdviseHugePages(p, bytes);
  return p;
}

void UnmapLarge(void* p, std::size_t bytes) { munmap(p, bytes); }

#else

void* MapLarge(std::size_t bytes) { return std::aligned_alloc(kHugePageBytes, bytes); }
void UnmapLarge(void* p, std::size_t /*bytes*/) { std::free(p); }

#endif

}  // namespace mdp::internal
