// Tests of the iterative policy evaluation (solver/internal/policy_matrix.h) and of policy
// iteration's inexact path that uses it: values against Eigen's sparse LU (an independent
// general-purpose solver) and against a closed form derived here, honest residuals when a
// budget or an interruption stops the solve, and agreement of the inexact and the exact
// (sparse LU) policy iteration on models large enough to take the inexact path.
#include "solver/internal/policy_matrix.h"

#include <gtest/gtest.h>

#include <Eigen/SparseCore>
#include <Eigen/SparseLU>
#include <algorithm>
#include <cmath>
#include <random>
#include <string>
#include <vector>

#include "solver/solver.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using internal::EvaluationResult;
using internal::PolicyMatrix;
using internal::SolvePolicyValues;

const std::function<bool()> kNever = [] { return false; };

// A seeded deterministic policy: one random row per non-terminal state.
std::vector<RowId> RandomRows(const Model& m, uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::vector<RowId> rows(m.num_states(), -1);
  for (StateId s = 0; s < m.num_states(); ++s) {
    const RowId count = m.row_end(s) - m.row_begin(s);
    if (count > 0) rows[s] = m.row_begin(s) + static_cast<RowId>(rng() % count);
  }
  return rows;
}

// V^pi by Eigen's sparse LU on (I - g P_pi) V = r_pi, assembled here from the model's arrays.
std::vector<double> LuValues(const Model& m, const std::vector<RowId>& rows) {
  const StateId n = m.num_states();
  std::vector<Eigen::Triplet<double>> triplets;
  Eigen::VectorXd b = Eigen::VectorXd::Zero(n);
  for (StateId s = 0; s < n; ++s) {
    triplets.emplace_back(s, s, 1.0);
    if (rows[s] < 0) continue;
    b[s] = m.row_reward(rows[s]);
    for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
      triplets.emplace_back(s, m.entry_next(e), -m.discount() * m.entry_probability(e));
    }
  }
  Eigen::SparseMatrix<double> a(n, n);
  a.setFromTriplets(triplets.begin(), triplets.end());
  Eigen::SparseLU<Eigen::SparseMatrix<double>> lu;
  lu.compute(a);
  EXPECT_EQ(lu.info(), Eigen::Success);
  const Eigen::VectorXd x = lu.solve(b);
  return std::vector<double>(x.data(), x.data() + n);
}

// sup |r_pi + g P_pi x - x|, recomputed from the model's arrays (not the PolicyMatrix).
double ResidualOnModel(const Model& m, const std::vector<RowId>& rows,
                       const std::vector<double>& x) {
  double sup = 0.0;
  for (StateId s = 0; s < m.num_states(); ++s) {
    double y = 0.0;
    if (rows[s] >= 0) {
      y = m.row_reward(rows[s]);
      for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
        y += m.discount() * m.entry_probability(e) * x[m.entry_next(e)];
      }
    }
    sup = std::max(sup, std::fabs(y - x[s]));
  }
  return sup;
}

double SupDiff(const std::vector<double>& a, const std::vector<double>& b) {
  double d = 0.0;
  for (size_t i = 0; i < a.size(); ++i) d = std::max(d, std::fabs(a[i] - b[i]));
  return d;
}

Model RandomModel(uint64_t seed, StateId states, double discount, Objective objective) {
  testing::RandomModelOptions o;
  o.states = states;
  o.discount = discount;
  o.objective = objective;
  return testing::MustBuild(testing::RandomSpec(seed, o));
}

TEST(PolicyMatrixTest, ValuesMatchSparseLuWithinTheStatedBound) {
  for (uint64_t seed : {3u, 4u, 5u}) {
    for (int threads : {1, 2}) {
      SCOPED_TRACE("seed " + std::to_string(seed) + ", threads " + std::to_string(threads));
      const Model m = RandomModel(seed, 1200, 0.99, Objective::kMaximize);
      const std::vector<RowId> rows = RandomRows(m, seed);
      PolicyMatrix p;
      p.Assign(m, rows.data(), threads);
      std::vector<double> x(m.num_states(), 0.0);
      internal::EvaluationPlan plan;
      const double target = 1e-9;
      const EvaluationResult r = SolvePolicyValues(p, target, 100000, threads, kNever, plan, x);
      EXPECT_FALSE(r.interrupted);
      EXPECT_LE(r.residual, target);
      EXPECT_NEAR(r.residual, ResidualOnModel(m, rows, x), 1e-12);
      // sup |x - V^pi| <= residual / (1 - g) (evaluate.h); LU is exact up to rounding.
      EXPECT_LE(SupDiff(x, LuValues(m, rows)), r.residual / (1.0 - m.discount()) + 1e-9);
    }
  }
}

// A deterministic ring s -> s + 1 (mod n) with reward s: every eigenvalue of P lies on the
// unit circle, the hard case for Krylov methods. Derived here: V(s) = sum_k g^k r(s + k)
// over one lap, divided by 1 - g^n.
TEST(PolicyMatrixTest, DeterministicRingMatchesItsClosedForm) {
  const int n = 400;
  const double g = 0.95;
  testing::SpecWriter w(g, Objective::kMaximize);
  std::vector<std::string> names;
  for (int s = 0; s < n; ++s) names.push_back("s" + std::to_string(s));
  w.States(names, std::vector<bool>(n, false));
  for (int s = 0; s < n; ++s) {
    w.Action(names[s], "go", {{names[(s + 1) % n], 1.0, 0.0}}, static_cast<double>(s));
  }
  const Model m = w.Build();
  std::vector<RowId> rows(n);
  for (StateId s = 0; s < n; ++s) rows[s] = m.row_begin(s);
  PolicyMatrix p;
  p.Assign(m, rows.data(), 1);
  std::vector<double> x(n, 0.0);
  internal::EvaluationPlan plan;
  const EvaluationResult r = SolvePolicyValues(p, 1e-9, 1000000, 1, kNever, plan, x);
  ASSERT_LE(r.residual, 1e-9);
  for (StateId s = 0; s < n; s += 37) {
    double lap = 0.0, discount = 1.0;
    for (int k = 0; k < n; ++k, discount *= g) lap += discount * static_cast<double>((s + k) % n);
    const double expected = lap / (1.0 - std::pow(g, n));
    EXPECT_NEAR(x[s], expected, 1e-9 / (1.0 - g) + 1e-9 * expected) << "state " << s;
  }
}

// A draining chain s -> s - 1 (state 0 absorbs, reward 0) with reward s: P is strictly lower
// triangular apart from state 0, so the forward Gauss-Seidel preconditioner inverts the
// system in one pass and the probe must pick it. Derived here: V(s) = sum_{k<s} g^k (s - k).
TEST(PolicyMatrixTest, DrainingChainPicksTheLowerTrianglePreconditioner) {
  const int n = 3000;
  const double g = 0.99;
  testing::SpecWriter w(g, Objective::kMaximize);
  std::vector<std::string> names;
  for (int s = 0; s < n; ++s) names.push_back("level" + std::to_string(s));
  w.States(names, std::vector<bool>(n, false));
  w.Action(names[0], "hold", {{names[0], 1.0, 0.0}}, 0.0);
  for (int s = 1; s < n; ++s) {
    w.Action(names[s], "drain", {{names[s - 1], 1.0, 0.0}}, static_cast<double>(s));
  }
  const Model m = w.Build();
  std::vector<RowId> rows(n);
  for (StateId s = 0; s < n; ++s) rows[s] = m.row_begin(s);
  PolicyMatrix p;
  p.Assign(m, rows.data(), 1);
  std::vector<double> x(n, 0.0);
  internal::EvaluationPlan plan;
  const EvaluationResult r = SolvePolicyValues(p, 1e-9, 1e6, 1, kNever, plan, x);
  EXPECT_EQ(plan.preconditioner, internal::Preconditioner::kLowerTriangle);
  ASSERT_LE(r.residual, 1e-9);
  for (StateId s = 0; s < n; s += 97) {
    double expected = 0.0, discount = 1.0;
    for (int k = 0; k < s; ++k, discount *= g) expected += discount * (s - k);
    EXPECT_NEAR(x[s], expected, 1e-9 / (1.0 - g) + 1e-12 * expected) << "state " << s;
  }
}

// The same draining chain over three blocks of the lower-triangle preconditioner
// (kLowerSolveBlock states each, the last shorter). Derived here for b = 1: in the first
// block z(s) = (1 + g z(s - 1)) with z(0) = 1 / (1 - g) (state 0 holds), so every z(s) is
// 1 / (1 - g); a later block starting at lo leaves out the entry into the block before, so
// z(lo + k) = sum_{j<=k} g^j = (1 - g^(k+1)) / (1 - g). Both thread counts give the same
// bits. The evaluation still reaches V(s) = s + g V(s - 1), V(0) = 0 (the chain's own
// equation, solved forward here), though one pass no longer inverts the system.
TEST(PolicyMatrixTest, LowerSolveRunsOnBlocksTheSameOnAnyThreadCount) {
  const int64_t block = internal::kLowerSolveBlock;
  const int n = static_cast<int>(2 * block + 500);
  const double g = 0.99;
  ModelSpec spec;  // Written directly: SpecWriter looks names up one by one.
  spec.name = "draining-chain";
  spec.objective = Objective::kMaximize;
  spec.criterion.discount = g;
  spec.action_names = {"hold", "drain"};
  spec.AddState("level0");
  spec.AddStateAction(0, 0.0);
  spec.AddOutcome(0, 1.0);
  for (int s = 1; s < n; ++s) {
    spec.AddState("level" + std::to_string(s));
    spec.AddStateAction(1, static_cast<double>(s));
    spec.AddOutcome(s - 1, 1.0);
  }
  const Model m = testing::MustBuild(spec);
  std::vector<RowId> rows(n);
  for (StateId s = 0; s < n; ++s) rows[s] = m.row_begin(s);
  PolicyMatrix p;
  p.Assign(m, rows.data(), 2);
  const std::vector<double> ones(n, 1.0);
  std::vector<double> z1(n), z2(n);
  p.LowerSolve(ones.data(), z1.data(), 1);
  p.LowerSolve(ones.data(), z2.data(), 2);
  for (int s = 0; s < n; ++s) ASSERT_EQ(z1[s], z2[s]) << "state " << s;
  for (int s : {0, 1, 1000, static_cast<int>(block) - 1}) {
    EXPECT_NEAR(z1[s], 1.0 / (1.0 - g), 1e-12 / (1.0 - g)) << "state " << s;
  }
  for (int64_t lo : {block, 2 * block}) {
    for (int64_t k : {int64_t{0}, int64_t{1}, int64_t{37}, int64_t{499}}) {
      const double expected = (1.0 - std::pow(g, static_cast<double>(k + 1))) / (1.0 - g);
      EXPECT_NEAR(z1[lo + k], expected, 1e-12 / (1.0 - g)) << "state " << lo + k;
    }
  }
  std::vector<double> x(n, 0.0);
  internal::EvaluationPlan plan;
  const EvaluationResult r = SolvePolicyValues(p, 1e-9, 1e7, 2, kNever, plan, x);
  ASSERT_LE(r.residual, 1e-9);
  double v = 0.0;
  for (int s = 1; s < n; ++s) {
    v = s + g * v;
    if (s % 9973 == 0 || s == n - 1) {
      EXPECT_NEAR(x[s], v, 1e-9 / (1.0 - g) + 1e-12 * v) << "state " << s;
    }
  }
}

TEST(PolicyMatrixTest, BudgetAndInterruptionLeaveAnHonestResidual) {
  const Model m = RandomModel(11, 2000, 0.99, Objective::kMaximize);
  const std::vector<RowId> rows = RandomRows(m, 11);
  PolicyMatrix p;
  p.Assign(m, rows.data(), 1);
  std::vector<double> x(m.num_states(), 0.0);
  internal::EvaluationPlan plan;
  plan.preconditioner = internal::Preconditioner::kDiagonal;
  const EvaluationResult budget = SolvePolicyValues(p, 1e-12, 3, 1, kNever, plan, x);
  EXPECT_GT(budget.residual, 1e-12);
  EXPECT_LE(budget.work, 4.0);
  EXPECT_NEAR(budget.residual, ResidualOnModel(m, rows, x), 1e-12);

  std::vector<double> y(m.num_states(), 0.0);
  const EvaluationResult stopped =
      SolvePolicyValues(p, 1e-12, 100000, 1, [] { return true; }, plan, y);
  EXPECT_TRUE(stopped.interrupted);
  EXPECT_NEAR(stopped.residual, ResidualOnModel(m, rows, y), 1e-12);
}

TEST(PolicyMatrixTest, TerminalStatesKeepValueZero) {
  testing::RandomModelOptions o;
  o.states = 3500;
  o.terminal_fraction = 0.3;
  o.discount = 0.9;
  const Model m = testing::MustBuild(testing::RandomSpec(21, o));
  const std::vector<RowId> rows = RandomRows(m, 21);
  PolicyMatrix p;
  p.Assign(m, rows.data(), 1);
  std::vector<double> x(m.num_states(), 1.0);
  internal::EvaluationPlan plan;
  SolvePolicyValues(p, 1e-10, 100000, 1, kNever, plan, x);
  int terminals = 0;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (!m.terminal(s)) continue;
    ++terminals;
    EXPECT_EQ(x[s], 0.0) << "terminal state " << s;
  }
  EXPECT_GT(terminals, 0);
}

// Policy iteration above kDirectMaxStates evaluates inexactly; with the linear solver forced
// to sparse LU it evaluates exactly. Both must reach the same optimum within their bounds,
// and the same optimal action sets wherever the gap exceeds the bounds.
TEST(PolicyMatrixTest, InexactPolicyIterationAgreesWithExactPolicyIteration) {
  for (Objective objective : {Objective::kMaximize, Objective::kMinimize}) {
    for (double discount : {0.9, 0.99}) {
      SCOPED_TRACE("discount " + std::to_string(discount));
      const Model m = RandomModel(31, 3200, discount, objective);
      SolveOptions exact, inexact;
      exact.method = inexact.method = Method::kPolicyIteration;
      exact.tolerance = inexact.tolerance = 1e-8;
      exact.linear_solver = LinearSolver::kDirect;
      Result<Solution> a = Solve(m, exact);
      Result<Solution> b = Solve(m, inexact);
      ASSERT_TRUE(a.ok() && b.ok());
      EXPECT_EQ(b->outcome, SolveOutcome::kConverged);
      EXPECT_LE(b->value_error_bound, 1e-8);
      EXPECT_GT(b->sweeps, b->iterations);  // Evaluation products are counted.
      EXPECT_LE(SupDiff(a->values, b->values), a->value_error_bound + b->value_error_bound);
      int64_t compared = 0;
      for (StateId s = 0; s < m.num_states(); ++s) {
        if (!(a->action_gap[s] > 4 * (a->q_error_bound + b->q_error_bound) + 1e-9)) continue;
        ++compared;
        for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
          ASSERT_EQ(a->optimal_row[r], b->optimal_row[r]) << "state " << s << " row " << r;
        }
      }
      EXPECT_GT(compared, m.num_states() / 2);
    }
  }
}

TEST(PolicyMatrixTest, InexactPolicyIterationHonoursCancellation) {
  const Model m = RandomModel(41, 3200, 0.99, Objective::kMaximize);
  SolveOptions o;
  o.method = Method::kPolicyIteration;
  CancelToken cancel;
  cancel.Cancel();
  Result<Solution> s = Solve(m, o, nullptr, &cancel);
  ASSERT_TRUE(s.ok());
  EXPECT_EQ(s->outcome, SolveOutcome::kCancelled);
}

}  // namespace
}  // namespace mdp
