// Tests solver/simulate.{h,cc}: Monte Carlo rollouts against exact policy evaluation and
// closed forms (under each criterion), reproducibility by seed, visit frequencies,
// cancellation and option checks.
// Every random draw is seeded, so each test is deterministic.
#include "solver/simulate.h"

#include <gtest/gtest.h>

#include <chrono>
#include <cmath>
#include <limits>
#include <numeric>
#include <random>
#include <thread>

#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::SpecWriter;


double ExactValue(const Model& m, const Policy& policy, StateId s) {
  Result<PolicyValues> v = EvaluatePolicy(m, policy, EvaluateOptions{});
  EXPECT_OK(v);
  return v.ok() ? v->values[s] : std::nan("");
}

SimulateOptions From(StateId start, int64_t episodes, uint64_t seed) {
  SimulateOptions o;
  o.start = {{start, 1.0}};
  o.episodes = episodes;
  o.seed = seed;
  return o;
}

// (a) On seeded random models, with greedy and random stochastic policies, V^pi(start) lies
// in the reported 99% interval (widened by the truncation bias bound, here ~1e-18), and the
// interval halves when the episodes quadruple.
TEST(SimulateTest, MeanAgreesWithExactPolicyValueWithinTheInterval) {
  for (uint64_t seed = 1; seed <= 6; ++seed) {
    SCOPED_TRACE("model seed " + std::to_string(seed));
    testing::RandomModelOptions o;
    o.states = 30;
    o.discount = 0.9;
    const Model m = testing::MustBuild(testing::RandomSpec(seed, o));
    const Policy policy = seed % 2 == 0 ? testing::RandomPolicy(m, seed + 100)
                                        : GreedyPolicy(m, testing::MustSolve(m));
    const double exact = ExactValue(m, policy, 0);
    SimulateOptions options = From(0, 20000, seed * 7919);
    options.max_steps = 400;
    options.confidence = 0.99;
    Result<SimulationReport> big = Simulate(m, policy, options);
    ASSERT_OK(big);
    EXPECT_EQ(big->outcome, SimulationOutcome::kCompleted);
    EXPECT_EQ(big->episodes, 20000);
    EXPECT_LT(big->truncation_bias_bound, 1e-12);
    EXPECT_GT(big->std_dev, 0.0);
    EXPECT_GE(exact, big->ci_low - big->truncation_bias_bound) << "mean " << big->mean;
    EXPECT_LE(exact, big->ci_high + big->truncation_bias_bound) << "mean " << big->mean;

    options.episodes = 5000;
    Result<SimulationReport> small = Simulate(m, policy, options);
    ASSERT_OK(small);
    const double ratio = (small->ci_high - small->ci_low) / (big->ci_high - big->ci_low);
    EXPECT_NEAR(ratio, 2.0, 0.2);
  }
}

TEST(SimulateTest, StartDistributionMixesTheStartValues) {
  testing::RandomModelOptions o;
  o.states = 30;
  const Model m = testing::MustBuild(testing::RandomSpec(21, o));
  StateId other = 1;
  while (m.terminal(other)) ++other;
  const Policy policy = testing::RandomPolicy(m, 5);
  const double exact = 0.3 * ExactValue(m, policy, 0) + 0.7 * ExactValue(m, policy, other);
  SimulateOptions options;
  options.start = {{0, 0.3}, {other, 0.7}};
  options.episodes = 20000;
  options.confidence = 0.99;
  Result<SimulationReport> r = Simulate(m, policy, options);
  ASSERT_OK(r);
  EXPECT_GE(exact, r->ci_low);
  EXPECT_LE(exact, r->ci_high);
}

// (b) A -> B -> C -> end earning 1, 2, 3: every episode earns 1 + 2g + 3g^2 in 3 steps.
TEST(SimulateTest, DeterministicChainHasTheExactReturnAndNoSpread) {
  const double g = 0.9;
  SpecWriter w(g, Objective::kMaximize);
  w.States({"A", "B", "C", "end"}, {false, false, false, true});
  w.Action("A", "go", {{"B", 1.0}}, 1.0);
  w.Action("B", "go", {{"C", 1.0}}, 2.0);
  w.Action("C", "go", {{"end", 1.0}}, 3.0);
  const Model m = w.Build();
  const Policy policy = DeterministicPolicy(m, std::vector<RowId>{0, 1, 2, -1});
  Result<SimulationReport> r = Simulate(m, policy, From(0, 100, 1));
  ASSERT_OK(r);
  const double expected = 1.0 + g * 2.0 + g * g * 3.0;
  EXPECT_DOUBLE_EQ(r->mean, expected);
  EXPECT_EQ(r->std_dev, 0.0);
  EXPECT_EQ(r->ci_low, r->ci_high);
  EXPECT_EQ(r->min, r->max);
  for (const QuantileValue& q : r->quantiles) EXPECT_DOUBLE_EQ(q.value, expected);
  EXPECT_EQ(r->mean_length, 3.0);
  EXPECT_EQ(r->truncated_episodes, 0);
  EXPECT_EQ(r->total_steps, 300);
  EXPECT_EQ(r->visits, (std::vector<int64_t>{100, 100, 100, 0}));

  // Cut after two steps: 1 + 2g, and the bound g^2 * 3 / (1 - g) on what was missed.
  SimulateOptions cut = From(0, 100, 1);
  cut.max_steps = 2;
  Result<SimulationReport> c = Simulate(m, policy, cut);
  ASSERT_OK(c);
  EXPECT_DOUBLE_EQ(c->mean, 1.0 + g * 2.0);
  EXPECT_EQ(c->truncated_episodes, 100);
  EXPECT_DOUBLE_EQ(c->truncation_bound, g * g * 3.0 / (1.0 - g));
  EXPECT_EQ(c->truncation_bias_bound, c->truncation_bound);  // Every episode was cut.
  EXPECT_LE(std::fabs(expected - c->mean), c->truncation_bound);
}

// (b) Stay in S with probability q earning 1 per step, else end. The length L is geometric,
// P(L > t) = q^t, so E[L] = 1 / (1 - q), Var[L] = q / (1 - q)^2, and the return
// R = sum_{t < L} g^t has E[R] = sum_t g^t P(L > t) = 1 / (1 - g q). R takes the value
// (1 - g^l) / (1 - g) when L = l; with q = 0.6, P(L <= 1) = 0.4 and P(L <= 2) = 0.64, so the
// median is the two-step return 1 + g.
TEST(SimulateTest, GeometricEpisodesMatchTheirClosedForm) {
  const double g = 0.95, q = 0.6;
  SpecWriter w(g, Objective::kMaximize);
  w.States({"S", "end"}, {false, true});
  w.Action("S", "stay", {{"S", q}, {"end", 1.0 - q}}, 1.0);
  const Model m = w.Build();
  const Policy policy = DeterministicPolicy(m, std::vector<RowId>{0, -1});
  EXPECT_NEAR(ExactValue(m, policy, 0), 1.0 / (1.0 - g * q), 1e-12);
  SimulateOptions options = From(0, 40000, 2024);
  options.confidence = 0.99;
  options.quantiles = {0.5};
  Result<SimulationReport> r = Simulate(m, policy, options);
  ASSERT_OK(r);
  EXPECT_GE(1.0 / (1.0 - g * q), r->ci_low);
  EXPECT_LE(1.0 / (1.0 - g * q), r->ci_high);
  // The 99% interval is mean -/+ z std_error with z = 2.5758293035489 (normal tables).
  EXPECT_NEAR((r->ci_high - r->mean) / r->std_error, 2.5758293035489, 1e-9);
  EXPECT_NEAR(r->std_error, r->std_dev / std::sqrt(40000.0), 1e-15);
  const double length_error = std::sqrt(q / ((1 - q) * (1 - q)) / 40000.0);
  EXPECT_NEAR(r->mean_length, 1.0 / (1.0 - q), 3.3 * length_error);  // 99.9% two-sided.
  EXPECT_DOUBLE_EQ(r->quantiles[0].value, 1.0 + g);
  EXPECT_EQ(r->min, 1.0);
  EXPECT_EQ(r->truncated_episodes, 0);
}

// (c) The report is a function of the seed.
TEST(SimulateTest, SameSeedSameReportAndOtherSeedDiffers) {
  testing::RandomModelOptions o;
  o.states = 40;
  const Model m = testing::MustBuild(testing::RandomSpec(9, o));
  const Policy policy = testing::RandomPolicy(m, 9);
  Result<SimulationReport> a = Simulate(m, policy, From(0, 3000, 42));
  Result<SimulationReport> b = Simulate(m, policy, From(0, 3000, 42));
  Result<SimulationReport> c = Simulate(m, policy, From(0, 3000, 43));
  ASSERT_OK(a);
  ASSERT_OK(b);
  ASSERT_OK(c);
  EXPECT_EQ(a->mean, b->mean);
  EXPECT_EQ(a->std_dev, b->std_dev);
  EXPECT_EQ(a->min, b->min);
  EXPECT_EQ(a->max, b->max);
  for (size_t i = 0; i < a->quantiles.size(); ++i) {
    EXPECT_EQ(a->quantiles[i].value, b->quantiles[i].value);
  }
  EXPECT_EQ(a->total_steps, b->total_steps);
  EXPECT_EQ(a->truncated_episodes, b->truncated_episodes);
  EXPECT_EQ(a->visits, b->visits);
  EXPECT_NE(a->mean, c->mean);
  EXPECT_NE(a->visits, c->visits);
}

// (d) Two states, no end: from A move to B w.p. p, from B back to A w.p. r. Starting in A,
// P(S_t = A) = pi + (1 - pi) lambda^t with pi = r / (p + r) and lambda = 1 - p - r, so over T
// steps the expected share of A is [T pi + (1 - pi)(1 - lambda^T) / (1 - lambda)] / T. Each
// episode's share has variance about pi (1 - pi)(1 + lambda) / ((1 - lambda) T) (the time
// average of a two-state chain), which gives the tolerance below (5 standard errors).
TEST(SimulateTest, VisitFrequenciesMatchTheTwoStateOccupancy) {
  const double p = 0.3, r = 0.1;
  const int64_t steps = 200, episodes = 4000;
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"A", "B"}, {});
  w.Action("A", "go", {{"A", 1 - p}, {"B", p}});
  w.Action("B", "go", {{"A", r}, {"B", 1 - r}});
  const Model m = w.Build();
  const Policy policy = DeterministicPolicy(m, std::vector<RowId>{0, 1});
  SimulateOptions options = From(0, episodes, 77);
  options.max_steps = steps;
  Result<SimulationReport> rep = Simulate(m, policy, options);
  ASSERT_OK(rep);
  const double pi = r / (p + r), lambda = 1 - p - r, t = static_cast<double>(steps);
  const double expected = (t * pi + (1 - pi) * (1 - std::pow(lambda, t)) / (1 - lambda)) / t;
  const double error =
      std::sqrt(pi * (1 - pi) * (1 + lambda) / ((1 - lambda) * t) / static_cast<double>(episodes));
  EXPECT_NEAR(rep->visit_frequency[0], expected, 5 * error);
  EXPECT_GT(std::fabs(rep->visit_frequency[0] - pi), 5 * error);  // The start shows.
  EXPECT_DOUBLE_EQ(rep->visit_frequency[0] + rep->visit_frequency[1], 1.0);
  EXPECT_EQ(rep->total_steps, steps * episodes);
  EXPECT_EQ(rep->truncated_episodes, episodes);
}

// (e) Cancellation is an answer, not an error: the report covers the finished episodes.
TEST(SimulateTest, CancelFromProgressEndsWithACancelledReport) {
  testing::RandomModelOptions o;
  o.states = 40;
  const Model m = testing::MustBuild(testing::RandomSpec(4, o));
  const Policy policy = testing::RandomPolicy(m, 4);
  CancelToken cancel;
  std::vector<int64_t> seen;
  ProgressFn progress = [&](const Progress& p) {
    seen.push_back(p.iteration);
    if (p.iteration >= 30) cancel.Cancel();
  };
  Result<SimulationReport> r = Simulate(m, policy, From(0, 1000, 1), &progress, &cancel);
  ASSERT_OK(r);
  EXPECT_EQ(r->outcome, SimulationOutcome::kCancelled);
  EXPECT_EQ(r->episodes, 30);
  EXPECT_EQ(seen, (std::vector<int64_t>{10, 20, 30}));
  EXPECT_TRUE(std::isfinite(r->mean));
}

TEST(SimulateTest, CancelledBeforeTheStartRunsNothing) {
  testing::RandomModelOptions o;
  o.states = 10;
  const Model m = testing::MustBuild(testing::RandomSpec(4, o));
  CancelToken cancel;
  cancel.Cancel();
  Result<SimulationReport> r =
      Simulate(m, testing::RandomPolicy(m, 1), From(0, 1000, 1), nullptr, &cancel);
  ASSERT_OK(r);
  EXPECT_EQ(r->outcome, SimulationOutcome::kCancelled);
  EXPECT_EQ(r->episodes, 0);
  EXPECT_TRUE(std::isnan(r->mean));
  EXPECT_TRUE(std::isnan(r->ci_low));
  EXPECT_EQ(r->total_steps, 0);
}

// An episode that would take a billion steps stops soon after another thread cancels.
TEST(SimulateTest, CancelInterruptsALongEpisode) {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"loop"}, {});
  w.Action("loop", "stay", {{"loop", 1.0}}, 1.0);
  const Model m = w.Build();
  SimulateOptions options = From(0, 1, 1);
  options.max_steps = 1000000000;
  CancelToken cancel;
  std::thread canceller([cancel] {
    std::this_thread::sleep_for(std::chrono::milliseconds(20));
    cancel.Cancel();
  });
  Result<SimulationReport> r =
      Simulate(m, DeterministicPolicy(m, std::vector<RowId>{0}), options, nullptr, &cancel);
  canceller.join();
  ASSERT_OK(r);
  EXPECT_EQ(r->outcome, SimulationOutcome::kCancelled);
  EXPECT_EQ(r->episodes, 0);
  EXPECT_GT(r->total_steps, 0);
  EXPECT_LT(r->total_steps, options.max_steps);
  EXPECT_EQ(r->visits[0], r->total_steps);
}

TEST(SimulateTest, ProgressCountsEpisodesToTheEnd) {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"S", "end"}, {false, true});
  w.Action("S", "go", {{"end", 1.0}}, 1.0);
  const Model m = w.Build();
  std::vector<int64_t> seen;
  ProgressFn progress = [&](const Progress& p) {
    EXPECT_EQ(p.phase, "simulate");
    seen.push_back(p.iteration);
  };
  Result<SimulationReport> r = Simulate(m, DeterministicPolicy(m, std::vector<RowId>{0, -1}),
                                        From(0, 251, 1), &progress);
  ASSERT_OK(r);
  ASSERT_EQ(seen.size(), 126u);  // Every 2 episodes (1% of 251, rounded down), then 251.
  EXPECT_EQ(seen.front(), 2);
  EXPECT_EQ(seen.back(), 251);
}

// (f) Options that cannot be simulated are refused before any episode.
TEST(SimulateTest, BadOptionsAreInvalidArguments) {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"S", "end"}, {false, true});
  w.Action("S", "go", {{"end", 1.0}}, 1.0);
  const Model m = w.Build();
  const Policy policy = DeterministicPolicy(m, std::vector<RowId>{0, -1});
  auto code = [&](const SimulateOptions& o) { return Simulate(m, policy, o).status().code(); };
  const SimulateOptions good = From(0, 10, 1);
  ASSERT_OK(Simulate(m, policy, good));
  std::vector<std::pair<std::string, SimulateOptions>> bad;
  auto add = [&](std::string label, auto change) {
    SimulateOptions o = good;
    change(o);
    bad.emplace_back(std::move(label), std::move(o));
  };
  add("no start", [](SimulateOptions& o) { o.start.clear(); });
  add("sum 0.9", [](SimulateOptions& o) { o.start = {{0, 0.5}, {1, 0.4}}; });
  add("state 7", [](SimulateOptions& o) { o.start = {{7, 1.0}}; });
  add("negative", [](SimulateOptions& o) { o.start = {{0, 1.5}, {1, -0.5}}; });
  add("NaN probability", [](SimulateOptions& o) { o.start = {{0, std::nan("")}}; });
  add("0 episodes", [](SimulateOptions& o) { o.episodes = 0; });
  add("0 max_steps", [](SimulateOptions& o) { o.max_steps = 0; });
  add("confidence 1", [](SimulateOptions& o) { o.confidence = 1.0; });
  add("confidence 0", [](SimulateOptions& o) { o.confidence = 0.0; });
  add("quantile 1.5", [](SimulateOptions& o) { o.quantiles = {0.5, 1.5}; });
  add("quantile NaN", [](SimulateOptions& o) { o.quantiles = {std::nan("")}; });
  for (const auto& [label, options] : bad) {
    EXPECT_EQ(code(options), StatusCode::kInvalidArgument) << label;
  }
  Policy short_policy;
  short_policy.row_probability = {};
  EXPECT_EQ(Simulate(m, short_policy, good).status().code(), StatusCode::kInvalidArgument);
}

TEST(SimulateTest, StartingInATerminalStateEarnsNothing) {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"S", "end"}, {false, true});
  w.Action("S", "go", {{"end", 1.0}}, 1.0);
  const Model m = w.Build();
  Result<SimulationReport> r =
      Simulate(m, DeterministicPolicy(m, std::vector<RowId>{0, -1}), From(1, 10, 1));
  ASSERT_OK(r);
  EXPECT_EQ(r->mean, 0.0);
  EXPECT_EQ(r->total_steps, 0);
  EXPECT_EQ(r->visit_frequency, (std::vector<double>{0.0, 0.0}));
}

// ---------------------------------------------------------------------------------------
// Other criteria: the mean against closed forms derived here, inside the 99.9% interval.



void ExpectInside(const SimulationReport& r, double exact) {
  EXPECT_GE(exact, r.ci_low) << "mean " << r.mean << " +- " << r.ci_high - r.mean;
  EXPECT_LE(exact, r.ci_high) << "mean " << r.mean << " +- " << r.ci_high - r.mean;
}

// The fair walk on 0..n (goals 0 and n) earning 1 per step: the total is the expected
// duration i (n - i) (D(i) = 1 + (D(i-1) + D(i+1)) / 2, D(0) = D(n) = 0; any probability
// textbook). The spec's discount 0.5 must not be used.
Model FairWalk(int n) {
  ModelSpec spec;
  spec.criterion = testing::CriterionOf(CriterionKind::kTotal, 0.5);
  spec.action_names = {"bet"};
  for (int i = 0; i <= n; ++i) {
    spec.AddState(std::to_string(i), i == 0 || i == n);
    if (i == 0 || i == n) continue;
    spec.AddStateAction(0, 1.0);
    spec.AddOutcome(i - 1, 0.5);
    spec.AddOutcome(i + 1, 0.5);
  }
  return testing::MustBuild(spec);
}

Policy OnlyRows(const Model& m) {
  std::vector<RowId> rows(m.num_states(), -1);
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (!m.terminal(s)) rows[s] = m.row_begin(s);
  }
  return DeterministicPolicy(m, rows);
}

TEST(SimulateTest, TotalMeanIsTheFairWalkDuration) {
  const int n = 8, i = 3;
  const Model m = FairWalk(n);
  SimulateOptions options = From(i, 20000, 11);
  options.confidence = 0.999;
  Result<SimulationReport> r = Simulate(m, OnlyRows(m), options);
  ASSERT_OK(r);
  EXPECT_EQ(r->criterion, CriterionKind::kTotal);
  ExpectInside(*r, i * (n - i));
  EXPECT_EQ(r->mean, r->mean_length);  // One unit of reward per step.
  EXPECT_EQ(r->truncated_episodes, 0);
  EXPECT_EQ(r->truncation_bound, std::numeric_limits<double>::infinity());
  EXPECT_EQ(r->truncation_bias_bound, 0.0);
  // Cut short, there is no bound on what was missed.
  options.max_steps = 5;
  r = Simulate(m, OnlyRows(m), options);
  ASSERT_OK(r);
  EXPECT_GT(r->truncated_episodes, 0);
  EXPECT_EQ(r->truncation_bias_bound, std::numeric_limits<double>::infinity());
  EXPECT_LE(r->max, 5.0);
}

// A -> B -> C -> end earning 1, 2, 3 under the total criterion: every episode earns 6 whatever
// the spec's discount says.
TEST(SimulateTest, TotalReturnIsUndiscounted) {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"A", "B", "C", "end"}, {false, false, false, true});
  w.Action("A", "go", {{"B", 1.0}}, 1.0);
  w.Action("B", "go", {{"C", 1.0}}, 2.0);
  w.Action("C", "go", {{"end", 1.0}}, 3.0);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kTotal, 0.5));
  Result<SimulationReport> r = Simulate(m, OnlyRows(m), From(0, 50, 1));
  ASSERT_OK(r);
  EXPECT_EQ(r->mean, 6.0);
  EXPECT_EQ(r->std_dev, 0.0);
}

// In A the policy plays "stay" (reward 1, back to A) w.p. q and "leave" (to the terminal
// state, reward 0) w.p. 1 - q; B plays "idle" (reward 2, stays). Over H stages with discount g
// and terminal values V_H = (3, -1): V_0(A) = q (1 - (gq)^H) / (1 - gq) + (gq)^H 3 and
// V_0(B) = 2 (1 - g^H) / (1 - g) - g^H (unrolling V_t = r + g P V_{t+1}).
TEST(SimulateTest, FiniteHorizonRunsTheHorizonAndAddsTheTerminalValue) {
  const double g = 0.9, q = 0.6;
  const int64_t horizon = 7;
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"A", "B", "end"}, {false, false, true});
  w.Action("A", "stay", {{"A", 1.0}}, 1.0);
  w.Action("A", "leave", {{"end", 1.0}}, 0.0);
  w.Action("B", "idle", {{"B", 1.0}}, 2.0);
  Criterion c = testing::CriterionOf(CriterionKind::kFiniteHorizon, g, horizon);
  c.terminal_values = {3.0, -1.0, 0.0};
  const Model m = testing::WithCriterion(w, c);
  Policy p;
  p.row_probability = {q, 1.0 - q, 1.0};
  SimulateOptions options = From(0, 20000, 5);
  options.confidence = 0.999;
  options.max_steps = 2;  // Not used: the horizon decides.
  Result<SimulationReport> a = Simulate(m, p, options);
  ASSERT_OK(a);
  EXPECT_EQ(a->criterion, CriterionKind::kFiniteHorizon);
  const double gqh = std::pow(g * q, horizon);
  ExpectInside(*a, q * (1 - gqh) / (1 - g * q) + gqh * 3.0);
  EXPECT_GT(a->mean_length, 2.0);
  EXPECT_EQ(a->truncated_episodes, 0);
  EXPECT_EQ(a->truncation_bound, 0.0);
  Result<SimulationReport> b = Simulate(m, p, From(1, 10, 5));
  ASSERT_OK(b);
  const double gh = std::pow(g, horizon);
  EXPECT_NEAR(b->mean, 2.0 * (1 - gh) / (1 - g) - gh, 1e-12);
  EXPECT_EQ(b->std_dev, 0.0);
  EXPECT_EQ(b->mean_length, 7.0);
}

// The machine of finite_horizon_test.cc, H = 3, from B. Its hand-derived table has
// V*_0(B) = 4.5 with stage-dependent decisions: fix (-2, to G), run in G (4; G or B w.p. 1/2),
// then run (4 in G, 1 in B): returns 6 or 3, each w.p. 1/2. The stationary stage-0 picks (fix
// in B at every stage) earn -2 + 4 + 4 = 6 or -2 + 4 - 2 = 0: mean 3.
TEST(SimulateTest, FiniteHorizonSolutionFollowsItsStageDecisions) {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"G", "B"}, {});
  w.Action("G", "run", {{"G", 0.5, 4}, {"B", 0.5, 4}});
  w.Action("B", "run", {{"B", 1.0, 1}});
  w.Action("B", "fix", {{"G", 1.0, -2}});
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kFiniteHorizon, 1.0, 3));
  const Solution s = testing::MustSolve(m, Method::kAuto);
  SimulateOptions options = From(1, 20000, 8);
  options.confidence = 0.999;
  Result<SimulationReport> staged = Simulate(m, s, options);
  ASSERT_OK(staged);
  ExpectInside(*staged, 4.5);
  EXPECT_EQ(staged->min, 3.0);
  EXPECT_EQ(staged->max, 6.0);
  Result<SimulationReport> stationary = Simulate(m, GreedyPolicy(m, s), options);
  ASSERT_OK(stationary);
  ExpectInside(*stationary, 3.0);
  EXPECT_EQ(stationary->min, 0.0);
  // A solution without its stage table cannot be followed.
  EXPECT_EQ(Simulate(m, SolutionAtStage(m, s, 1), options).status().code(),
            StatusCode::kInvalidArgument);
}

// The two-state chain A -> B w.p. p, B -> A w.p. q, earning ra and rb. Its stationary
// distribution is (q, p) / (p + q) and its gain g = (q ra + p rb) / (p + q). From A,
// P(S_t = A) = pi_A + (1 - pi_A) lambda^t with lambda = 1 - p - q, so
// E[sum_{t<N} r_t] = N g + (ra - rb)(1 - pi_A)(1 - lambda^N) / (1 - lambda); from the stationary
// distribution every step has mean g.
TEST(SimulateTest, AverageMeanRewardPerStepEstimatesTheGain) {
  const double p = 0.3, q = 0.1, ra = 4.0, rb = -2.0;
  const int64_t steps = 200;
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"A", "B"}, {});
  w.Action("A", "go", {{"A", 1 - p}, {"B", p}}, ra);
  w.Action("B", "go", {{"A", q}, {"B", 1 - q}}, rb);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kAverage));
  const double gain = (q * ra + p * rb) / (p + q), pi_a = q / (p + q), lambda = 1 - p - q;
  SimulateOptions options = From(0, 20000, 3);
  options.max_steps = steps;
  options.confidence = 0.999;
  options.start = {{0, pi_a}, {1, 1 - pi_a}};
  Result<SimulationReport> stationary = Simulate(m, OnlyRows(m), options);
  ASSERT_OK(stationary);
  EXPECT_EQ(stationary->criterion, CriterionKind::kAverage);
  ExpectInside(*stationary, gain);
  EXPECT_EQ(stationary->truncated_episodes, 0);
  EXPECT_TRUE(std::isnan(stationary->truncation_bound));
  options.start = {{0, 1.0}};
  Result<SimulationReport> from_a = Simulate(m, OnlyRows(m), options);
  ASSERT_OK(from_a);
  const double n = static_cast<double>(steps);
  ExpectInside(*from_a,
               gain + (ra - rb) * (1 - pi_a) * (1 - std::pow(lambda, n)) / ((1 - lambda) * n));
  EXPECT_EQ(from_a->mean_length, n);
}

// A terminal state is absorbing with reward 0: earning 5 once and ending gives 5 / N per step.
TEST(SimulateTest, AverageCountsTheStepsAfterATerminalStateAsZero) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"A", "end"}, {false, true});
  w.Action("A", "finish", {{"end", 1.0}}, 5.0);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kAverage));
  SimulateOptions options = From(0, 10, 1);
  options.max_steps = 10;
  Result<SimulationReport> r = Simulate(m, OnlyRows(m), options);
  ASSERT_OK(r);
  EXPECT_EQ(r->mean, 0.5);
  EXPECT_EQ(r->mean_length, 1.0);
}

// Simulating a discounted Solution is simulating its greedy policy, draw for draw.
TEST(SimulateTest, DiscountedSolutionIsItsGreedyPolicy) {
  testing::RandomModelOptions o;
  o.states = 30;
  const Model m = testing::MustBuild(testing::RandomSpec(12, o));
  const Solution s = testing::MustSolve(m);
  Result<SimulationReport> a = Simulate(m, s, From(0, 2000, 9));
  Result<SimulationReport> b = Simulate(m, GreedyPolicy(m, s), From(0, 2000, 9));
  ASSERT_OK(a);
  ASSERT_OK(b);
  EXPECT_EQ(a->mean, b->mean);
  EXPECT_EQ(a->visits, b->visits);
  EXPECT_EQ(a->truncation_bound, b->truncation_bound);
}

// A total-criterion Solution has no decision where a goal cannot be reached w.p. 1; starting
// there is refused, while the states that reach a goal simulate normally.
TEST(SimulateTest, TotalSolutionRefusesStartsThatCannotReachAGoal) {
  SpecWriter w(0.5, Objective::kMaximize);
  w.States({"A", "end", "trap"}, {false, true, false});
  w.Action("A", "go", {{"end", 1.0}}, 2.0);
  w.Action("trap", "spin", {{"trap", 1.0}}, 0.0);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kTotal));
  Solution s;
  s.criterion = CriterionKind::kTotal;
  s.best_row = {0, -1, -1};  // By hand: A goes, trap has no proper decision.
  EXPECT_EQ(Simulate(m, s, From(2, 10, 1)).status().code(), StatusCode::kInvalidArgument);
  Result<SimulationReport> r = Simulate(m, s, From(0, 10, 1));
  ASSERT_OK(r);
  EXPECT_EQ(r->mean, 2.0);
}

}  // namespace
}  // namespace mdp
