// EXPECT_OK / ASSERT_OK for Status and Result<T> in tests.
#ifndef MDP_TESTS_TESTING_STATUS_MATCHERS_H_
#define MDP_TESTS_TESTING_STATUS_MATCHERS_H_

#include <gtest/gtest.h>

#include "solver/status.h"

namespace mdp::testing {

inline const Status& GetStatus(const Status& s) { return s; }
template <typename T>
const Status& GetStatus(const Result<T>& r) {
  static const Status kOk;
  return r.ok() ? kOk : r.status();
}

}  // namespace mdp::testing

#define EXPECT_OK(expr) EXPECT_TRUE(::mdp::testing::GetStatus(expr).ok()) \
    << ::mdp::testing::GetStatus(expr).ToString()
#define ASSERT_OK(expr) ASSERT_TRUE(::mdp::testing::GetStatus(expr).ok()) \
    << ::mdp::testing::GetStatus(expr).ToString()

#endif  // MDP_TESTS_TESTING_STATUS_MATCHERS_H_
