// An allocator for the solver's large arrays (a model's transitions, value iteration's tiled
// copy of them): an array of at least kLargeArrayBytes is placed on 2 MiB boundaries and
// offered to the kernel for transparent huge pages (madvise(MADV_HUGEPAGE), before the first
// touch, so the pages are huge from the start), smaller ones come from operator new as usual.
// On hosts whose kernel offers huge pages only on request (transparent_hugepage=madvise, as on
// the benchmark host) the streamed arrays otherwise sit on 4 KiB pages, where the hardware
// prefetcher stops at every page boundary. Measured on the 2-core benchmark host, 1,000,000
// states x 4 actions x 8 next states, medians of 30 sweeps in 3 alternating rounds, 2 threads:
// the near-state sweep 11.7-12.3 ms against 12.5-13.5 ms, the random model's tiled sweep
// 25.0-26.3 ms against 27.8-28.0 ms; the 1 GiB bandwidth probe on one thread 33-34 ms against
// 42-46 ms (scripts/bench uses this allocator for its probe too, so that the probe stays the
// host's ceiling; numpy, the benchmark's baseline, advises huge pages for its own large arrays
// by default).
// Where the kernel gives no huge pages the advice is ignored and only the alignment remains
// (at most 2 MiB more per array, at least 4 MiB large).
#ifndef MDP_SOLVER_INTERNAL_LARGE_ARRAY_H_
#define MDP_SOLVER_INTERNAL_LARGE_ARRAY_H_

#include <cstddef>
#include <new>
#include <vector>

namespace mdp::internal {

inline constexpr std::size_t kHugePageBytes = std::size_t{1} << 21;
inline constexpr std::size_t kLargeArrayBytes = std::size_t{1} << 22;

// madvise(MADV_HUGEPAGE) over [p, p + bytes); true iff the kernel accepted the advice (false
// where huge pages are not built in, or off).
bool AdviseHugePages(void* p, std::size_t bytes);
// `bytes` (a multiple of kHugePageBytes) of fresh, zeroed memory starting on a huge page
// boundary and advised as above before anything touches it; nullptr when memory runs out.
// Mapped from the kernel directly, not taken from the heap, where a block freed earlier
// would come back already touched, on small pages. Release with UnmapLarge(p, bytes).
void* MapLarge(std::size_t bytes);
void UnmapLarge(void* p, std::size_t bytes);

template <class T>
class LargeArrayAllocator {
 public:
  using value_type = T;

  LargeArrayAllocator() = default;
  template <class U>
  LargeArrayAllocator(const LargeArrayAllocator<U>& /*other*/) {}  // NOLINT: as std::allocator.

  T* allocate(std::size_t n) {
    if (n > (static_cast<std::size_t>(-1) - 2 * kHugePageBytes) / sizeof(T)) {
      throw std::bad_array_new_length();
    }
    if (!IsLarge(n)) return static_cast<T*>(::operator new(n * sizeof(T)));
    void* p = MapLarge(RoundedBytes(n));
    if (p == nullptr) throw std::bad_alloc();
    return static_cast<T*>(p);
  }

  void deallocate(T* p, std::size_t n) {
    if (IsLarge(n)) {
      UnmapLarge(p, RoundedBytes(n));
    } else {
      ::operator delete(p);
    }
  }

  // Bytes an array of n elements takes: the request rounded up to a huge page when large.
  static std::size_t RoundedBytes(std::size_t n) {
    const std::size_t bytes = n * sizeof(T);
    return IsLarge(n) ? (bytes + kHugePageBytes - 1) / kHugePageBytes * kHugePageBytes : bytes;
  }
  static bool IsLarge(std::size_t n) { return n >= kLargeArrayBytes / sizeof(T); }

  template <class U>
  bool operator==(const LargeArrayAllocator<U>& /*other*/) const {
    return true;
  }
};

template <class T>
using LargeVector = std::vector<T, LargeArrayAllocator<T>>;

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_LARGE_ARRAY_H_
