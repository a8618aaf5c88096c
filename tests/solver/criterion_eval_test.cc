// Tests solver/criterion_eval.{h,cc}: exact policy evaluation under each criterion. Every
// expected number comes from outside the project: closed forms derived in the comments here,
// and independent dense computations with Eigen (matrix powers, the deviation matrix, limiting
// matrices by repeated squaring: methods the evaluator does not use).
#include "solver/criterion_eval.h"

#include <gtest/gtest.h>

#include <Eigen/Dense>
#include <chrono>
#include <cmath>
#include <numeric>
#include <random>
#include <string>
#include <vector>

#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::SpecWriter;



CriterionValues MustEvaluate(const Model& m, const Policy& p, const EvaluateOptions& o = {}) {
  Result<CriterionValues> v = EvaluateUnderCriterion(m, p, o);
  EXPECT_TRUE(v.ok()) << v.status().ToString();
  return v.ok() ? std::move(*v) : CriterionValues();
}


// Dense P_pi and r_pi written out here from the model's rows (terminal rows stay 0 unless
// `terminal_loops`).
void DenseChain(const Model& m, const Policy& p, bool terminal_loops, Eigen::MatrixXd& big_p,
                Eigen::VectorXd& r) {
  const int n = m.num_states();
  big_p = Eigen::MatrixXd::Zero(n, n);
  r = Eigen::VectorXd::Zero(n);
  for (StateId s = 0; s < n; ++s) {
    if (m.terminal(s) && terminal_loops) big_p(s, s) = 1.0;
    for (RowId row = m.row_begin(s); row < m.row_end(s); ++row) {
      r[s] += p.row_probability[row] * m.row_reward(row);
      for (int64_t e = m.entry_begin(row); e < m.entry_end(row); ++e) {
        big_p(s, m.entry_next(e)) += p.row_probability[row] * m.entry_probability(e);
      }
    }
  }
}

// ---------------------------------------------------------------------------------------
// Finite horizon.

// In A the policy plays "stay" (reward 1, back to A) w.p. q and "leave" (reward 0, to the
// terminal state) w.p. 1 - q; B plays "idle" (reward 2, stays). With V_t = r + g P V_{t+1}:
//   V_t(B) = 2 + g V_{t+1}(B)      =>  V_0(B) = 2 (1 - g^H) / (1 - g) + g^H V_H(B),
//   V_t(A) = q + g q V_{t+1}(A)    =>  V_0(A) = q (1 - (gq)^H) / (1 - gq) + (gq)^H V_H(A)
// (unrolling H times: geometric sums with ratios g and g q).
TEST(CriterionEvalTest, FiniteHorizonStochasticPolicyIsAGeometricSum) {
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
  const CriterionValues v = MustEvaluate(m, p);
  const double gh = std::pow(g, horizon), gqh = std::pow(g * q, horizon);
  EXPECT_NEAR(v.values[0], q * (1 - gqh) / (1 - g * q) + gqh * 3.0, 1e-13);
  EXPECT_NEAR(v.values[1], 2.0 * (1 - gh) / (1 - g) - gh, 1e-13);
  EXPECT_EQ(v.values[2], 0.0);
  EXPECT_EQ(v.criterion, CriterionKind::kFiniteHorizon);
  EXPECT_EQ(v.value_error_bound, 0.0);
}

// For g < 1, sum_{t<H} (gP)^t = (I - gP)^-1 (I - (gP)^H), so
// V_0 = (I - gP)^-1 (I - (gP)^H) r + (gP)^H V_H: a dense solve, not a stage-by-stage recursion.
TEST(CriterionEvalTest, FiniteHorizonMatchesTheDenseClosedForm) {
  for (uint64_t seed = 1; seed <= 4; ++seed) {
    testing::RandomModelOptions o;
    o.states = 25;
    ModelSpec spec = testing::RandomSpec(seed, o);
    spec.criterion = testing::CriterionOf(CriterionKind::kFiniteHorizon, 0.8, 12);
    std::mt19937_64 rng(seed);
    spec.criterion.terminal_values.assign(spec.num_states(), 0.0);
    for (StateId s = 0; s < spec.num_states(); ++s) {
      if (!spec.terminal[s]) spec.criterion.terminal_values[s] = static_cast<double>(rng() % 7);
    }
    const Model m = testing::MustBuild(spec);
    const Policy p = testing::RandomPolicy(m, seed + 10);
    Eigen::MatrixXd big_p;
    Eigen::VectorXd r;
    DenseChain(m, p, false, big_p, r);
    const int n = m.num_states();
    const Eigen::MatrixXd gp = 0.8 * big_p;
    Eigen::MatrixXd power = Eigen::MatrixXd::Identity(n, n);
    for (int t = 0; t < 12; ++t) power = power * gp;
    const Eigen::VectorXd vh = Eigen::Map<const Eigen::VectorXd>(
        spec.criterion.terminal_values.data(), n);
    const Eigen::MatrixXd id = Eigen::MatrixXd::Identity(n, n);
    const Eigen::VectorXd expected =
        (id - gp).partialPivLu().solve((id - power) * r) + power * vh;
    const CriterionValues v = MustEvaluate(m, p);
    for (StateId s = 0; s < n; ++s) EXPECT_NEAR(v.values[s], expected[s], 1e-10) << s;
  }
}

// ---------------------------------------------------------------------------------------
// Average reward.

// A two-state chain: A moves to B w.p. p (the policy mixes "go" w.p. p with "stay"), B moves
// back w.p. q. The stationary distribution solves mu_A p = mu_B q: (q, p) / (p + q), so the
// gain is (q r_A + p r_B) / (p + q) in both states. Bias: g + h_A = r_A + (1 - p) h_A + p h_B
// gives h_A - h_B = (r_A - g) / p = (r_A - r_B) / (p + q); with mu h = 0,
// h_A = p (r_A - r_B) / (p + q)^2 and h_B = -q (r_A - r_B) / (p + q)^2.
TEST(CriterionEvalTest, AverageTwoStateChainHasTheStationaryGainAndBias) {
  const double p = 0.3, q = 0.2, ra = 5.0, rb = -1.0;
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"A", "B"}, {});
  w.Action("A", "stay", {{"A", 1.0}}, ra);
  w.Action("A", "go", {{"B", 1.0}}, ra);
  w.Action("B", "back", {{"A", q}, {"B", 1.0 - q}}, rb);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kAverage));
  Policy pol;
  pol.row_probability = {1.0 - p, p, 1.0};
  const CriterionValues v = MustEvaluate(m, pol);
  const double gain = (q * ra + p * rb) / (p + q);
  ASSERT_EQ(v.gains.size(), 2u);
  EXPECT_NEAR(v.gains[0], gain, 1e-12);
  EXPECT_NEAR(v.gains[1], gain, 1e-12);
  EXPECT_NEAR(v.values[0], p * (ra - rb) / ((p + q) * (p + q)), 1e-12);
  EXPECT_NEAR(v.values[1], -q * (ra - rb) / ((p + q) * (p + q)), 1e-12);
  EXPECT_EQ(v.recurrent_classes, (std::vector<std::vector<StateId>>{{0, 1}}));
  EXPECT_LE(v.gain_error_bound, 1e-12);
  EXPECT_TRUE(std::isnan(v.value_error_bound));
}

// Multichain: L and R are absorbing loops earning a and b per step, E is terminal (gain 0),
// and T (reward c) moves to L w.p. al, to R w.p. be, to E w.p. ep, else stays. The gains are
// g(L) = a, g(R) = b, g(E) = 0 and, by absorption probabilities al, be, ep over (al + be + ep),
// g(T) = (al a + be b) / (al + be + ep). The singleton classes have h = 0 (mu h = 0), and
// g(T) + h(T) = c + (1 - al - be - ep) h(T) gives h(T) = (c - g(T)) / (al + be + ep).
TEST(CriterionEvalTest, AverageMultichainGainsFollowTheAbsorptionProbabilities) {
  const double a = 2.0, b = 7.0, c = -3.0, al = 0.1, be = 0.3, ep = 0.2;
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"T", "L", "R", "E"}, {false, false, false, true});
  w.Action("T", "drift", {{"L", al}, {"R", be}, {"E", ep}, {"T", 1 - al - be - ep}}, c);
  w.Action("L", "loop", {{"L", 1.0}}, a);
  w.Action("R", "loop", {{"R", 1.0}}, b);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kAverage));
  const CriterionValues v =
      MustEvaluate(m, DeterministicPolicy(m, std::vector<RowId>{0, 1, 2, -1}));
  const double gt = (al * a + be * b) / (al + be + ep);
  EXPECT_NEAR(v.gains[0], gt, 1e-13);
  EXPECT_EQ(v.gains[1], a);
  EXPECT_EQ(v.gains[2], b);
  EXPECT_EQ(v.gains[3], 0.0);
  EXPECT_NEAR(v.values[0], (c - gt) / (al + be + ep), 1e-12);
  EXPECT_EQ(v.values[1], 0.0);
  EXPECT_EQ(v.recurrent_classes, (std::vector<std::vector<StateId>>{{1}, {2}, {3}}));
  EXPECT_LE(v.gain_error_bound, 1e-12);
}

// Against the deviation matrix (Puterman 1994, Markov Decision Processes, sec. 8.2 and
// appendix A, from memory): P* = lim ((I + P) / 2)^n (the lazy chain is aperiodic and has the
// same limiting matrix), computed here by 60 squarings, each row rescaled to sum 1 (else
// rounding in the row sums would grow like (1 + u)^(2^60)); g = P* r and the bias
// h = (I - P + P*)^-1 (I - P*) r, which satisfies (I - P) h = r - g and P* h = 0. Random
// models with terminal states make multichain policies.
TEST(CriterionEvalTest, AverageMatchesTheDenseDeviationMatrix) {
  for (uint64_t seed = 1; seed <= 6; ++seed) {
    SCOPED_TRACE("seed " + std::to_string(seed));
    testing::RandomModelOptions o;
    o.states = 30;
    o.terminal_fraction = seed % 2 == 0 ? 0.0 : 0.1;
    ModelSpec spec = testing::RandomSpec(seed, o);
    spec.criterion = testing::CriterionOf(CriterionKind::kAverage);
    const Model m = testing::MustBuild(spec);
    const Policy p = testing::RandomPolicy(m, seed + 30);
    Eigen::MatrixXd big_p;
    Eigen::VectorXd r;
    DenseChain(m, p, true, big_p, r);
    const int n = m.num_states();
    const Eigen::MatrixXd id = Eigen::MatrixXd::Identity(n, n);
    Eigen::MatrixXd limit = 0.5 * (id + big_p);
    for (int k = 0; k < 60; ++k) {
      limit = limit * limit;
      for (int i = 0; i < n; ++i) limit.row(i) /= limit.row(i).sum();
    }
    const Eigen::VectorXd g = limit * r;
    const Eigen::VectorXd h = (id - big_p + limit).partialPivLu().solve((id - limit) * r);
    const CriterionValues v = MustEvaluate(m, p);
    for (StateId s = 0; s < n; ++s) {
      EXPECT_NEAR(v.gains[s], g[s], 1e-9) << s;
      EXPECT_NEAR(v.values[s], h[s], 1e-8) << s;
    }
    EXPECT_LE(v.gain_error_bound, 1e-9);
  }
}

// Each state s moves to perm_j(s) w.p. 1/k for k random permutations: P is doubly stochastic,
// so every strongly connected component is closed and the uniform distribution on it is
// stationary (each column of P_C sums to 1). A class's gain is therefore the mean reward over
// the class, whatever the graph looks like. 100000 states exercise the large-system path.
TEST(CriterionEvalTest, AverageLargeDoublyStochasticChainHasClassMeanGains) {
  const StateId n = 100000;
  const int k = 3;
  std::mt19937_64 rng(5);
  std::vector<std::vector<StateId>> perms(k, std::vector<StateId>(n));
  for (auto& perm : perms) {
    std::iota(perm.begin(), perm.end(), 0);
    std::shuffle(perm.begin(), perm.end(), rng);
  }
  ModelSpec spec;
  spec.criterion = testing::CriterionOf(CriterionKind::kAverage);
  spec.action_names = {"go"};
  for (StateId s = 0; s < n; ++s) {
    spec.AddState("s" + std::to_string(s));
    spec.AddStateAction(0, static_cast<double>(s % 10));
    for (int j = 0; j < k; ++j) spec.AddOutcome(perms[j][s], 1.0 / k);
  }
  const Model m = testing::MustBuild(spec);
  const std::vector<RowId> rows = [&] {
    std::vector<RowId> out(n);
    std::iota(out.begin(), out.end(), 0);
    return out;
  }();
  const auto start = std::chrono::steady_clock::now();
  const CriterionValues v = MustEvaluate(m, DeterministicPolicy(m, rows));
  const double seconds =
      std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  EXPECT_LT(seconds, 60.0);
  int64_t covered = 0;
  for (const std::vector<StateId>& cls : v.recurrent_classes) {
    double mean = 0.0;
    for (StateId s : cls) mean += static_cast<double>(s % 10);
    mean /= static_cast<double>(cls.size());
    for (StateId s : cls) ASSERT_NEAR(v.gains[s], mean, 1e-8) << s;
    covered += static_cast<int64_t>(cls.size());
  }
  EXPECT_EQ(covered, n);  // No transient states in a doubly stochastic chain.
  EXPECT_LE(v.gain_error_bound, 1e-8);
}

// A ring of 100000 states: each moves on w.p. 1/2 and stays otherwise (doubly stochastic,
// one class, uniform stationary distribution), with reward 1 on even states: gain 1/2. A tail
// of 50000 transient states walks into the ring the same way, so their gain is 1/2 too.
TEST(CriterionEvalTest, AverageLargeRingWithATransientTail) {
  const StateId ring = 100000, tail = 50000;
  ModelSpec spec;
  spec.criterion = testing::CriterionOf(CriterionKind::kAverage);
  spec.action_names = {"walk"};
  for (StateId s = 0; s < ring + tail; ++s) {
    spec.AddState("s" + std::to_string(s));
    const StateId next = s < ring ? (s + 1) % ring : (s + 1 == ring + tail ? 0 : s + 1);
    spec.AddStateAction(0, s % 2 == 0 ? 1.0 : 0.0);
    spec.AddOutcome(s, 0.5);
    spec.AddOutcome(next, 0.5);
  }
  const Model m = testing::MustBuild(spec);
  std::vector<RowId> rows(ring + tail);
  std::iota(rows.begin(), rows.end(), 0);
  const CriterionValues v = MustEvaluate(m, DeterministicPolicy(m, rows));
  ASSERT_EQ(v.recurrent_classes.size(), 1u);
  EXPECT_EQ(v.recurrent_classes[0].size(), static_cast<size_t>(ring));
  for (StateId s = 0; s < ring + tail; s += 997) EXPECT_NEAR(v.gains[s], 0.5, 1e-9) << s;
  EXPECT_LE(v.gain_error_bound, 1e-8);
}

// ---------------------------------------------------------------------------------------
// Total reward.

// The fair walk on 0..n (0 and n goals), one step of reward 1 per move: the total is the
// expected duration D(i) = i (n - i) (D(i) = 1 + (D(i-1) + D(i+1)) / 2 with D(0) = D(n) = 0;
// any probability textbook, checked by substitution). State `x` also has "wait" (reward 0, stay).
// Waiting w.p. 1/2 at x adds no reward but one expected wait per visit: the expected steps
// become i (n - i) + G(i, x), G the fair walk's expected visits to x,
// G(i, x) = 2 min(i, x) (n - max(i, x)) / n (hit x w.p. i / x from i <= x, then return w.p.
// 1 - n / (2 x (n - x)) each time; symmetric above x).
// Two more states: "door" moves to a goal or to "trap" w.p. 1/2 each, "trap" loops for ever.
Model FairWalk(int n, int x) {
  ModelSpec spec;
  spec.criterion = testing::CriterionOf(CriterionKind::kTotal, 0.5);  // The discount must not be used.
  spec.action_names = {"bet", "wait", "open", "spin"};
  for (int i = 0; i <= n; ++i) {
    spec.AddState(std::to_string(i), i == 0 || i == n);
    if (i == 0 || i == n) continue;
    spec.AddStateAction(0, 1.0);
    spec.AddOutcome(i - 1, 0.5);
    spec.AddOutcome(i + 1, 0.5);
    if (i == x) {
      spec.AddStateAction(1, 0.0);
      spec.AddOutcome(i, 1.0);
    }
  }
  spec.AddState("door");
  spec.AddStateAction(2, 4.0);
  spec.AddOutcome(0, 0.5);
  spec.AddOutcome(n + 2, 0.5);
  spec.AddState("trap");
  spec.AddStateAction(3, 1.0);
  spec.AddOutcome(n + 2, 1.0);
  return testing::MustBuild(spec);
}

Policy WalkPolicy(const Model& m, int x, double wait) {
  Policy p;
  p.row_probability.assign(m.num_rows(), 0.0);
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (m.terminal(s)) continue;
    const bool at_x = m.state_name(s) == std::to_string(x);
    p.row_probability[m.row_begin(s)] = at_x ? 1.0 - wait : 1.0;
    if (at_x) p.row_probability[m.row_begin(s) + 1] = wait;
  }
  return p;
}

TEST(CriterionEvalTest, TotalFairWalkDurationAndImproperStates) {
  const int n = 10, x = 3;
  const Model m = FairWalk(n, x);
  const CriterionValues v = MustEvaluate(m, WalkPolicy(m, x, 0.5));
  for (int i = 0; i <= n; ++i) {
    EXPECT_NEAR(v.values[i], i * (n - i), 1e-11) << i;
    const double visits = 2.0 * std::min(i, x) * (n - std::max(i, x)) / n;
    EXPECT_NEAR(v.expected_steps[i], i * (n - i) + visits, 1e-11) << i;
    EXPECT_EQ(v.proper[i], 1) << i;
  }
  // door and trap: from door the trap (a closed class without goals) is entered w.p. 1/2.
  EXPECT_EQ(v.improper_states, (std::vector<StateId>{n + 1, n + 2}));
  EXPECT_TRUE(std::isnan(v.values[n + 1]));
  EXPECT_TRUE(std::isnan(v.expected_steps[n + 2]));
  EXPECT_LE(v.value_error_bound, 1e-9);
  EXPECT_EQ(v.criterion, CriterionKind::kTotal);
}

// Always waiting at x makes {x} a closed class without goals, and every interior state of
// the walk reaches x with positive probability: all are improper, the goals stay proper.
TEST(CriterionEvalTest, TotalPolicyThatLoopsForeverIsImproper) {
  const int n = 6, x = 2;
  const Model m = FairWalk(n, x);
  const CriterionValues v = MustEvaluate(m, WalkPolicy(m, x, 1.0));
  EXPECT_EQ(v.improper_states, (std::vector<StateId>{1, 2, 3, 4, 5, n + 1, n + 2}));
  EXPECT_EQ(v.proper[0], 1);
  EXPECT_EQ(v.proper[n], 1);
  EXPECT_EQ(v.values[0], 0.0);
  for (int i = 1; i < n; ++i) EXPECT_TRUE(std::isnan(v.values[i])) << i;
}

// A long line to a goal: from i < n move to i + 1 w.p. 1/2, else stay (reward 1 per step).
// Each move takes 2 steps on average, so V(i) = N(i) = 2 (n - i).
TEST(CriterionEvalTest, TotalLongLineHasLinearExpectedSteps) {
  const StateId n = 100000;
  ModelSpec spec;
  spec.criterion = testing::CriterionOf(CriterionKind::kTotal);
  spec.action_names = {"step"};
  for (StateId i = 0; i <= n; ++i) {
    spec.AddState("s" + std::to_string(i), i == n);
    if (i == n) continue;
    spec.AddStateAction(0, 1.0);
    spec.AddOutcome(i, 0.5);
    spec.AddOutcome(i + 1, 0.5);
  }
  const Model m = testing::MustBuild(spec);
  std::vector<RowId> rows(n + 1, -1);
  std::iota(rows.begin(), rows.begin() + n, 0);
  const CriterionValues v = MustEvaluate(m, DeterministicPolicy(m, rows));
  for (StateId i = 0; i <= n; i += 999) {
    EXPECT_NEAR(v.values[i], 2.0 * (n - i), 1e-6 * n) << i;
    EXPECT_NEAR(v.expected_steps[i], 2.0 * (n - i), 1e-6 * n) << i;
  }
  EXPECT_TRUE(v.improper_states.empty());
  EXPECT_LT(v.value_error_bound, 1e-3);
}

// ---------------------------------------------------------------------------------------
// Discounted: delegated to EvaluatePolicy. "stay" earns 1 for ever: 1 / (1 - g).
TEST(CriterionEvalTest, DiscountedIsTheGeometricSeries) {
  SpecWriter w(0.75, Objective::kMaximize);
  w.States({"here"}, {false});
  w.Action("here", "stay", {{"here", 1.0}}, 1.0);
  const Model m = w.Build();
  const CriterionValues v = MustEvaluate(m, DeterministicPolicy(m, std::vector<RowId>{0}));
  EXPECT_EQ(v.criterion, CriterionKind::kDiscounted);
  EXPECT_NEAR(v.values[0], 4.0, 1e-12);
  EXPECT_TRUE(v.gains.empty());
  EXPECT_TRUE(v.proper.empty());
}

TEST(CriterionEvalTest, MalformedPolicyIsAnInvalidArgument) {
  SpecWriter w(0.75, Objective::kMaximize);
  w.States({"here"}, {false});
  w.Action("here", "stay", {{"here", 1.0}}, 1.0);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kAverage));
  Policy p;
  p.row_probability = {0.5};
  EXPECT_EQ(EvaluateUnderCriterion(m, p).status().code(), StatusCode::kInvalidArgument);
}

TEST(CriterionEvalTest, CancelledFiniteHorizonEvaluationSaysSo) {
  SpecWriter w(0.75, Objective::kMaximize);
  w.States({"here"}, {false});
  w.Action("here", "stay", {{"here", 1.0}}, 1.0);
  const Model m = testing::WithCriterion(w, testing::CriterionOf(CriterionKind::kFiniteHorizon, 1.0, 1000));
  CancelToken cancel;
  cancel.Cancel();
  EXPECT_EQ(EvaluateUnderCriterion(m, DeterministicPolicy(m, std::vector<RowId>{0}), {}, &cancel)
                .status()
                .code(),
            StatusCode::kCancelled);
}

}  // namespace
}  // namespace mdp
