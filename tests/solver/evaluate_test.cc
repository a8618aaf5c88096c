// Tests solver/evaluate.{h,cc}: exact policy evaluation by each linear solver against closed
// forms, stochastic policies, the stated residual and bound, and malformed policies.
#include "solver/evaluate.h"

#include <gtest/gtest.h>

#include <cmath>

#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::SpecWriter;

const LinearSolver kSolvers[] = {LinearSolver::kDirect, LinearSolver::kBiCgStab,
                                 LinearSolver::kSweeps};

// Two states swapping each period: from A earn a, from B earn b. Closed form:
// V(A) = (a + g b) / (1 - g^2), V(B) = (b + g a) / (1 - g^2).
TEST(EvaluateTest, AlternatingPairMatchesClosedForm) {
  const double g = 0.95, a = 3.0, b = -1.0;
  SpecWriter w(g, Objective::kMaximize);
  w.States({"A", "B"}, {});
  w.Action("A", "swap", {{"B", 1.0, a}});
  w.Action("B", "swap", {{"A", 1.0, b}});
  const Model m = w.Build();
  const std::vector<RowId> rows = {0, 1};
  for (LinearSolver solver : kSolvers) {
    SCOPED_TRACE(std::string(LinearSolverName(solver)));
    EvaluateOptions options;
    options.solver = solver;
    Result<PolicyValues> v = EvaluatePolicy(m, DeterministicPolicy(m, rows), options);
    ASSERT_OK(v);
    EXPECT_EQ(v->solver_used, solver);
    EXPECT_NEAR(v->values[0], (a + g * b) / (1 - g * g), 1e-9);
    EXPECT_NEAR(v->values[1], (b + g * a) / (1 - g * g), 1e-9);
    EXPECT_LE(v->value_error_bound, 1e-9);
    EXPECT_NEAR(v->value_error_bound, v->residual / (1 - g), 1e-15);
  }
}

// A stochastic policy: in state S take "one" (earn 1, stay) w.p. q and "two" (earn 2, stay)
// w.p. 1 - q. V = (q + 2 (1 - q)) / (1 - g).
TEST(EvaluateTest, StochasticPolicyMixesRewards) {
  const double g = 0.8, q = 0.25;
  SpecWriter w(g, Objective::kMaximize);
  w.States({"S"}, {});
  w.Action("S", "one", {{"S", 1.0, 1.0}});
  w.Action("S", "two", {{"S", 1.0, 2.0}});
  const Model m = w.Build();
  Policy p;
  p.row_probability = {q, 1 - q};
  for (LinearSolver solver : kSolvers) {
    EvaluateOptions options;
    options.solver = solver;
    Result<PolicyValues> v = EvaluatePolicy(m, p, options);
    ASSERT_OK(v);
    EXPECT_NEAR(v->values[0], (q + 2 * (1 - q)) / (1 - g), 1e-9);
  }
}

TEST(EvaluateTest, SolversAgreeOnALargerRandomModel) {
  testing::RandomModelOptions o;
  o.states = 4000;
  o.discount = 0.99;
  const Model m = testing::MustBuild(testing::RandomSpec(11, o));
  std::vector<RowId> rows(m.num_states(), -1);
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (!m.terminal(s)) rows[s] = m.row_end(s) - 1;
  }
  const Policy p = DeterministicPolicy(m, rows);
  std::vector<std::vector<double>> results;
  for (LinearSolver solver : {LinearSolver::kBiCgStab, LinearSolver::kSweeps}) {
    EvaluateOptions options;
    options.solver = solver;
    options.tolerance = 1e-9;
    Result<PolicyValues> v = EvaluatePolicy(m, p, options);
    ASSERT_OK(v);
    EXPECT_LE(v->value_error_bound, 1e-9) << LinearSolverName(solver);
    results.push_back(v->values);
  }
  for (StateId s = 0; s < m.num_states(); ++s) EXPECT_NEAR(results[0][s], results[1][s], 2e-9);
}

TEST(EvaluateTest, AutoPicksDirectForSmallAndKrylovForLarge) {
  testing::RandomModelOptions o;
  o.states = 100;
  const Model small = testing::MustBuild(testing::RandomSpec(3, o));
  Solution s = *Solve(small, SolveOptions{});
  EvaluateOptions options;
  options.direct_max_states = 50;
  Result<PolicyValues> krylov = EvaluatePolicy(small, GreedyPolicy(small, s), options);
  ASSERT_OK(krylov);
  EXPECT_EQ(krylov->solver_used, LinearSolver::kBiCgStab);
  options.direct_max_states = 100;
  Result<PolicyValues> direct = EvaluatePolicy(small, GreedyPolicy(small, s), options);
  ASSERT_OK(direct);
  EXPECT_EQ(direct->solver_used, LinearSolver::kDirect);
}

// A long corridor: each state steps to the next and earns 1, the last is terminal. Closed
// form V(k) = (1 - g^(n-1-k)) / (1 - g). Chain-shaped systems can break BiCGSTAB down; the
// evaluation must still be right (falling back to sweeps if it does).
TEST(EvaluateTest, ChainShapedPoliciesEvaluateCorrectlyWithTheKrylovSolver) {
  const int n = 5000;
  const double g = 0.99;
  ModelSpec spec;
  spec.criterion.discount = g;
  spec.action_names = {"step"};
  for (int k = 0; k < n; ++k) {
    spec.AddState("c" + std::to_string(k), k == n - 1);
    if (k + 1 < n) {
      spec.AddStateAction(0, 0.0);
      spec.AddOutcome(k + 1, 1.0, 1.0);
    }
  }
  const Model m = testing::MustBuild(spec);
  std::vector<RowId> rows(n, -1);
  for (int k = 0; k + 1 < n; ++k) rows[k] = k;
  EvaluateOptions options;
  options.solver = LinearSolver::kBiCgStab;
  Result<PolicyValues> v = EvaluatePolicy(m, DeterministicPolicy(m, rows), options);
  ASSERT_OK(v);
  for (int k = 0; k < n; k += 499) {
    EXPECT_NEAR(v->values[k], (1.0 - std::pow(g, n - 1 - k)) / (1.0 - g), 1e-8) << k;
  }
  EXPECT_LE(v->value_error_bound, 1e-8);
}

TEST(EvaluateTest, MalformedPolicyIsRefused) {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"S"}, {});
  w.Action("S", "one", {{"S", 1.0, 1.0}});
  w.Action("S", "two", {{"S", 1.0, 2.0}});
  const Model m = w.Build();
  Policy short_policy;
  short_policy.row_probability = {1.0};
  EXPECT_EQ(EvaluatePolicy(m, short_policy, {}).status().code(), StatusCode::kInvalidArgument);
  Policy bad_sum;
  bad_sum.row_probability = {0.5, 0.6};
  Result<PolicyValues> v = EvaluatePolicy(m, bad_sum, {});
  ASSERT_FALSE(v.ok());
  EXPECT_NE(v.status().message().find("state 'S'"), std::string::npos);
  Policy negative;
  negative.row_probability = {-0.5, 1.5};
  EXPECT_FALSE(EvaluatePolicy(m, negative, {}).ok());
}

}  // namespace
}  // namespace mdp
