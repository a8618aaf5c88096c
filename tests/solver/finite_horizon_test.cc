// Tests solver/finite_horizon.{h,cc}: backward induction against a table derived by hand,
// terminal values, stage-dependent decisions and ties, minimisation, and convergence to the
// discounted infinite-horizon values as the horizon grows.
#include "solver/finite_horizon.h"

#include <gtest/gtest.h>

#include <cmath>

#include "solver/solver.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::SpecWriter;

// A machine, good (G) or bad (B). In G "run" earns 4 and stays good w.p. 0.5. In B "run" earns
// 1 and stays bad; "fix" costs 2 and makes it good. Undiscounted, H = 3, V_3 = 0. By hand:
//   t = 2: V(G) = 4;                          V(B) = max(1 + 0, -2 + 0) = 1 (run)
//   t = 1: V(G) = 4 + 0.5*4 + 0.5*1 = 6.5;    V(B) = max(1 + 1, -2 + 4) = 2 (run and fix tie)
//   t = 0: V(G) = 4 + 0.5*6.5 + 0.5*2 = 8.25; V(B) = max(1 + 2, -2 + 6.5) = 4.5 (fix)
Model Machine(Objective objective = Objective::kMaximize, double sign = 1.0) {
  SpecWriter w(0.5, objective);  // The model's own discount is not used here.
  w.States({"G", "B"}, {});
  w.Action("G", "run", {{"G", 0.5, 4 * sign}, {"B", 0.5, 4 * sign}});
  w.Action("B", "run", {{"B", 1.0, 1 * sign}});
  w.Action("B", "fix", {{"G", 1.0, -2 * sign}});
  return w.Build();
}

FiniteHorizonSolution MustInduct(const Model& m, FiniteHorizonOptions o) {
  Result<FiniteHorizonSolution> s = BackwardInduction(m, o);
  EXPECT_TRUE(s.ok()) << s.status().ToString();
  return std::move(*s);
}

TEST(FiniteHorizonTest, MatchesTheHandDerivedTable) {
  const Model m = Machine();
  FiniteHorizonOptions o;
  o.horizon = 3;
  const FiniteHorizonSolution s = MustInduct(m, o);
  const double expected[4][2] = {{8.25, 4.5}, {6.5, 2.0}, {4.0, 1.0}, {0.0, 0.0}};
  for (int t = 0; t <= 3; ++t) {
    EXPECT_DOUBLE_EQ(s.value(t, 0), expected[t][0]) << "stage " << t;
    EXPECT_DOUBLE_EQ(s.value(t, 1), expected[t][1]) << "stage " << t;
  }
  // The decision in B depends on the stage.
  const StageDecision d2 = DecideAtStage(m, s, 2, 1, 1e-9);
  EXPECT_EQ(m.row_action_name(d2.pick), "run");
  EXPECT_NEAR(d2.action_gap, 3.0, 1e-12);
  const StageDecision d1 = DecideAtStage(m, s, 1, 1, 1e-9);
  EXPECT_EQ(d1.optimal, (std::vector<uint8_t>{1, 1}));  // run and fix tie at 2.
  EXPECT_EQ(m.row_action_name(d1.pick), "run");          // First in document order.
  EXPECT_NEAR(d1.action_gap, 0.0, 1e-12);
  const StageDecision d0 = DecideAtStage(m, s, 0, 1, 1e-9);
  EXPECT_EQ(m.row_action_name(d0.pick), "fix");
  EXPECT_DOUBLE_EQ(d0.value, 4.5);
  EXPECT_EQ(d0.q, (std::vector<double>{3.0, 4.5}));
  EXPECT_TRUE(std::isnan(DecideAtStage(m, s, 0, 0, 1e-9).action_gap));  // One action in G.
}

TEST(FiniteHorizonTest, TerminalValuesAndDiscount) {
  // V_1 = (10, 0), g = 0.5: V_0(G) = 4 + 0.5 (0.5*10 + 0.5*0) = 6.5;
  // V_0(B) = max(1 + 0.5*0, -2 + 0.5*10) = 3 (fix).
  const Model m = Machine();
  FiniteHorizonOptions o;
  o.horizon = 1;
  o.discount = 0.5;
  o.terminal_values = {10.0, 0.0};
  const FiniteHorizonSolution s = MustInduct(m, o);
  EXPECT_DOUBLE_EQ(s.value(0, 0), 6.5);
  EXPECT_DOUBLE_EQ(s.value(0, 1), 3.0);
  EXPECT_EQ(m.row_action_name(DecideAtStage(m, s, 0, 1, 1e-9).pick), "fix");
}

TEST(FiniteHorizonTest, MinimisingCostsMirrorsMaximisingRewards) {
  const Model rewards = Machine();
  const Model costs = Machine(Objective::kMinimize, -1.0);
  FiniteHorizonOptions o;
  o.horizon = 3;
  const FiniteHorizonSolution a = MustInduct(rewards, o);
  const FiniteHorizonSolution b = MustInduct(costs, o);
  for (int t = 0; t <= 3; ++t) {
    for (StateId s = 0; s < 2; ++s) EXPECT_DOUBLE_EQ(b.value(t, s), -a.value(t, s));
  }
  EXPECT_EQ(DecideAtStage(costs, b, 0, 1, 1e-9).pick, DecideAtStage(rewards, a, 0, 1, 1e-9).pick);
}

TEST(FiniteHorizonTest, LongDiscountedHorizonsApproachTheInfiniteHorizonValues) {
  // V_0 = T^H 0, so sup |V_0 - V*| <= g^H sup |V*| (contraction), for the model's discount.
  testing::RandomModelOptions ro;
  ro.discount = 0.8;
  const Model m = testing::MustBuild(testing::RandomSpec(12, ro));
  const Solution infinite = testing::MustSolve(m, Method::kPolicyIteration, 1e-12);
  double scale = 0.0;
  for (double v : infinite.values) scale = std::max(scale, std::fabs(v));
  for (int64_t h : {5, 20, 60}) {
    FiniteHorizonOptions o;
    o.horizon = h;
    o.discount = 0.8;
    const FiniteHorizonSolution s = MustInduct(m, o);
    for (StateId st = 0; st < m.num_states(); ++st) {
      EXPECT_LE(std::fabs(s.value(0, st) - infinite.values[st]),
                std::pow(0.8, double(h)) * scale + 1e-9)
          << "H " << h << " state " << st;
    }
  }
}

TEST(FiniteHorizonTest, RefusesBadOptionsAndHugeTables) {
  const Model m = Machine();
  FiniteHorizonOptions o;
  o.horizon = 0;
  EXPECT_EQ(BackwardInduction(m, o).status().code(), StatusCode::kInvalidArgument);
  o.horizon = 2;
  o.discount = 1.5;
  EXPECT_EQ(BackwardInduction(m, o).status().code(), StatusCode::kInvalidArgument);
  o.discount = 1.0;
  o.terminal_values = {1.0};
  EXPECT_EQ(BackwardInduction(m, o).status().code(), StatusCode::kInvalidArgument);
  o.terminal_values.clear();
  o.horizon = 1000;
  o.max_table_entries = 100;
  EXPECT_EQ(BackwardInduction(m, o).status().code(), StatusCode::kResourceExhausted);
}

TEST(FiniteHorizonTest, ProgressCountsStagesAndCancelStops) {
  const Model m = Machine();
  FiniteHorizonOptions o;
  o.horizon = 50;
  CancelToken cancel;
  int64_t calls = 0;
  ProgressFn progress = [&](const Progress& p) {
    ++calls;
    EXPECT_EQ(p.iteration, calls);
    if (p.iteration == 10) cancel.Cancel();
  };
  Result<FiniteHorizonSolution> s = BackwardInduction(m, o, &progress, &cancel);
  ASSERT_TRUE(s.ok());
  EXPECT_TRUE(s->cancelled);
  EXPECT_EQ(calls, 10);
}

}  // namespace
}  // namespace mdp
