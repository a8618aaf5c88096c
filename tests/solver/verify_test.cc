// Tests solver/verify.{h,cc}: candidate value functions (residuals, worst states, bounds,
// verdict) and candidate policies (exact loss, suboptimal choices, verdict).
#include "solver/verify.h"

#include <gtest/gtest.h>

#include <cmath>

#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::kAllMethods;
using testing::MustSolve;

using testing::SpecWriter;


// A model with no terminal states: shifting V* by a constant c makes T V - V = (g - 1) c in
// every state, so the residual is (1 - g) |c| and the implied bound e / (1 - g) is |c|
// exactly (closed form).
TEST(VerifyValuesTest, ConstantShiftGivesExactResidualAndBound) {
  testing::RandomModelOptions o;
  o.terminal_fraction = 0.0;
  o.discount = 0.9;
  const Model m = testing::MustBuild(testing::RandomSpec(21, o));
  const Solution s = MustSolve(m, Method::kPolicyIteration, 1e-11);
  for (double c : {0.5, -2.0}) {
    std::vector<double> candidate = s.values;
    for (double& v : candidate) v += c;
    VerifyOptions options;
    options.tolerance = 1e-3;
    const ValuesReport r = VerifyValues(m, candidate, options);
    EXPECT_NEAR(r.max_residual, (1 - 0.9) * std::fabs(c), 1e-9);
    EXPECT_NEAR(r.value_error_bound, std::fabs(c), 1e-8);
    EXPECT_FALSE(r.pass);
    ASSERT_EQ(r.worst.size(), 10u);
    EXPECT_NEAR(r.worst[0].residual, r.max_residual, 1e-15);
  }
}

TEST(VerifyValuesTest, OptimalValuesPassAndWorstStateIsThePerturbedOne) {
  const Model m = testing::MustBuild(testing::RandomSpec(22, {}));
  const Solution s = MustSolve(m, Method::kPolicyIteration, 1e-11);
  VerifyOptions options;
  EXPECT_TRUE(VerifyValues(m, s.values, options).pass);
  std::vector<double> candidate = s.values;
  StateId target = 0;
  while (m.terminal(target)) ++target;
  candidate[target] += 1.0;
  const ValuesReport r = VerifyValues(m, candidate, options);
  EXPECT_FALSE(r.pass);
  EXPECT_EQ(r.worst[0].state, target);
  EXPECT_NEAR(r.worst[0].candidate, s.values[target] + 1.0, 1e-12);
  EXPECT_GE(r.greedy_policy_loss_bound, 0.0);
  EXPECT_LE(r.greedy_policy_loss_bound, 2.0 * r.value_error_bound + 1e-12);
}

// "stay" earns 1 forever (value 10 at g = 0.9), "leave" earns 5 once: always leaving loses 5.
TEST(VerifyPolicyTest, SuboptimalPolicyLossIsExact) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"here", "gone"}, {false, true});
  w.Action("here", "stay", {{"here", 1.0, 1.0}});
  w.Action("here", "leave", {{"gone", 1.0, 5.0}});
  const Model m = w.Build();
  const Solution s = MustSolve(m, Method::kPolicyIteration, 1e-11);
  const std::vector<RowId> leave = {1, -1};
  Result<PolicyReport> r = VerifyPolicy(m, DeterministicPolicy(m, leave), s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_FALSE(r->pass);
  EXPECT_NEAR(r->max_loss, 5.0, 1e-9);
  EXPECT_NEAR(r->values[0], 5.0, 1e-12);
  ASSERT_EQ(r->suboptimal.size(), 1u);
  EXPECT_EQ(r->suboptimal_count, 1);
  EXPECT_EQ(r->suboptimal[0].state, 0);
  EXPECT_EQ(r->suboptimal[0].chosen, std::vector<RowId>{1});
  EXPECT_EQ(r->suboptimal[0].optimal, std::vector<RowId>{0});
  // Mixing 50/50: V = (0.5 * 1 + 0.5 * 5) + ... solve V = 0.5 (1 + 0.9 V) + 0.5 * 5 -> V = 3 / 0.55.
  Policy mixed;
  mixed.row_probability = {0.5, 0.5};
  Result<PolicyReport> r2 = VerifyPolicy(m, mixed, s, VerifyOptions{});
  ASSERT_OK(r2);
  EXPECT_NEAR(r2->values[0], 3.0 / 0.55, 1e-9);
  EXPECT_NEAR(r2->max_loss, 10.0 - 3.0 / 0.55, 1e-9);
  EXPECT_EQ(r2->suboptimal_count, 1);
}

TEST(VerifyPolicyTest, OptimalPoliciesPassIncludingUniformOverTies) {
  SpecWriter w(0.8, Objective::kMaximize);
  w.States({"here", "gone"}, {false, true});
  w.Action("here", "stay", {{"here", 1.0, 1.0}});
  w.Action("here", "leave", {{"gone", 1.0, 5.0}});
  const Model m = w.Build();
  const Solution s = MustSolve(m, Method::kPolicyIteration, 1e-11);
  for (const Policy& p : {GreedyPolicy(m, s), UniformOptimalPolicy(m, s)}) {
    Result<PolicyReport> r = VerifyPolicy(m, p, s, VerifyOptions{});
    ASSERT_OK(r);
    EXPECT_TRUE(r->pass);
    EXPECT_LE(r->max_loss, 1e-9);
    EXPECT_EQ(r->suboptimal_count, 0);
  }
}

TEST(VerifyPolicyTest, MinimizeLossIsPolicyCostAboveOptimum) {
  SpecWriter w(0.5, Objective::kMinimize);
  w.States({"s", "end"}, {false, true});
  w.Action("s", "cheap", {{"end", 1.0, 1.0}});
  w.Action("s", "dear", {{"end", 1.0, 4.0}});
  const Model m = w.Build();
  const Solution s = MustSolve(m, Method::kPolicyIteration, 1e-11);
  EXPECT_NEAR(s.values[0], 1.0, 1e-12);
  const std::vector<RowId> dear = {1, -1};
  Result<PolicyReport> r = VerifyPolicy(m, DeterministicPolicy(m, dear), s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_NEAR(r->max_loss, 3.0, 1e-12);
  EXPECT_FALSE(r->pass);
}

}  // namespace
}  // namespace mdp
