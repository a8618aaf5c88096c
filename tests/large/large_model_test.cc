// Size test: a model of 1,000,000 states x 4 actions x 8 outcomes is built, solved (policy
// iteration with BiCGSTAB evaluation, and modified policy iteration) and answers a query on
// this 2-core machine, with its bounds checked by an independent exact backup. Times are
// printed for the record, never asserted.
#include <gtest/gtest.h>

#include <chrono>
#include <cstdio>

#include "solver/solver.h"
#include "tests/large/large_model.h"
#include "tests/testing/status_matchers.h"

namespace mdp {
namespace {

double Seconds(std::chrono::steady_clock::time_point since) {
  return std::chrono::duration<double>(std::chrono::steady_clock::now() - since).count();
}

TEST(LargeModelTest, MillionStatesLoadSolveAndAnswer) {
  auto t0 = std::chrono::steady_clock::now();
  Result<Model> model = BuildModel(testing::LargeSpec(1'000'000, 4, 8, 42));
  ASSERT_OK(model);
  const Model& m = *model;
  const double build = Seconds(t0);
  EXPECT_EQ(m.num_states(), 1'000'000);
  EXPECT_EQ(m.num_rows(), 4'000'000);
  EXPECT_EQ(m.num_outcomes_in_document(), 32'000'000);

  for (Method method : {Method::kPolicyIteration, Method::kModifiedPolicyIteration}) {
    SCOPED_TRACE(std::string(MethodName(method)));
    SolveOptions options;
    options.method = method;
    options.tolerance = 1e-6;
    options.threads = 0;
    t0 = std::chrono::steady_clock::now();
    Result<Solution> solution = Solve(m, options);
    ASSERT_OK(solution);
    const double solve = Seconds(t0);
    EXPECT_EQ(solution->outcome, SolveOutcome::kConverged);
    EXPECT_LE(solution->value_error_bound, 1e-6);
    // Independent check of the stated bound: the Bellman residual of the returned values.
    VerifyOptions verify;
    verify.tolerance = 1e-5;
    const ValuesReport report = VerifyValues(m, solution->values, verify);
    EXPECT_TRUE(report.pass) << report.value_error_bound;
    // The "answer": state 123456's pick is in its optimal set and its Q equals V.
    const StateId s = 123456;
    const RowId pick = solution->best_row[s];
    ASSERT_GE(pick, 0);
    EXPECT_TRUE(solution->optimal_row[pick]);
    EXPECT_NEAR(solution->q[pick], solution->values[s], solution->tie_tolerance + 1e-9);
    std::printf("[ large ] build %.2f s, %s %.2f s, %lld iterations, %lld sweeps, bound %.2e\n",
                build, std::string(MethodName(method)).c_str(), solve,
                static_cast<long long>(solution->iterations),
                static_cast<long long>(solution->sweeps), solution->value_error_bound);
  }
}

}  // namespace
}  // namespace mdp
