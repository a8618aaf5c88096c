// Tests the allocator of the solver's large arrays (solver/internal/large_array.h): which
// arrays it treats as large, their alignment and rounding, that contents survive growth and
// shrinking across the threshold, that a model's streamed arrays use it, and, where the
// kernel offers transparent huge pages, that the pages of a large array are huge.
#include "solver/internal/large_array.h"

#include <gtest/gtest.h>

#include <cstdint>
#include <cstdio>
#include <fstream>
#include <numeric>
#include <sstream>
#include <string>

#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using internal::kHugePageBytes;
using internal::kLargeArrayBytes;
using internal::LargeArrayAllocator;
using internal::LargeVector;

bool HugeAligned(const void* p) { return reinterpret_cast<uintptr_t>(p) % kHugePageBytes == 0; }

TEST(LargeArrayTest, OnlyArraysOfAtLeastFourMebibytesAreLarge) {
  const size_t threshold = kLargeArrayBytes / sizeof(double);
  EXPECT_FALSE(LargeArrayAllocator<double>::IsLarge(threshold - 1));
  EXPECT_TRUE(LargeArrayAllocator<double>::IsLarge(threshold));
  EXPECT_EQ(LargeArrayAllocator<double>::RoundedBytes(threshold - 1), kLargeArrayBytes - 8);
  EXPECT_EQ(LargeArrayAllocator<double>::RoundedBytes(threshold), kLargeArrayBytes);
  // One element past a whole number of huge pages takes one page more.
  EXPECT_EQ(LargeArrayAllocator<double>::RoundedBytes(threshold + 1),
            kLargeArrayBytes + kHugePageBytes);
  EXPECT_EQ(LargeArrayAllocator<uint32_t>::RoundedBytes(kLargeArrayBytes / 4 + 3),
            kLargeArrayBytes + kHugePageBytes);
}

TEST(LargeArrayTest, LargeArraysStartOnAHugePageAndKeepTheirContents) {
  const size_t threshold = kLargeArrayBytes / sizeof(int64_t);
  LargeVector<int64_t> v(threshold - 10);
  std::iota(v.begin(), v.end(), int64_t{-5});
  // Growing past the threshold moves the array to a large allocation.
  v.resize(threshold + 12345, 7);
  ASSERT_TRUE(HugeAligned(v.data()));
  for (size_t i = 0; i < threshold - 10; ++i) {
    ASSERT_EQ(v[i], static_cast<int64_t>(i) - 5) << "at " << i;
  }
  for (size_t i = threshold - 10; i < v.size(); ++i) ASSERT_EQ(v[i], 7) << "at " << i;
  // Shrinking below it moves it back (deallocate must free each the way it was allocated).
  v.resize(100);
  v.shrink_to_fit();
  ASSERT_EQ(v.capacity(), 100u);
  for (size_t i = 0; i < 100; ++i) ASSERT_EQ(v[i], static_cast<int64_t>(i) - 5);
  LargeVector<int64_t> copy(v);
  EXPECT_EQ(copy, v);
}

TEST(LargeArrayTest, AModelsStreamedArraysAreLarge) {
  testing::RandomModelOptions o;
  o.states = 100000;
  o.max_actions = 4;
  o.max_outcomes = 12;
  const Model m = testing::MustBuild(testing::RandomSpec(3, o));
  // At least 4 MiB of probabilities and of next states (8 and 4 bytes per entry).
  ASSERT_GE(m.num_entries(), static_cast<int64_t>(kLargeArrayBytes / sizeof(StateId)));
  EXPECT_TRUE(HugeAligned(m.entry_probability_data()));
  EXPECT_TRUE(HugeAligned(m.entry_next_data()));
}

// The kernel's transparent huge page setting, e.g. "always [madvise] never"; empty if unknown.
std::string HugePageSetting() {
  std::ifstream in("/sys/kernel/mm/transparent_hugepage/enabled");
  std::string line;
  std::getline(in, line);
  return line;
}

// AnonHugePages (kB) of the mapping that holds `p`, from /proc/self/smaps; -1 if not found.
int64_t AnonHugeKbAt(const void* p) {
  std::ifstream in("/proc/self/smaps");
  const auto at = reinterpret_cast<uintptr_t>(p);
  bool inside = false;
  for (std::string line; std::getline(in, line);) {
    unsigned long long begin = 0, end = 0;
    if (std::sscanf(line.c_str(), "%llx-%llx ", &begin, &end) == 2 &&
        line.find(':') > line.find(' ')) {
      inside = begin <= at && at < end;
      continue;
    }
    long long kb = 0;
    if (inside && std::sscanf(line.c_str(), "AnonHugePages: %lld kB", &kb) == 1) return kb;
  }
  return -1;
}

TEST(LargeArrayTest, LargeArraysGetHugePagesWhereTheKernelOffersThem) {
  const std::string setting = HugePageSetting();
  if (setting.empty() || setting.find("[never]") != std::string::npos) {
    GTEST_SKIP() << "transparent huge pages are off here: '" << setting << "'";
  }
  LargeVector<double> v(8 * kHugePageBytes / sizeof(double), 1.0);  // 16 MiB, all touched.
  ASSERT_TRUE(HugeAligned(v.data()));
  EXPECT_TRUE(internal::AdviseHugePages(v.data(), 8 * kHugePageBytes));
  const int64_t huge_kb = AnonHugeKbAt(v.data());
  // The kernel may fall back to small pages when it finds no free 2 MiB run; on a host with
  // memory to spare it gives at least one huge page of the eight.
  EXPECT_GE(huge_kb, static_cast<int64_t>(kHugePageBytes / 1024))
      << "setting '" << setting << "', AnonHugePages of the array's mapping " << huge_kb;
}

}  // namespace
}  // namespace mdp
