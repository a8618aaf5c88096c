// Checks of the solver core against answers from outside the project: closed forms derived
// here, and published worked examples (each names its source).
#include <gtest/gtest.h>

#include <cmath>

#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using testing::kAllMethods;
using testing::MustSolve;

using testing::Out;
using testing::SpecWriter;


// Howard 1960, Dynamic Programming and Markov Processes, the two-state toymaker (from
// memory): state 1 "successful toy", state 2 "unsuccessful toy". In state 1, no advertising
// moves to (1, 2) w.p. (0.5, 0.5) with rewards (9, 3); advertising moves w.p. (0.8, 0.2) with
// rewards (4, 4). In state 2, no research moves w.p. (0.4, 0.6) with rewards (3, -7);
// research moves w.p. (0.7, 0.3) with rewards (1, -19). With discount 0.9 the optimal policy
// advertises and does research, with values about 22.2 and 12.3 (from memory). The test
// derives the exact values by solving the 2x2 system of that policy by Cramer's rule.
TEST(ReferencesTest, HowardToymakerDiscounted) {
  SpecWriter w(0.9, Objective::kMaximize);
  w.States({"successful", "unsuccessful"}, {});
  w.Action("successful", "no_advertising", {{"successful", 0.5, 9}, {"unsuccessful", 0.5, 3}});
  w.Action("successful", "advertising", {{"successful", 0.8, 4}, {"unsuccessful", 0.2, 4}});
  w.Action("unsuccessful", "no_research", {{"successful", 0.4, 3}, {"unsuccessful", 0.6, -7}});
  w.Action("unsuccessful", "research", {{"successful", 0.7, 1}, {"unsuccessful", 0.3, -19}});
  const Model m = w.Build();
  // (I - 0.9 P) V = q with P = [[0.8, 0.2], [0.7, 0.3]], q = (4, -5).
  const double a11 = 1 - 0.9 * 0.8, a12 = -0.9 * 0.2, a21 = -0.9 * 0.7, a22 = 1 - 0.9 * 0.3;
  const double det = a11 * a22 - a12 * a21;
  const double v1 = (4 * a22 - a12 * -5) / det;
  const double v2 = (a11 * -5 - a21 * 4) / det;
  EXPECT_NEAR(v1, 22.2, 0.01);  // Howard's published figures, from memory.
  EXPECT_NEAR(v2, 12.3, 0.01);
  for (Method method : kAllMethods) {
    SCOPED_TRACE(std::string(MethodName(method)));
    const Solution s = MustSolve(m, method);
    EXPECT_EQ(s.outcome, SolveOutcome::kConverged);
    EXPECT_NEAR(s.values[0], v1, 1e-9);
    EXPECT_NEAR(s.values[1], v2, 1e-9);
    EXPECT_EQ(m.row_action_name(s.best_row[0]), "advertising");
    EXPECT_EQ(m.row_action_name(s.best_row[1]), "research");
  }
}

// Puterman 1994, Markov Decision Processes, sec. 3.1 two-state example (from memory): in s1,
// a11 earns 5 and stays w.p. 0.5 or moves to s2 w.p. 0.5; a12 earns 10 and moves to s2. In
// s2 the only action a21 earns -1 and stays. With discount 0.95: V*(s2) = -1 / 0.05 = -20,
// and V*(s1) = max(5 + 0.95 (0.5 V*(s1) + 0.5 V*(s2)), 10 + 0.95 V*(s2)); the first gives
// (5 - 9.5) / 0.525 = -8.5714..., the second -9, so a11 is optimal.
TEST(ReferencesTest, PutermanTwoStateExample) {
  SpecWriter w(0.95, Objective::kMaximize);
  w.States({"s1", "s2"}, {});
  w.Action("s1", "a11", {{"s1", 0.5, 0}, {"s2", 0.5, 0}}, 5);
  w.Action("s1", "a12", {{"s2", 1.0, 0}}, 10);
  w.Action("s2", "a21", {{"s2", 1.0, 0}}, -1);
  const Model m = w.Build();
  const double v2 = -1.0 / (1.0 - 0.95);
  const double v1 = (5.0 + 0.95 * 0.5 * v2) / (1.0 - 0.95 * 0.5);
  for (Method method : kAllMethods) {
    SCOPED_TRACE(std::string(MethodName(method)));
    const Solution s = MustSolve(m, method);
    EXPECT_NEAR(s.values[0], v1, 1e-9);
    EXPECT_NEAR(s.values[1], v2, 1e-9);
    EXPECT_EQ(m.row_action_name(s.best_row[0]), "a11");
    EXPECT_NEAR(s.action_gap[0], std::fabs(v1 - (10.0 + 0.95 * v2)), 1e-9);
  }
}

// Closed form: a corridor of n cells, each step right earns 1, the last cell is terminal.
// From cell k the value is sum_{i < n-1-k} g^i = (1 - g^(n-1-k)) / (1 - g).
TEST(ReferencesTest, CorridorGeometricSeries) {
  const int n = 30;
  const double g = 0.97;
  SpecWriter w(g, Objective::kMaximize);
  std::vector<std::string> names;
  std::vector<bool> terminal;
  for (int k = 0; k < n; ++k) {
    names.push_back("c" + std::to_string(k));
    terminal.push_back(k == n - 1);
  }
  w.States(names, terminal);
  for (int k = 0; k + 1 < n; ++k) {
    w.Action(names[k], "right", {{names[k + 1], 1.0, 1.0}});
    w.Action(names[k], "wait", {{names[k], 1.0, 0.0}});
  }
  const Model m = w.Build();
  for (Method method : kAllMethods) {
    SCOPED_TRACE(std::string(MethodName(method)));
    const Solution s = MustSolve(m, method);
    for (int k = 0; k < n; ++k) {
      EXPECT_NEAR(s.values[k], (1.0 - std::pow(g, n - 1 - k)) / (1.0 - g), 1e-9) << k;
    }
  }
}

// Closed form for minimisation: a machine that fails each period w.p. f while running
// (cost 0) and costs R to repair (back to running). With "run" the only choice in "up" and
// "repair" the only choice in "down": V(up) = g f V(down) / (1 - g (1 - f)),
// V(down) = R + g V(up). A third option "scrap" in "down" costing S ends the process; the
// minimum picks whichever is cheaper.
TEST(ReferencesTest, MinimizeRepairOrScrap) {
  const double g = 0.9, f = 0.2, repair = 10.0;
  // With repair chosen: V(down) = R + g V(up), V(up) = g f V(down) / (1 - g (1 - f)).
  const double k = g * f / (1.0 - g * (1.0 - f));
  const double down_repair = repair / (1.0 - g * k);
  for (double scrap : {5.0, 30.0}) {
    SCOPED_TRACE(scrap);
    SpecWriter w(g, Objective::kMinimize);
    w.States({"up", "down", "scrapped"}, {false, false, true});
    w.Action("up", "run", {{"up", 1 - f, 0}, {"down", f, 0}});
    w.Action("down", "repair", {{"up", 1.0, repair}});
    w.Action("down", "scrap", {{"scrapped", 1.0, scrap}});
    const Model m = w.Build();
    const double down = std::min(down_repair, scrap);
    const double up = k * down;
    for (Method method : kAllMethods) {
      SCOPED_TRACE(std::string(MethodName(method)));
      const Solution s = MustSolve(m, method);
      EXPECT_NEAR(s.values[1], down, 1e-9);
      EXPECT_NEAR(s.values[0], up, 1e-9);
      EXPECT_EQ(m.row_action_name(s.best_row[1]), scrap < down_repair ? "scrap" : "repair");
    }
  }
}

}  // namespace
}  // namespace mdp
