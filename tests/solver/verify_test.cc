// Tests solver/verify.{h,cc}: candidate value functions (residuals, worst states, bounds,
// verdict) and candidate policies (exact loss, suboptimal choices, verdict), under each
// criterion.
#include "solver/verify.h"

#include <gtest/gtest.h>

#include <cmath>
#include <limits>

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

// ---------------------------------------------------------------------------------------
// Other criteria. References with closed-form optima are written out by hand (HandReference),
// so these tests depend on no solver but the evaluation under test.



// A reference solution holding the given optimal values and optimal rows, exact (bounds 0).
Solution HandReference(const Model& m, std::vector<double> values,
                       std::vector<uint8_t> optimal_row) {
  Solution s;
  s.criterion = m.criterion().kind;
  s.options.tolerance = 1e-9;
  s.values = std::move(values);
  s.optimal_row = std::move(optimal_row);
  s.best_row.assign(m.num_states(), -1);
  for (StateId st = 0; st < m.num_states(); ++st) {
    for (RowId r = m.row_end(st) - 1; r >= m.row_begin(st); --r) {
      if (s.optimal_row[r]) s.best_row[st] = r;
    }
  }
  return s;
}

// The machine of finite_horizon_test.cc (G runs for 4 and stays good w.p. 1/2; B runs for 1
// or is fixed for -2), undiscounted, H = 3. Its hand-derived table has V*_0 = (8.25, 4.5),
// with B fixing at stage 0 but running at stage 2: the optimum depends on the stage.
// Stationary candidates, by the same recursion V_t = r + P V_{t+1} from V_3 = 0:
//   always run:  t=2 (4, 1), t=1 (6.5, 2), t=0 (8.25, 3):    loss (0, 1.5)
//   always fix:  t=2 (4, -2), t=1 (5, 2),  t=0 (7.5, 3):     loss (0.75, 1.5)
Model Machine() {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"G", "B"}, {});
  w.Action("G", "run", {{"G", 0.5, 4}, {"B", 0.5, 4}});
  w.Action("B", "run", {{"B", 1.0, 1}});
  w.Action("B", "fix", {{"G", 1.0, -2}});
  return testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kFiniteHorizon, 1.0, 3));
}

TEST(VerifyPolicyTest, FiniteHorizonStationaryCandidatesAgainstTheStageZeroOptimum) {
  const Model m = Machine();
  const Solution s = MustSolve(m, Method::kAuto);
  ASSERT_EQ(s.values, (std::vector<double>{8.25, 4.5}));  // The hand-derived table.
  VerifyOptions options;
  options.tolerance = 1.5 - 1e-9;
  Result<PolicyReport> run = VerifyPolicy(m, DeterministicPolicy(m, std::vector<RowId>{0, 1}),
                                          s, options);
  ASSERT_OK(run);
  EXPECT_EQ(run->criterion, CriterionKind::kFiniteHorizon);
  EXPECT_EQ(run->values, (std::vector<double>{8.25, 3.0}));
  EXPECT_EQ(run->losses, (std::vector<double>{0.0, 1.5}));
  EXPECT_EQ(run->evaluation_error_bound, 0.0);
  EXPECT_EQ(run->optimal_value_error_bound, 0.0);
  EXPECT_FALSE(run->pass);
  EXPECT_EQ(run->suboptimal_count, 1);  // Against the stage-0 optimal set {fix}.
  options.tolerance = 1.5 + 1e-9;
  run = VerifyPolicy(m, DeterministicPolicy(m, std::vector<RowId>{0, 1}), s, options);
  ASSERT_OK(run);
  EXPECT_TRUE(run->pass);
  Result<PolicyReport> fix = VerifyPolicy(m, DeterministicPolicy(m, std::vector<RowId>{0, 2}),
                                          s, options);
  ASSERT_OK(fix);
  EXPECT_EQ(fix->losses, (std::vector<double>{0.75, 1.5}));
  EXPECT_EQ(fix->suboptimal_count, 0);  // Fixing is optimal at stage 0, yet loses 0.75 in G.
}

TEST(VerifyValuesTest, FiniteHorizonComparesWithTheExactStageZeroValues) {
  const Model m = Machine();
  const Solution s = MustSolve(m, Method::kAuto);
  for (double delta : {0.25, -0.25}) {
    const std::vector<double> candidate = {8.25, 4.5 + delta};
    for (double tolerance : {0.25 - 1e-9, 0.25 + 1e-9}) {
      VerifyOptions options;
      options.tolerance = tolerance;
      Result<ValuesReport> with = VerifyValues(m, candidate, s, options);
      ASSERT_OK(with);
      const ValuesReport without = VerifyValues(m, candidate, options);  // Own induction.
      for (const ValuesReport* r : {static_cast<const ValuesReport*>(&*with), &without}) {
        EXPECT_EQ(r->criterion, CriterionKind::kFiniteHorizon);
        EXPECT_EQ(r->residuals, (std::vector<double>{0.0, 0.25}));
        EXPECT_EQ(r->reference_distance, 0.25);
        EXPECT_EQ(r->value_error_bound, 0.25);
        EXPECT_EQ(r->pass, tolerance > 0.25);
        EXPECT_EQ(r->worst[0].state, 1);
        EXPECT_EQ(r->worst[0].backup, 4.5);
        EXPECT_TRUE(std::isnan(r->greedy_policy_loss_bound));
      }
    }
  }
}

// One action: stay w.p. q earning 1, else end. With discount g and V_H(A) = 5, unrolling
// V_t = 1 + g q V_{t+1} gives V_0 = (1 - (gq)^H) / (1 - gq) + (gq)^H 5.
TEST(VerifyValuesTest, FiniteHorizonInductionUsesTheDiscountAndTerminalValues) {
  const double g = 0.5, q = 0.75;
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"A", "end"}, {false, true});
  w.Action("A", "stay", {{"A", q}, {"end", 1 - q}}, 1.0);
  Criterion c = testing::CriterionOf(CriterionKind::kFiniteHorizon, g, 6);
  c.terminal_values = {5.0, 0.0};
  const Model m = testing::WithCriterion(w, c);
  const double x = std::pow(g * q, 6);
  const std::vector<double> exact = {(1 - x) / (1 - g * q) + 5 * x, 0.0};
  VerifyOptions options;
  options.tolerance = 1e-12;
  const ValuesReport r = VerifyValues(m, exact, options);
  EXPECT_TRUE(r.pass) << r.reference_distance;
  EXPECT_LE(r.reference_distance, 1e-14);
}

// Average reward. A: "stay" earns 1 and stays, "go" earns 0 and moves to B; B: "stay" earns 3
// and stays, "back" earns 0 and returns to A. The best gain is 3 everywhere (go, then stay).
// A policy mixing go w.p. p in A and back w.p. q in B is the two-state chain with
// r_A = 1 - p, r_B = 3 (1 - q): gain (q r_A + p r_B) / (p + q) (stationary distribution
// (q, p) / (p + q)); p = 1/2, q = 1/4 gives (1/8 + 9/8) / (3/4) = 5/3, a loss of 4/3.
// Staying in A and going back from B: A is the only class, gain 1, a loss of 2 everywhere.
Model TwoRooms() {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"A", "B"}, {});
  w.Action("A", "stay", {{"A", 1.0}}, 1.0);
  w.Action("A", "go", {{"B", 1.0}}, 0.0);
  w.Action("B", "stay", {{"B", 1.0}}, 3.0);
  w.Action("B", "back", {{"A", 1.0}}, 0.0);
  return testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kAverage));
}

Solution OneGainReference(const Model& m, double gain, std::vector<uint8_t> optimal_row) {
  Solution s = HandReference(m, std::vector<double>(m.num_states(), 0.0), std::move(optimal_row));
  s.average.gain = s.average.gain_lower = s.average.gain_upper = gain;
  return s;
}

TEST(VerifyPolicyTest, AverageLossIsGainPerStepAndTheVerdictFlipsAtIt) {
  const Model m = TwoRooms();
  const Solution s = OneGainReference(m, 3.0, {0, 1, 1, 0});
  Result<PolicyReport> best =
      VerifyPolicy(m, DeterministicPolicy(m, std::vector<RowId>{1, 2}), s, VerifyOptions{});
  ASSERT_OK(best);
  EXPECT_TRUE(best->pass);
  EXPECT_EQ(best->criterion, CriterionKind::kAverage);
  EXPECT_NEAR(best->max_loss, 0.0, 1e-12);
  Result<PolicyReport> lazy =
      VerifyPolicy(m, DeterministicPolicy(m, std::vector<RowId>{0, 3}), s, VerifyOptions{});
  ASSERT_OK(lazy);
  EXPECT_NEAR(lazy->values[0], 1.0, 1e-12);
  EXPECT_NEAR(lazy->values[1], 1.0, 1e-12);  // B is transient and ends in A's class.
  EXPECT_NEAR(lazy->max_loss, 2.0, 1e-12);
  EXPECT_EQ(lazy->suboptimal_count, 2);
  Policy mixed;
  mixed.row_probability = {0.5, 0.5, 0.75, 0.25};
  for (double tolerance : {4.0 / 3 - 1e-6, 4.0 / 3 + 1e-6}) {
    VerifyOptions options;
    options.tolerance = tolerance;
    Result<PolicyReport> r = VerifyPolicy(m, mixed, s, options);
    ASSERT_OK(r);
    EXPECT_NEAR(r->values[0], 5.0 / 3, 1e-12);
    EXPECT_NEAR(r->max_loss, 4.0 / 3, 1e-12);
    EXPECT_LE(r->evaluation_error_bound, 1e-12);
    EXPECT_EQ(r->pass, tolerance > 4.0 / 3);
  }
}

// T chooses "left" (to the loop L earning 1) or "right" (to the loop R earning 2): the optimal
// gain is (T, L, R) = (2, 1, 2) and "left" loses 1 per step from T.
TEST(VerifyPolicyTest, AverageMultichainReferenceUsesPerStateGains) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"T", "L", "R"}, {});
  w.Action("T", "left", {{"L", 1.0}});
  w.Action("T", "right", {{"R", 1.0}});
  w.Action("L", "loop", {{"L", 1.0}}, 1.0);
  w.Action("R", "loop", {{"R", 1.0}}, 2.0);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kAverage));
  Solution s = HandReference(m, {0.0, 0.0, 0.0}, {0, 1, 1, 1});
  s.average.state_gain = {2.0, 1.0, 2.0};
  s.average.gain = 1.5;
  s.average.gain_lower = 1.0;
  s.average.gain_upper = 2.0;
  const Policy right = DeterministicPolicy(m, std::vector<RowId>{1, 2, 3});
  const Policy left = DeterministicPolicy(m, std::vector<RowId>{0, 2, 3});
  Result<PolicyReport> r = VerifyPolicy(m, right, s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_TRUE(r->pass);
  EXPECT_EQ(r->optimal_value_error_bound, 1e-9);  // Converged: options.tolerance.
  r = VerifyPolicy(m, left, s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_FALSE(r->pass);
  EXPECT_EQ(r->losses, (std::vector<double>{1.0, 0.0, 0.0}));
  EXPECT_EQ(r->worst[0].state, 0);
  // Stopped early, the per-state gains carry no bound: no verdict can pass.
  s.outcome = SolveOutcome::kIterationLimit;
  r = VerifyPolicy(m, right, s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_TRUE(std::isnan(r->optimal_value_error_bound));
  EXPECT_FALSE(r->pass);
  // Without per-state gains the single gain 1.5 is within 0.5 of every g*(s): exact policies
  // show losses of -0.5 and 0.5 and cannot be certified below 0.5 + 0.5.
  s.outcome = SolveOutcome::kConverged;
  s.average.state_gain.clear();
  VerifyOptions options;
  options.tolerance = 1.0 + 1e-9;
  r = VerifyPolicy(m, right, s, options);
  ASSERT_OK(r);
  EXPECT_EQ(r->optimal_value_error_bound, 0.5);
  EXPECT_NEAR(r->max_loss, 0.5, 1e-12);
  EXPECT_TRUE(r->pass);
  options.tolerance = 1.0 - 1e-9;
  EXPECT_FALSE(VerifyPolicy(m, right, s, options)->pass);
}

// One action per state: A moves to B w.p. p (else stays) earning ra, B returns w.p. q earning
// rb. With the exact bias (criterion_eval_test.cc: h_A - h_B = (ra - rb) / (p + q)),
// d = r + P h - h equals the gain (q ra + p rb) / (p + q) in both states. Raising h_A by delta
// changes d(A) by (1 - p) delta - delta = -p delta and d(B) by q delta: the bracket becomes
// [g - p delta, g + q delta], width (p + q) delta.
TEST(VerifyValuesTest, AverageBiasGivesTheGainBracket) {
  const double p = 0.3, q = 0.2, ra = 5.0, rb = -1.0, delta = 0.1;
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"A", "B"}, {});
  w.Action("A", "go", {{"A", 1 - p}, {"B", p}}, ra);
  w.Action("B", "back", {{"A", q}, {"B", 1 - q}}, rb);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kAverage));
  const double gain = (q * ra + p * rb) / (p + q);
  std::vector<double> h = {(ra - rb) / (p + q), 0.0};
  VerifyOptions options;
  options.tolerance = 1e-12;
  const ValuesReport exact = VerifyValues(m, h, options);
  EXPECT_EQ(exact.criterion, CriterionKind::kAverage);
  EXPECT_NEAR(exact.gain_lower, gain, 1e-13);
  EXPECT_NEAR(exact.gain_upper, gain, 1e-13);
  EXPECT_TRUE(exact.pass);
  EXPECT_TRUE(std::isnan(exact.value_error_bound));
  h[0] += delta;
  for (double tolerance : {(p + q) * delta - 1e-9, (p + q) * delta + 1e-9}) {
    options.tolerance = tolerance;
    const ValuesReport r = VerifyValues(m, h, options);
    EXPECT_NEAR(r.gain_lower, gain - p * delta, 1e-13);
    EXPECT_NEAR(r.gain_upper, gain + q * delta, 1e-13);
    EXPECT_NEAR(r.greedy_policy_loss_bound, (p + q) * delta, 1e-13);
    EXPECT_NEAR(r.max_residual, 0.5 * (p + q) * delta, 1e-13);
    EXPECT_EQ(r.pass, tolerance > (p + q) * delta);
  }
}

// A terminal state counts as absorbing with reward 0, so d = 0 there whatever its h: A earns 5
// once and ends, g* = 0 in both states, and any h with h(A) = 5 + h(end) has d(A) = 0 too.
TEST(VerifyValuesTest, AverageTerminalStateIsASelfLoopWithRewardZero) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"A", "end"}, {false, true});
  w.Action("A", "finish", {{"end", 1.0}}, 5.0);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kAverage));
  const ValuesReport shifted = VerifyValues(m, std::vector<double>{12.0, 7.0}, VerifyOptions{});
  EXPECT_TRUE(shifted.pass);
  EXPECT_EQ(shifted.gain_lower, 0.0);
  EXPECT_EQ(shifted.gain_upper, 0.0);
  const ValuesReport wrong = VerifyValues(m, std::vector<double>{12.0, 0.0}, VerifyOptions{});
  EXPECT_FALSE(wrong.pass);
  EXPECT_EQ(wrong.gain_lower, -7.0);  // d(A) = 5 + 0 - 12.
  EXPECT_EQ(wrong.gain_upper, 0.0);
}

// Total reward (maximise). The fair walk on 0..4 (goals 0 and 4), "bet" moves -/+1 w.p. 1/2 at
// reward -1: its total is minus the expected duration, -i (4 - i) = (0, -3, -4, -3, 0)
// (D(i) = 1 + (D(i-1) + D(i+1)) / 2, D(0) = D(4) = 0). Extras: in 1 "pay" ends at once for
// -5 (worse than -3); in 2 "wait" stays for 0 (q = V(2): tied, but waiting for ever never
// ends); in 3 "risk" earns 100 but falls into "trap" (a loop that never ends) w.p. 1/2: an
// unsafe row. So V* = bet everywhere, trap cannot reach a goal (value NaN).
// Paying in 1: V(1) = -5, V(3) = -1 + V(2) / 2, V(2) = -1 + (V(1) + V(3)) / 2 gives
// V(2) = -16/3, V(3) = -11/3: losses (2, 4/3, 2/3) in 1, 2, 3.
// Waiting in 2 w.p. 1/2 adds only zero-reward steps: the same totals, loss 0.
Model RiskyWalk() {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"0", "1", "2", "3", "4", "trap"}, {true, false, false, false, true, false});
  w.Action("1", "bet", {{"0", 0.5}, {"2", 0.5}}, -1.0);
  w.Action("1", "pay", {{"0", 1.0}}, -5.0);
  w.Action("2", "bet", {{"1", 0.5}, {"3", 0.5}}, -1.0);
  w.Action("2", "wait", {{"2", 1.0}}, 0.0);
  w.Action("3", "bet", {{"2", 0.5}, {"4", 0.5}}, -1.0);
  w.Action("3", "risk", {{"trap", 0.5}, {"4", 0.5}}, 100.0);
  w.Action("trap", "spin", {{"trap", 1.0}}, 0.0);
  return testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kTotal));
}

Solution RiskyWalkReference(const Model& m) {
  Solution s = HandReference(m, {0, -3, -4, -3, 0, std::nan("")}, {1, 0, 1, 1, 1, 0, 0});
  s.total.reaches_goal = {1, 1, 1, 1, 1, 0};
  return s;
}

TEST(VerifyPolicyTest, TotalImproperCandidatesHaveInfiniteLoss) {
  const Model m = RiskyWalk();
  const Solution s = RiskyWalkReference(m);
  // Rows: 1 bet, 1 pay, 2 bet, 2 wait, 3 bet, 3 risk, trap spin.
  const Policy bet = DeterministicPolicy(m, std::vector<RowId>{-1, 0, 2, 4, -1, 6});
  Result<PolicyReport> r = VerifyPolicy(m, bet, s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_EQ(r->criterion, CriterionKind::kTotal);
  EXPECT_TRUE(r->pass);
  EXPECT_NEAR(r->values[2], -4.0, 1e-12);
  EXPECT_EQ(r->improper_count, 0);  // The trap is improper for every policy: not counted.
  EXPECT_EQ(r->losses[5], 0.0);

  const Policy wait = DeterministicPolicy(m, std::vector<RowId>{-1, 0, 3, 4, -1, 6});
  r = VerifyPolicy(m, wait, s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_FALSE(r->pass);
  EXPECT_EQ(r->max_loss, std::numeric_limits<double>::infinity());
  EXPECT_EQ(r->improper_states, (std::vector<StateId>{1, 2, 3}));
  EXPECT_EQ(r->improper_count, 3);
  EXPECT_TRUE(std::isnan(r->values[1]));

  Policy half_risk = bet;
  half_risk.row_probability[4] = half_risk.row_probability[5] = 0.5;
  r = VerifyPolicy(m, half_risk, s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_EQ(r->improper_states, (std::vector<StateId>{1, 2, 3}));

  Policy lazy = bet;
  lazy.row_probability[2] = lazy.row_probability[3] = 0.5;
  r = VerifyPolicy(m, lazy, s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_TRUE(r->pass);
  EXPECT_NEAR(r->max_loss, 0.0, 1e-12);
}

TEST(VerifyPolicyTest, TotalVerdictFlipsAtTheLossOfAProperPolicy) {
  const Model m = RiskyWalk();
  const Solution s = RiskyWalkReference(m);
  const Policy pay = DeterministicPolicy(m, std::vector<RowId>{-1, 1, 2, 4, -1, 6});
  for (double tolerance : {2.0 - 1e-9, 2.0 + 1e-9}) {
    VerifyOptions options;
    options.tolerance = tolerance;
    Result<PolicyReport> r = VerifyPolicy(m, pay, s, options);
    ASSERT_OK(r);
    EXPECT_NEAR(r->losses[1], 2.0, 1e-12);
    EXPECT_NEAR(r->losses[2], 4.0 / 3, 1e-12);
    EXPECT_NEAR(r->losses[3], 2.0 / 3, 1e-12);
    EXPECT_EQ(r->pass, tolerance > 2.0);
    ASSERT_EQ(r->suboptimal.size(), 1u);
    EXPECT_EQ(r->suboptimal[0].state, 1);
  }
}

// With V* as candidate every safe backup reproduces it (in 2, bet and wait tie at -4); the
// unsafe "risk" must be ignored, or the arbitrary 1000 written for the trap would show.
// Raising V(2) by delta: the residual is delta / 2 in 1 and 3 (each bets on 2 with
// probability 1/2) but 0 in 2, where waiting backs up to V(2) whatever it is, while the
// distance to V* is delta: why a residual alone bounds nothing under this criterion.
TEST(VerifyValuesTest, TotalUsesSafeRowsAndTheReferenceForItsBound) {
  const Model m = RiskyWalk();
  const Solution s = RiskyWalkReference(m);
  std::vector<double> v = {0, -3, -4, -3, 0, 1000};
  Result<ValuesReport> exact = VerifyValues(m, v, s, VerifyOptions{});
  ASSERT_OK(exact);
  EXPECT_TRUE(exact->pass);
  EXPECT_EQ(exact->criterion, CriterionKind::kTotal);
  EXPECT_EQ(exact->max_residual, 0.0);
  EXPECT_EQ(exact->states_not_reaching_goal, 1);
  EXPECT_TRUE(std::isnan(exact->residuals[5]));
  const double delta = 0.5;
  v[2] += delta;
  for (double tolerance : {delta - 1e-9, delta + 1e-9}) {
    VerifyOptions options;
    options.tolerance = tolerance;
    Result<ValuesReport> r = VerifyValues(m, v, s, options);
    ASSERT_OK(r);
    EXPECT_EQ(r->residuals[1], delta / 2);
    EXPECT_EQ(r->residuals[2], 0.0);
    EXPECT_EQ(r->residuals[3], delta / 2);
    EXPECT_EQ(r->max_residual, delta / 2);
    EXPECT_EQ(r->reference_distance, delta);
    EXPECT_EQ(r->value_error_bound, delta);
    EXPECT_EQ(r->pass, tolerance > delta);
    EXPECT_EQ(r->worst[0].residual, delta / 2);
  }
  // Without a reference the same residuals, from its own goal-reaching analysis, but no bound.
  const ValuesReport alone = VerifyValues(m, v, VerifyOptions{});
  EXPECT_EQ(alone.states_not_reaching_goal, 1);
  EXPECT_EQ(alone.residuals[1], delta / 2);
  EXPECT_TRUE(std::isnan(alone.residuals[5]));
  EXPECT_TRUE(std::isnan(alone.value_error_bound));
  EXPECT_FALSE(alone.pass);
}

// A null (NaN) value is right only where no goal is reachable: state 5 of the walk.
TEST(VerifyValuesTest, TotalMissingValueWhereAGoalIsReachableFails) {
  const Model m = RiskyWalk();
  const Solution s = RiskyWalkReference(m);
  const double nan = std::numeric_limits<double>::quiet_NaN();
  std::vector<double> v = {0, -3, -4, -3, 0, nan};
  Result<ValuesReport> fine = VerifyValues(m, v, s, VerifyOptions{});
  ASSERT_OK(fine);
  EXPECT_TRUE(fine->pass);
  v[2] = nan;
  Result<ValuesReport> r = VerifyValues(m, v, s, VerifyOptions{});
  ASSERT_OK(r);
  EXPECT_FALSE(r->pass);
  EXPECT_TRUE(std::isinf(r->reference_distance));
  EXPECT_TRUE(std::isinf(r->residuals[2]));
  ASSERT_FALSE(r->worst.empty());
  EXPECT_EQ(r->worst[0].state, 2);
}

TEST(VerifyPolicyTest, ReferenceOfAnotherCriterionIsRefused) {
  const Model m = TwoRooms();
  Solution discounted = HandReference(m, {0.0, 0.0}, {0, 1, 1, 0});
  discounted.criterion = CriterionKind::kDiscounted;
  const Policy p = DeterministicPolicy(m, std::vector<RowId>{1, 2});
  EXPECT_EQ(VerifyPolicy(m, p, discounted, VerifyOptions{}).status().code(),
            StatusCode::kInvalidArgument);
  EXPECT_EQ(VerifyValues(m, std::vector<double>{0.0, 0.0}, discounted, VerifyOptions{})
                .status()
                .code(),
            StatusCode::kInvalidArgument);
}

}  // namespace
}  // namespace mdp
