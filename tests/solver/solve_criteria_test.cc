// Tests Solve() (solver/solver.h) on each criterion of the model document: method dispatch
// and refusal, how each criterion's numbers land in a Solution, and stage views of a
// finite-horizon solution. The numbers are derived by hand in the comments.
#include "solver/solver.h"

#include <gtest/gtest.h>

#include <cmath>
#include <string>
#include <thread>

#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::SpecWriter;

ModelSpec WithCriterion(ModelSpec spec, Criterion criterion) {
  spec.criterion = std::move(criterion);
  return spec;
}

// A saver, "poor" or "rich". Poor: "consume" earns 1 and stays poor; "invest" costs 4 and
// makes it rich. Rich: "collect" earns 3 per period for ever. Undiscounted, V_H = 0. With k
// periods to go V_k(rich) = 3k and
//   V_k(poor) = max(1 + V_{k-1}(poor), -4 + 3(k - 1)).
//   k = 1: max(1, -4) = 1 consume;  k = 2: max(2, -1) = 2 consume;  k = 3: max(3, 2) = 3
//   consume;  k = 4: max(4, 5) = 5 invest;  k = 5: max(6, 8) = 8 invest;  k = 6: max(9, 11)
//   = 11 invest.
// So investing pays iff at least 4 periods remain: a stage-dependent policy.
ModelSpec Saver() {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"poor", "rich"}, {});
  w.Action("poor", "consume", {{"poor", 1.0}}, 1.0);
  w.Action("poor", "invest", {{"rich", 1.0}}, -4.0);
  w.Action("rich", "collect", {{"rich", 1.0}}, 3.0);
  Criterion c;
  c.kind = CriterionKind::kFiniteHorizon;
  c.horizon = 6;
  c.discount = 1.0;
  return WithCriterion(w.Spec(), c);
}

TEST(SolveCriteriaTest, FiniteHorizonStageZeroAndEveryStageFollowTheHandDerivation) {
  const Model m = testing::MustBuild(Saver());
  Result<Solution> s = Solve(m, SolveOptions{});
  ASSERT_OK(s);
  EXPECT_EQ(s->criterion, CriterionKind::kFiniteHorizon);
  EXPECT_EQ(s->method, Method::kBackwardInduction);
  EXPECT_EQ(s->options.method, Method::kBackwardInduction);
  EXPECT_EQ(s->horizon, 6);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  EXPECT_DOUBLE_EQ(s->values[0], 11.0);
  EXPECT_DOUBLE_EQ(s->values[1], 18.0);
  EXPECT_EQ(m.row_action_name(s->best_row[0]), "invest");
  EXPECT_DOUBLE_EQ(s->action_gap[0], 2.0);  // 11 - 9.
  const double poor[] = {11, 8, 5, 3, 2, 1};
  for (int64_t stage = 0; stage < 6; ++stage) {
    const int64_t k = 6 - stage;
    const Solution at = SolutionAtStage(m, *s, stage);
    EXPECT_EQ(at.stage, stage);
    EXPECT_DOUBLE_EQ(at.values[0], poor[stage]) << "stage " << stage;
    EXPECT_DOUBLE_EQ(at.values[1], 3.0 * static_cast<double>(k));
    EXPECT_EQ(m.row_action_name(at.best_row[0]), k >= 4 ? "invest" : "consume")
        << "periods remaining " << k;
    const StageDecision d = DecideAtStage(m, *s, stage, 0);
    EXPECT_DOUBLE_EQ(d.value, poor[stage]);
    EXPECT_EQ(d.pick, at.best_row[0]);
  }
}

TEST(SolveCriteriaTest, FiniteHorizonTerminalValuesAndDiscountEnterTheValues) {
  // One state "idle" earning 2 per period; V_H(idle) = 10; g = 0.5, H = 3:
  //   V_0 = 2 + 0.5 * 2 + 0.25 * 2 + 0.125 * 10 = 4.75.
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"idle"}, {});
  w.Action("idle", "wait", {{"idle", 1.0}}, 2.0);
  Criterion c;
  c.kind = CriterionKind::kFiniteHorizon;
  c.horizon = 3;
  c.discount = 0.5;
  c.terminal_values = {10.0};
  const Model m = testing::MustBuild(WithCriterion(w.Spec(), c));
  Result<Solution> s = Solve(m, SolveOptions{});
  ASSERT_OK(s);
  EXPECT_DOUBLE_EQ(s->values[0], 4.75);
  ASSERT_EQ(s->stage_values.size(), 4u);
  EXPECT_DOUBLE_EQ(s->stage_values[3], 10.0);
}

// Two states. In "a", "stay" earns 1 and stays; "go" earns 0 and moves to "b"; in "b", "work"
// earns 3 and returns to "a". Staying has gain 1; alternating has gain (0 + 3) / 2 = 1.5, so
// g* = 1.5 and the optimal policy is the periodic cycle a -> b -> a. A bias: with h(a) = 0,
// g + h(b) = 3 + h(a) gives h(b) = 1.5; check g + h(a) = max(1 + h(a), 0 + h(b)) = 1.5. True.
ModelSpec Cycle() {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"a", "b"}, {});
  w.Action("a", "stay", {{"a", 1.0}}, 1.0);
  w.Action("a", "go", {{"b", 1.0}}, 0.0);
  w.Action("b", "work", {{"a", 1.0}}, 3.0);
  Criterion c;
  c.kind = CriterionKind::kAverage;
  c.discount = 1.0;
  return WithCriterion(w.Spec(), c);
}

TEST(SolveCriteriaTest, AverageRewardByBothMethodsGivesTheDerivedGainAndBias) {
  const Model m = testing::MustBuild(Cycle());
  for (Method method : {Method::kAuto, Method::kPolicyIteration, Method::kRelativeValueIteration}) {
    SolveOptions o;
    o.method = method;
    o.tolerance = 1e-10;
    Result<Solution> s = Solve(m, o);
    ASSERT_OK(s);
    SCOPED_TRACE(std::string(MethodName(s->method)));
    EXPECT_EQ(s->criterion, CriterionKind::kAverage);
    EXPECT_NEAR(s->average.gain, 1.5, 1e-9);
    EXPECT_LE(s->average.gain_lower, 1.5 + 1e-12);
    EXPECT_GE(s->average.gain_upper, 1.5 - 1e-12);
    EXPECT_NEAR(s->values[1] - s->values[0], 1.5, 1e-8);  // h(b) - h(a).
    EXPECT_EQ(m.row_action_name(s->best_row[0]), "go");
    // q = r + P h - gain, so the best q of a state is its bias: q(a, go) = 0 + h(b) - 1.5.
    EXPECT_NEAR(s->q[m.row_begin(0) + 1], s->values[0], 1e-8);
    EXPECT_NEAR(s->action_gap[0], 0.5, 1e-8);  // q(a, stay) = 1 + h(a) - 1.5 = h(a) - 0.5.
    EXPECT_TRUE(std::isnan(s->value_error_bound));
  }
}

TEST(SolveCriteriaTest, AMethodOfAnotherCriterionIsRefusedNamingTheOnesThatApply) {
  const Model average = testing::MustBuild(Cycle());
  SolveOptions o;
  o.method = Method::kValueIteration;
  Result<Solution> s = Solve(average, o);
  ASSERT_FALSE(s.ok());
  EXPECT_EQ(s.status().code(), StatusCode::kInvalidArgument);
  EXPECT_NE(s.status().message().find("relative_value_iteration"), std::string::npos)
      << s.status().message();
  const Model horizon = testing::MustBuild(Saver());
  o.method = Method::kPolicyIteration;
  s = Solve(horizon, o);
  ASSERT_FALSE(s.ok());
  EXPECT_NE(s.status().message().find("backward_induction"), std::string::npos);
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"x"}, {});
  w.Action("x", "wait", {{"x", 1.0}}, 1.0);
  const Model discounted = w.Build();
  o.method = Method::kBackwardInduction;
  EXPECT_FALSE(Solve(discounted, o).ok());
  o.method = Method::kAuto;
  Result<Solution> d = Solve(discounted, o);
  ASSERT_OK(d);
  EXPECT_EQ(d->method, Method::kPolicyIteration);
  EXPECT_NEAR(d->values[0], 10.0, 1e-8);  // 1 / (1 - 0.9).
}

// Two criteria of one model: the saver over 6 periods (invest at "poor", derived above) and the
// same saver over 3 periods (k = 3: consume). Decisions are compared; values are not
// comparable across horizons, so none counts as changed.
TEST(SolveCriteriaTest, ComparingTwoCriteriaOfOneModelReportsDecisionsNotValues) {
  const Model six = testing::MustBuild(Saver());
  ModelSpec short_spec = Saver();
  short_spec.criterion.horizon = 3;
  const Model three = testing::MustBuild(short_spec);
  Result<Solution> a = Solve(six, SolveOptions{});
  Result<Solution> b = Solve(three, SolveOptions{});
  ASSERT_OK(a);
  ASSERT_OK(b);
  ComparisonReport r = CompareSolutions(six, *a, three, *b, CompareOptions{});
  EXPECT_FALSE(r.same_criterion);
  EXPECT_TRUE(r.values_comparable);  // Same kind, exact values: V_0 differs by horizon.
  EXPECT_EQ(r.pick_changed_count, 1);
  ASSERT_EQ(r.optimal_set_changes.size(), 1u);
  EXPECT_EQ(r.optimal_set_changes[0].pick_a, "invest");
  EXPECT_EQ(r.optimal_set_changes[0].pick_b, "consume");
  EXPECT_DOUBLE_EQ(r.optimal_set_changes[0].value_a, 11.0);
  EXPECT_DOUBLE_EQ(r.optimal_set_changes[0].value_b, 3.0);

  ModelSpec discounted_spec = Saver();
  discounted_spec.criterion = Criterion{};  // Discounted, g = 0.9.
  const Model discounted = testing::MustBuild(discounted_spec);
  Result<Solution> c = Solve(discounted, SolveOptions{});
  ASSERT_OK(c);
  // Discounted at 0.9: rich is worth 3 / 0.1 = 30, so investing (-4 + 0.9 * 30 = 23) beats
  // consuming for ever (1 / 0.1 = 10): the same decision as the 6-period plan.
  EXPECT_NEAR(c->values[0], 23.0, 1e-7);
  r = CompareSolutions(six, *a, discounted, *c, CompareOptions{});
  EXPECT_FALSE(r.same_criterion);
  EXPECT_FALSE(r.values_comparable);
  EXPECT_EQ(r.value_changed_count, 0);
  EXPECT_EQ(r.pick_changed_count, 0);
  EXPECT_GT(r.max_abs_value_difference, 10.0);  // Reported, not counted.
}

// threads = 0 (the default) resolves by size: one thread below kAutoThreadsMinEntries
// transitions, every hardware thread from there on; the values do not depend on it (each
// state's backup is computed alone, the sup-norm reduction is exact).
TEST(SolveCriteriaTest, AutomaticThreadsFollowTheModelSize) {
  const Model small = testing::MustBuild(testing::RandomSpec(3, testing::RandomModelOptions{}));
  Result<Solution> s = Solve(small, SolveOptions{});
  ASSERT_OK(s);
  EXPECT_EQ(s->options.threads, 1);
  // A ring of 65,536 states, one action with 4 outcomes each: 262,144 transitions.
  ModelSpec ring;
  ring.name = "ring";
  ring.criterion.discount = 0.5;
  ring.InternAction("step");
  const StateId n = 1 << 16;
  for (StateId i = 0; i < n; ++i) ring.AddState("s" + std::to_string(i));
  ring.state_first_slot.assign(1, 0);
  for (StateId i = 0; i < n; ++i) {
    ring.slot_action.push_back(0);
    ring.slot_reward.push_back(i % 7);
    for (int k = 1; k <= 4; ++k) {
      ring.outcome_next.push_back((i + k) % n);
      ring.outcome_probability.push_back(0.25);
      ring.outcome_reward.push_back(0.0);
    }
    ring.slot_first_outcome.push_back(ring.num_outcomes());
    ring.state_first_slot.push_back(ring.num_slots());
  }
  const Model big = testing::MustBuild(ring);
  ASSERT_EQ(big.num_entries(), kAutoThreadsMinEntries);
  SolveOptions o;
  o.method = Method::kValueIteration;
  Result<Solution> automatic = Solve(big, o);
  ASSERT_OK(automatic);
  EXPECT_EQ(automatic->options.threads,
            static_cast<int>(std::max(1u, std::thread::hardware_concurrency())));
  o.threads = 1;
  Result<Solution> one = Solve(big, o);
  ASSERT_OK(one);
  EXPECT_EQ(one->values, automatic->values);
}

}  // namespace
}  // namespace mdp
