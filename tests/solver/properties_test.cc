// Property tests of the solver core on seeded random models: every method agrees with the
// others within their stated bounds, the bounds hold against a tightly solved reference,
// V*(s) equals the Q of every optimal action, exact evaluation of the optimal policy
// reproduces V*, and minimisation equals maximisation of negated rewards.
#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <ostream>

#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::kAllMethods;
using testing::MustSolve;

using testing::RandomModelOptions;
using testing::RandomSpec;


double SupDiff(const std::vector<double>& a, const std::vector<double>& b) {
  double d = 0.0;
  for (size_t i = 0; i < a.size(); ++i) d = std::max(d, std::fabs(a[i] - b[i]));
  return d;
}

// The reference: policy iteration with a direct solve, its values re-evaluated exactly.
std::vector<double> Reference(const Model& m) {
  const Solution s = MustSolve(m, Method::kPolicyIteration, 1e-12);
  EvaluateOptions eval;
  eval.solver = LinearSolver::kDirect;
  Result<PolicyValues> v = EvaluatePolicy(m, GreedyPolicy(m, s), eval);
  EXPECT_OK(v);
  return v->values;
}

struct Case {
  uint64_t seed;
  double discount;
  Objective objective;
};

void PrintTo(const Case& c, std::ostream* os) {
  *os << "seed " << c.seed << ", discount " << c.discount;
}

class RandomModelTest : public ::testing::TestWithParam<Case> {
 protected:
  Model MakeModel() const {
    RandomModelOptions o;
    o.states = 40 + static_cast<StateId>(GetParam().seed % 5) * 30;
    o.discount = GetParam().discount;
    o.objective = GetParam().objective;
    return testing::MustBuild(RandomSpec(GetParam().seed, o));
  }
};

TEST_P(RandomModelTest, MethodsAgreeWithinTheirBounds) {
  const Model m = MakeModel();
  const std::vector<double> truth = Reference(m);
  const double scale = 1e-9 * std::max(1.0, *std::max_element(truth.begin(), truth.end()));
  for (Method method : kAllMethods) {
    SCOPED_TRACE(std::string(MethodName(method)));
    const Solution s = MustSolve(m, method, 1e-8);
    EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
    EXPECT_LE(s.value_error_bound, 1e-8);
    EXPECT_LE(SupDiff(s.values, truth), s.value_error_bound + scale);
  }
}

TEST_P(RandomModelTest, StatedBoundsHoldForLooseSolves) {
  // Loose tolerances make the bounds the binding constraint, so this can fail if a bound is
  // wrong (with tight tolerances it could not).
  const Model m = MakeModel();
  const std::vector<double> truth = Reference(m);
  const bool maximize = m.objective() == Objective::kMaximize;
  for (Method method : kAllMethods) {
    for (double tolerance : {1.0, 1e-2}) {
      SCOPED_TRACE(std::string(MethodName(method)) + " tol " + std::to_string(tolerance));
      const Solution s = MustSolve(m, method, tolerance);
      EXPECT_LE(SupDiff(s.values, truth), s.value_error_bound + 1e-9);
      Result<PolicyValues> greedy = EvaluatePolicy(m, GreedyPolicy(m, s), EvaluateOptions{});
      ASSERT_OK(greedy);
      for (StateId st = 0; st < m.num_states(); ++st) {
        const double loss = maximize ? truth[st] - greedy->values[st]
                                     : greedy->values[st] - truth[st];
        EXPECT_LE(loss, s.policy_loss_bound + 1e-9) << m.state_name(st);
      }
      // Every truly optimal action is in the reported set.
      for (StateId st = 0; st < m.num_states(); ++st) {
        for (RowId r = m.row_begin(st); r < m.row_end(st); ++r) {
          double q = m.row_reward(r);
          for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
            q += m.discount() * m.entry_probability(e) * truth[m.entry_next(e)];
          }
          if (std::fabs(q - truth[st]) <= 1e-12 * std::max(1.0, std::fabs(q))) {
            EXPECT_TRUE(s.optimal_row[r]) << m.state_name(st) << " " << m.row_action_name(r);
          }
        }
      }
    }
  }
}

TEST_P(RandomModelTest, OptimalValueEqualsQOfEveryOptimalAction) {
  const Model m = MakeModel();
  const Solution s = MustSolve(m, Method::kPolicyIteration, 1e-10);
  for (StateId st = 0; st < m.num_states(); ++st) {
    for (RowId r = m.row_begin(st); r < m.row_end(st); ++r) {
      if (!s.optimal_row[r]) continue;
      EXPECT_LE(std::fabs(s.q[r] - s.values[st]),
                s.tie_tolerance + 1e-12 * std::max(1.0, std::fabs(s.values[st])));
    }
  }
}

TEST_P(RandomModelTest, EvaluatingTheOptimalPolicyReproducesTheValues) {
  const Model m = MakeModel();
  const Solution s = MustSolve(m, Method::kValueIteration, 1e-9);
  for (LinearSolver solver : {LinearSolver::kDirect, LinearSolver::kBiCgStab, LinearSolver::kSweeps}) {
    SCOPED_TRACE(std::string(LinearSolverName(solver)));
    EvaluateOptions eval;
    eval.solver = solver;
    Result<PolicyValues> v = EvaluatePolicy(m, UniformOptimalPolicy(m, s), eval);
    ASSERT_OK(v);
    EXPECT_LE(SupDiff(v->values, s.values),
              s.value_error_bound + s.policy_loss_bound + v->value_error_bound + 1e-9);
  }
}

TEST_P(RandomModelTest, MinimizeEqualsNegatedMaximize) {
  RandomModelOptions o;
  o.states = 60;
  o.discount = GetParam().discount;
  o.objective = Objective::kMinimize;
  ModelSpec costs = RandomSpec(GetParam().seed, o);
  ModelSpec rewards = costs;
  rewards.objective = Objective::kMaximize;
  for (double& r : rewards.outcome_reward) r = -r;
  for (double& r : rewards.slot_reward) r = -r;
  const Model min_model = testing::MustBuild(costs);
  const Model max_model = testing::MustBuild(rewards);
  const Solution a = MustSolve(min_model, Method::kPolicyIteration, 1e-10);
  const Solution b = MustSolve(max_model, Method::kPolicyIteration, 1e-10);
  for (StateId st = 0; st < min_model.num_states(); ++st) {
    EXPECT_NEAR(a.values[st], -b.values[st], 1e-9);
    EXPECT_EQ(a.best_row[st], b.best_row[st]);
  }
  for (RowId r = 0; r < min_model.num_rows(); ++r) EXPECT_EQ(a.optimal_row[r], b.optimal_row[r]);
}

INSTANTIATE_TEST_SUITE_P(Seeds, RandomModelTest,
                         ::testing::Values(Case{1, 0.5, Objective::kMaximize},
                                           Case{2, 0.9, Objective::kMaximize},
                                           Case{3, 0.95, Objective::kMinimize},
                                           Case{4, 0.99, Objective::kMaximize},
                                           Case{5, 0.0, Objective::kMinimize},
                                           Case{6, 0.9, Objective::kMinimize},
                                           Case{7, 0.97, Objective::kMaximize}),
                         [](const ::testing::TestParamInfo<Case>& info) {
                           const Case& c = info.param;
                           return "seed" + std::to_string(c.seed) + "_discount" +
                                  std::to_string(static_cast<int>(c.discount * 100)) +
                                  (c.objective == Objective::kMaximize ? "_max" : "_min");
                         });

}  // namespace
}  // namespace mdp
