// Tests solver/simulate.{h,cc}: Monte Carlo rollouts against exact policy evaluation and
// closed forms, reproducibility by seed, visit frequencies, cancellation and option checks.
// Every random draw is seeded, so each test is deterministic.
#include "solver/simulate.h"

#include <gtest/gtest.h>

#include <chrono>
#include <cmath>
#include <numeric>
#include <random>
#include <thread>

#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::SpecWriter;

// A seeded stochastic policy: random weights over each state's rows, about a third of them 0.
Policy RandomPolicy(const Model& m, uint64_t seed) {
  std::mt19937_64 rng(seed);
  Policy p;
  p.row_probability.assign(m.num_rows(), 0.0);
  for (StateId s = 0; s < m.num_states(); ++s) {
    double sum = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      const double w = rng() % 3 == 0 ? 0.0 : static_cast<double>(rng() % 1000 + 1);
      p.row_probability[r] = w;
      sum += w;
    }
    if (m.row_begin(s) < m.row_end(s) && sum == 0.0) p.row_probability[m.row_begin(s)] = sum = 1.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) p.row_probability[r] /= sum;
  }
  return p;
}

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
    const Policy policy = seed % 2 == 0 ? RandomPolicy(m, seed + 100)
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
  const Policy policy = RandomPolicy(m, 5);
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
  const Policy policy = RandomPolicy(m, 9);
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
  const Policy policy = RandomPolicy(m, 4);
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
      Simulate(m, RandomPolicy(m, 1), From(0, 1000, 1), nullptr, &cancel);
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

}  // namespace
}  // namespace mdp
