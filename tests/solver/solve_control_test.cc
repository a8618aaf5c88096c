// Tests the run control shared by all methods (solver/internal/run_control.h via Solve()):
// progress callbacks, cancellation, iteration and time limits, option checks.
#include <gtest/gtest.h>
#include <sched.h>

#include <algorithm>
#include <cmath>
#include <string>
#include <thread>

#include "solver/internal/bellman.h"
#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

Model SlowModel() {
  testing::RandomModelOptions o;
  o.states = 200;
  o.discount = 0.999;  // Value iteration needs thousands of sweeps.
  return testing::MustBuild(testing::RandomSpec(5, o));
}

TEST(SolveControlTest, ProgressIsReportedWithGrowingIterations) {
  const Model m = SlowModel();
  std::vector<Progress> seen;
  ProgressFn progress = [&](const Progress& p) { seen.push_back(p); };
  SolveOptions options;
  options.method = Method::kValueIteration;
  options.max_iterations = 50;
  Result<Solution> s = Solve(m, options, &progress);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kIterationLimit);
  EXPECT_EQ(s->iterations, 50);
  ASSERT_EQ(seen.size(), 50u);
  for (size_t i = 0; i < seen.size(); ++i) {
    EXPECT_EQ(seen[i].iteration, static_cast<int64_t>(i + 1));
    EXPECT_GT(seen[i].residual, 0.0);
    EXPECT_GE(seen[i].elapsed_seconds, 0.0);
  }
}

TEST(SolveControlTest, CancelStopsEveryMethodWithAValidPartialAnswer) {
  const Model m = SlowModel();
  for (Method method : {Method::kValueIteration, Method::kGaussSeidel, Method::kPolicyIteration,
                        Method::kModifiedPolicyIteration}) {
    SCOPED_TRACE(std::string(MethodName(method)));
    CancelToken cancel;
    ProgressFn progress = [&](const Progress& p) {
      if (p.iteration >= 2) cancel.Cancel();
    };
    SolveOptions options;
    options.method = method;
    options.tolerance = 1e-12;
    Result<Solution> s = Solve(m, options, &progress, &cancel);
    ASSERT_OK(s);
    if (s->outcome != SolveOutcome::kConverged) {
      EXPECT_EQ(s->outcome, SolveOutcome::kCancelled);
      EXPECT_LE(s->iterations, 3);
    }
    EXPECT_EQ(s->values.size(), static_cast<size_t>(m.num_states()));
  }
}

TEST(SolveControlTest, TimeLimitEndsTheSolve) {
  testing::RandomModelOptions o;
  o.states = 20000;
  o.discount = 0.999;  // Tens of thousands of sweeps of about 1 ms each.
  const Model m = testing::MustBuild(testing::RandomSpec(5, o));
  SolveOptions options;
  options.method = Method::kValueIteration;
  options.tolerance = 1e-14;
  options.time_limit_seconds = 0.05;
  Result<Solution> s = Solve(m, options);
  ASSERT_OK(s);
  EXPECT_TRUE(s->outcome == SolveOutcome::kTimeLimit || s->outcome == SolveOutcome::kStalled)
      << SolveOutcomeName(s->outcome);
  EXPECT_GT(s->value_error_bound, 0.0);
}

TEST(SolveControlTest, OptionsOutOfBoundsAreRefused) {
  const Model m = SlowModel();
  SolveOptions options;
  options.tolerance = 0.0;
  EXPECT_EQ(Solve(m, options).status().code(), StatusCode::kInvalidArgument);
  options = SolveOptions{};
  options.max_iterations = 0;
  EXPECT_EQ(Solve(m, options).status().code(), StatusCode::kInvalidArgument);
  options = SolveOptions{};
  options.threads = -1;
  Result<Solution> s = Solve(m, options);
  ASSERT_FALSE(s.ok());
  EXPECT_NE(s.status().message().find("threads"), std::string::npos);
}

TEST(SolveControlTest, ThreadedSweepsGiveTheSameAnswer) {
  const Model m = testing::MustBuild(testing::RandomSpec(9, {}));
  SolveOptions one;
  one.method = Method::kValueIteration;
  SolveOptions two = one;
  two.threads = 2;
  Result<Solution> a = Solve(m, one);
  Result<Solution> b = Solve(m, two);
  ASSERT_OK(a);
  ASSERT_OK(b);
  EXPECT_EQ(a->values, b->values);  // Same arithmetic per state, so bit-identical.
  EXPECT_EQ(a->iterations, b->iterations);
}

// Gauss-Seidel on several threads sweeps chunks (bellman.h; this model fits in one, and
// bellman_test checks smaller chunks sweep by sweep): with any thread count it must meet its
// bound against a tightly solved reference, need fewer sweeps than Jacobi value iteration on
// this model (it reads updated values within each chunk), and be deterministic.
TEST(SolveControlTest, BlockGaussSeidelMeetsItsBoundAndIsDeterministic) {
  testing::RandomModelOptions o;
  o.states = 3000;
  o.discount = 0.95;
  const Model m = testing::MustBuild(testing::RandomSpec(19, o));
  const Solution reference = testing::MustSolve(m, Method::kPolicyIteration, 1e-12);
  SolveOptions gs;
  gs.method = Method::kGaussSeidel;
  gs.tolerance = 1e-7;
  for (int threads : {1, 2, 3}) {
    SCOPED_TRACE("threads " + std::to_string(threads));
    gs.threads = threads;
    Result<Solution> a = Solve(m, gs);
    Result<Solution> b = Solve(m, gs);
    ASSERT_OK(a);
    ASSERT_OK(b);
    EXPECT_EQ(a->outcome, SolveOutcome::kConverged);
    EXPECT_EQ(a->values, b->values);
    double error = 0.0;
    for (StateId s = 0; s < m.num_states(); ++s) {
      error = std::max(error, std::fabs(a->values[s] - reference.values[s]));
    }
    EXPECT_LE(error, a->value_error_bound + reference.value_error_bound);
    SolveOptions vi = gs;
    vi.method = Method::kValueIteration;
    Result<Solution> jacobi = Solve(m, vi);
    ASSERT_OK(jacobi);
    EXPECT_LT(a->sweeps, jacobi->sweeps);
  }
}

// threads = 0 means every CPU the solving thread may run on (its affinity mask, as set by
// taskset or a container's cpuset), not every CPU of the machine. A thread pinned to one CPU
// sees 1 and resolves automatic threads to 1 even for a model large enough to sweep on all;
// pinned to two CPUs it sees 2. Needs a machine with at least 2 CPUs in this process's mask.
TEST(SolveControlTest, AutomaticThreadsFollowTheAffinityMask) {
  cpu_set_t mine;
  CPU_ZERO(&mine);
  ASSERT_EQ(sched_getaffinity(0, sizeof(mine), &mine), 0);
  std::vector<int> cpus;
  for (int c = 0; c < CPU_SETSIZE; ++c) {
    if (CPU_ISSET(c, &mine)) cpus.push_back(c);
  }
  EXPECT_EQ(UsableCpuCount(), static_cast<int>(cpus.size()));
  if (cpus.size() < 2) GTEST_SKIP() << "needs 2 CPUs in the affinity mask, has " << cpus.size();
  testing::RandomModelOptions o;
  o.states = 30000;
  o.max_actions = 4;
  o.max_outcomes = 8;
  const Model m = testing::MustBuild(testing::RandomSpec(11, o));
  ASSERT_GE(m.num_entries(), kAutoThreadsMinEntries);
  for (size_t width : {size_t{1}, size_t{2}}) {
    int seen = -1, resolved = -1, solved_with = -1;
    std::thread pinned([&] {  // A new thread, so the test's own mask is left alone.
      cpu_set_t set;
      CPU_ZERO(&set);
      for (size_t k = 0; k < width; ++k) CPU_SET(cpus[k], &set);
      if (sched_setaffinity(0, sizeof(set), &set) != 0) return;
      seen = UsableCpuCount();
      resolved = internal::ThreadCount(0);
      SolveOptions options;
      options.method = Method::kValueIteration;
      options.max_iterations = 1;
      Result<Solution> s = Solve(m, options);
      if (s.ok()) solved_with = s->options.threads;
    });
    pinned.join();
    SCOPED_TRACE("pinned to " + std::to_string(width) + " CPU(s)");
    EXPECT_EQ(seen, static_cast<int>(width));
    EXPECT_EQ(resolved, static_cast<int>(width));
    EXPECT_EQ(solved_with, static_cast<int>(width));
  }
}

}  // namespace
}  // namespace mdp
