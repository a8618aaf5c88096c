// Checks of the average-reward evaluation on models beyond the small direct solver
// (solver/internal/average_chains.h, solver/internal/mmatrix_lu.h): the factored solves
// against Eigen's sparse LU on the assembled systems (an independent general-purpose
// solver), in both elimination orders, and against closed forms derived here (hitting times
// and the stationary distribution of birth-death chains), which solver each system takes,
// and stops inside an evaluation. Policy iteration's answers on a slowly mixing ring are
// checked by the optimality equations themselves, recomputed here in long double.
#include <gtest/gtest.h>

#include <Eigen/SparseCore>
#include <Eigen/SparseLU>
#include <algorithm>
#include <chrono>
#include <cmath>
#include <random>
#include <string>
#include <vector>

#include "solver/internal/average_chains.h"
#include "solver/internal/mmatrix_lu.h"
#include "solver/internal/stop_check.h"
#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using internal::AverageEvaluation;
using internal::AverageSolveCounts;
using internal::EvaluateAverage;
using internal::FactorOrdering;
using internal::FactorPlan;
using internal::LeakySystem;
using internal::MMatrixLu;
using internal::PlanFactors;
using internal::StopCheck;

constexpr int64_t kNoCap = int64_t{1} << 40;

// ---------------------------------------------------------------------------------------
// Models.

// A ring of `states` states, `actions` actions each, `outcomes` next states within +-reach
// (weights uniform in [0.05, 1.05), normalised), rewards uniform in [-1, 1): the shape of the
// slowly mixing benchmark model (scripts/bench, "local"), at a test's size.
ModelSpec LocalRingSpec(uint64_t seed, StateId states, int actions, int outcomes, int reach) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.name = "ring";
  spec.criterion.kind = CriterionKind::kAverage;
  spec.criterion.discount = 1.0;
  for (int a = 0; a < actions; ++a) spec.action_names.push_back("a" + std::to_string(a));
  for (StateId s = 0; s < states; ++s) {
    spec.AddState("s" + std::to_string(s));
    for (int a = 0; a < actions; ++a) {
      spec.AddStateAction(a, 2.0 * unit(rng) - 1.0);
      std::vector<double> w(outcomes);
      double sum = 0.0;
      for (double& x : w) sum += (x = 0.05 + unit(rng));
      for (double x : w) {
        const int64_t step = static_cast<int64_t>(rng() % (2 * reach + 1)) - reach;
        spec.AddOutcome(static_cast<StateId>(((s + step) % states + states) % states), x / sum,
                        0.0);
      }
    }
  }
  return spec;
}

// Next states anywhere: an expander, where factors would fill in.
ModelSpec RandomNextSpec(uint64_t seed, StateId states) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.criterion.kind = CriterionKind::kAverage;
  spec.criterion.discount = 1.0;
  spec.action_names = {"a", "b"};
  for (StateId s = 0; s < states; ++s) {
    spec.AddState("s" + std::to_string(s));
    for (int a = 0; a < 2; ++a) {
      spec.AddStateAction(a, 2.0 * unit(rng) - 1.0);
      for (int k = 0; k < 6; ++k) spec.AddOutcome(static_cast<StateId>(rng() % states), 1.0 / 6);
    }
  }
  return spec;
}

// A birth-death chain on 0..n-1 with one action: up w.p. `up`, down otherwise, a move past
// either end staying put; reward k / n in state k.
ModelSpec BirthDeathSpec(StateId n, double up) {
  ModelSpec spec;
  spec.criterion.kind = CriterionKind::kAverage;
  spec.criterion.discount = 1.0;
  spec.action_names = {"walk"};
  for (StateId k = 0; k < n; ++k) {
    spec.AddState("k" + std::to_string(k));
    spec.AddStateAction(0, static_cast<double>(k) / n);
    spec.AddOutcome(std::min(k + 1, n - 1), up);
    spec.AddOutcome(std::max(k - 1, 0), 1.0 - up);
  }
  return spec;
}

// The first row of every state.
std::vector<RowId> FirstRows(const Model& m) {
  std::vector<RowId> rows(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) rows[s] = m.row_begin(s);
  return rows;
}

// A seeded row per state.
std::vector<RowId> RandomRows(const Model& m, uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::vector<RowId> rows(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) {
    rows[s] = m.row_begin(s) + static_cast<RowId>(rng() % (m.row_end(s) - m.row_begin(s)));
  }
  return rows;
}

// ---------------------------------------------------------------------------------------
// An independent evaluation: Eigen's sparse LU (partial pivoting, its own ordering) on the
// assembled system of a unichain policy, g + h(s) - sum p h = r(s), h(0) = 0.

struct Reference {
  double gain = 0.0;
  Eigen::VectorXd bias;
};

Reference EigenEvaluation(const Model& m, const std::vector<RowId>& rows) {
  const StateId n = m.num_states();
  std::vector<Eigen::Triplet<double>> t;
  Eigen::VectorXd b(n);
  for (StateId s = 0; s < n; ++s) {
    t.emplace_back(s, 0, 1.0);  // Unknown 0 is g; unknown s > 0 is h(s).
    if (s > 0) t.emplace_back(s, s, 1.0);
    for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
      if (m.entry_next(e) > 0) t.emplace_back(s, m.entry_next(e), -m.entry_probability(e));
    }
    b[s] = m.row_reward(rows[s]);
  }
  Eigen::SparseMatrix<double> a(n, n);
  a.setFromTriplets(t.begin(), t.end());
  a.makeCompressed();
  Eigen::SparseLU<Eigen::SparseMatrix<double>> lu;
  lu.compute(a);
  EXPECT_EQ(lu.info(), Eigen::Success);
  Eigen::VectorXd x = lu.solve(b);
  x += lu.solve(Eigen::VectorXd(b - a * x));
  Reference out;
  out.gain = x[0];
  out.bias = x;
  out.bias[0] = 0.0;
  return out;
}

// max_s |r + P h - h - g| for the policy `rows`, in long double.
double EquationResidual(const Model& m, const std::vector<RowId>& rows,
                        const std::vector<double>& h, double g) {
  long double worst = 0.0L;
  for (StateId s = 0; s < m.num_states(); ++s) {
    long double d = m.row_reward(rows[s]) - static_cast<long double>(h[s]) - g;
    for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
      d += static_cast<long double>(m.entry_probability(e)) * h[m.entry_next(e)];
    }
    worst = std::max(worst, std::fabs(d));
  }
  return static_cast<double>(worst);
}

// ---------------------------------------------------------------------------------------
// MMatrixLu.

// Appends a row of weights (unknown, weight), leak and self-loop weight, all divided by
// their sum (so the row is a probability distribution).
void AppendRow(const std::vector<std::pair<int32_t, double>>& row, double leak, double self,
               LeakySystem& a) {
  double total = leak + self;
  for (const auto& e : row) total += e.second;
  for (const auto& e : row) {
    a.col.push_back(e.first);
    a.weight.push_back(e.second / total);
  }
  a.leak.push_back(leak / total);
  a.row_begin.push_back(static_cast<int64_t>(a.col.size()));
}

// I - Q restricted to the unknowns of a random sparse substochastic matrix: each row has
// an entry to the unknown before it (so every row reaches row 0, which leaks) and a few
// random ones; some rows leak too.
LeakySystem RandomLeakySystem(uint64_t seed, int32_t n) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  LeakySystem a;
  a.size = n;
  for (int32_t i = 0; i < n; ++i) {
    std::vector<std::pair<int32_t, double>> row;
    if (i > 0) row.emplace_back(i - 1, 0.05 + unit(rng));
    for (int k = 0; k < 4; ++k) {
      const int32_t j = static_cast<int32_t>(rng() % n);
      if (j != i && std::none_of(row.begin(), row.end(), [j](auto& e) { return e.first == j; })) {
        row.emplace_back(j, unit(rng));
      }
    }
    const double leak = i == 0 || rng() % 5 == 0 ? 0.01 + unit(rng) : 0.0;
    const double self = unit(rng);  // A self-loop: neither an entry nor leak.
    AppendRow(row, leak, self, a);
  }
  return a;
}

Eigen::SparseMatrix<double> Assemble(const LeakySystem& a) {
  std::vector<Eigen::Triplet<double>> t;
  for (int32_t i = 0; i < a.size; ++i) {
    double diagonal = a.leak[i];
    for (int64_t e = a.row_begin[i]; e < a.row_begin[i + 1]; ++e) {
      t.emplace_back(i, a.col[e], -a.weight[e]);
      diagonal += a.weight[e];
    }
    t.emplace_back(i, i, diagonal);
  }
  Eigen::SparseMatrix<double> m(a.size, a.size);
  m.setFromTriplets(t.begin(), t.end());
  m.makeCompressed();
  return m;
}

// I - Q on a side x side grid whose chain steps to the 8 neighbours of a cell with random
// weights (as a vehicle with slip on a map), leaking at the border and, rarely, inside.
LeakySystem GridLeakySystem(uint64_t seed, int32_t side) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  LeakySystem a;
  a.size = side * side;
  for (int32_t y = 0; y < side; ++y) {
    for (int32_t x = 0; x < side; ++x) {
      std::vector<std::pair<int32_t, double>> row;
      double leak = rng() % 50 == 0 ? unit(rng) : 0.0;
      for (int dy = -1; dy <= 1; ++dy) {
        for (int dx = -1; dx <= 1; ++dx) {
          if (dx == 0 && dy == 0) continue;
          const double w = 0.05 + unit(rng);
          if (x + dx < 0 || x + dx >= side || y + dy < 0 || y + dy >= side) {
            leak += w;  // Off the map.
          } else {
            row.emplace_back((y + dy) * side + x + dx, w);
          }
        }
      }
      AppendRow(row, leak, unit(rng), a);  // The rest stays put.
    }
  }
  return a;
}

// Every unknown once.
bool IsPermutation(const std::vector<int32_t>& order, int32_t n) {
  std::vector<int> seen(n, 0);
  for (const int32_t v : order) {
    if (v < 0 || v >= n || seen[v]++ > 0) return false;
  }
  return static_cast<int32_t>(order.size()) == n;
}

// Both orders, on scattered systems and on grids (where nested dissection splits the
// system many times over): the factors solve as Eigen's sparse LU does.
TEST(MMatrixLuTest, SolvesAsEigensSparseLuDoes) {
  for (const FactorOrdering ordering :
       {FactorOrdering::kCuthillMcKee, FactorOrdering::kDissection}) {
    for (uint64_t seed = 1; seed <= 6; ++seed) {
      SCOPED_TRACE(::testing::Message()
                   << "ordering " << static_cast<int>(ordering) << " seed " << seed);
      const LeakySystem a = seed <= 4 ? RandomLeakySystem(seed, 400) : GridLeakySystem(seed, 45);
      FactorPlan plan = PlanFactors(a, kNoCap, ordering);
      ASSERT_TRUE(plan.complete);
      ASSERT_EQ(plan.ordering, ordering);
      ASSERT_TRUE(IsPermutation(plan.order, a.size));
      MMatrixLu lu;
      ASSERT_OK(lu.Factorize(a, std::move(plan), StopCheck{}));
      const Eigen::SparseMatrix<double> matrix = Assemble(a);
      Eigen::SparseLU<Eigen::SparseMatrix<double>> reference;
      reference.compute(matrix);
      ASSERT_EQ(reference.info(), Eigen::Success);
      std::mt19937_64 rng(seed);
      Eigen::VectorXd b(a.size);
      for (int32_t i = 0; i < a.size; ++i) {
        b[i] = static_cast<double>(rng() % 2001) / 1000.0 - 1.0;
      }
      Eigen::VectorXd x = b;
      lu.Solve(std::span<double>(x.data(), x.size()));
      const Eigen::VectorXd want = reference.solve(b);
      EXPECT_LE((x - want).lpNorm<Eigen::Infinity>(),
                1e-9 * (1.0 + want.lpNorm<Eigen::Infinity>()));
      Eigen::VectorXd z = b;
      lu.SolveTransposed(std::span<double>(z.data(), z.size()));
      const Eigen::SparseMatrix<double> transposed = matrix.transpose();
      Eigen::SparseLU<Eigen::SparseMatrix<double>> reference_t;
      reference_t.compute(transposed);
      const Eigen::VectorXd want_t = reference_t.solve(b);
      EXPECT_LE((z - want_t).lpNorm<Eigen::Infinity>(),
                1e-9 * (1.0 + want_t.lpNorm<Eigen::Infinity>()));
    }
  }
}

// On a 200 x 200 grid a band is about 200 wide (n^1.5 entries); nested dissection's
// separators keep the factors near n log n. The automatic plan takes dissection, and still
// fits under a cap that the band passes.
TEST(MMatrixLuTest, PlanDissectsAGridThatABandFillsIn) {
  const LeakySystem a = GridLeakySystem(7, 200);
  const FactorPlan band = PlanFactors(a, kNoCap, FactorOrdering::kCuthillMcKee);
  const FactorPlan dissected = PlanFactors(a, kNoCap, FactorOrdering::kDissection);
  ASSERT_TRUE(band.complete);
  ASSERT_TRUE(dissected.complete);
  ASSERT_TRUE(IsPermutation(dissected.order, a.size));
  EXPECT_LT(3 * dissected.lower_entries, band.lower_entries);
  EXPECT_LT(5 * dissected.multiply_adds, band.multiply_adds);
  const FactorPlan automatic = PlanFactors(a, kNoCap);
  EXPECT_EQ(automatic.ordering, FactorOrdering::kDissection);
  EXPECT_EQ(automatic.lower_entries, dissected.lower_entries);
  const int64_t cap = (band.lower_entries + dissected.lower_entries) / 2;
  EXPECT_FALSE(PlanFactors(a, cap, FactorOrdering::kCuthillMcKee).complete);
  const FactorPlan capped = PlanFactors(a, cap);
  EXPECT_TRUE(capped.complete);
  EXPECT_EQ(capped.ordering, FactorOrdering::kDissection);
}

// Expected hitting times of 0 in a birth-death chain on 0..n moving up w.p. p and down w.p.
// q = 1 - p (staying put at n instead of moving up). With tau_k = E_k[T_{k-1}]: from k the
// chain steps down (q) or up (p), after which it needs tau_{k+1} to come back, so
// q tau_k = 1 + p tau_{k+1}, tau_n = 1 / q, and E_i[T_0] = tau_1 + ... + tau_i: sums of
// positive terms, exact to rounding. With p = 3/4 they reach 3^n: a chain that climbs away
// from where it leaks, the case where elimination loses digits by cancellation. The
// factors keep them to a few units in the last place.
TEST(MMatrixLuTest, HittingTimesOfAClimbingChainAreAccurateEntryByEntry) {
  const int32_t n = 200;
  const double p = 0.75, q = 0.25;
  LeakySystem a;  // Unknown i - 1 is state i = 1..n.
  a.size = n;
  for (int32_t i = 1; i <= n; ++i) {
    if (i < n) {
      a.col.push_back(i);  // Up to i + 1.
      a.weight.push_back(p);
    }
    if (i > 1) {
      a.col.push_back(i - 2);  // Down to i - 1.
      a.weight.push_back(q);
    }
    a.leak.push_back(i == 1 ? q : 0.0);  // Down from 1 reaches 0.
    a.row_begin.push_back(static_cast<int64_t>(a.col.size()));
  }
  std::vector<double> tau(n + 2, 0.0);
  tau[n] = 1.0 / q;
  for (int32_t k = n - 1; k >= 1; --k) tau[k] = (1.0 + p * tau[k + 1]) / q;
  std::vector<double> hitting(n + 1, 0.0);
  for (int32_t i = 1; i <= n; ++i) hitting[i] = hitting[i - 1] + tau[i];
  ASSERT_GT(hitting[n], 1e28);

  // Any elimination order keeps the pivots free of cancellation.
  for (const FactorOrdering ordering :
       {FactorOrdering::kCuthillMcKee, FactorOrdering::kDissection}) {
    SCOPED_TRACE(static_cast<int>(ordering));
    FactorPlan plan = PlanFactors(a, kNoCap, ordering);
    ASSERT_TRUE(plan.complete);
    MMatrixLu lu;
    ASSERT_OK(lu.Factorize(a, std::move(plan), StopCheck{}));
    std::vector<double> x(n, 1.0);
    lu.Solve(x);
    double worst = 0.0;
    for (int32_t i = 1; i <= n; ++i) {
      worst = std::max(worst, std::fabs(x[i - 1] - hitting[i]) / hitting[i]);
    }
    EXPECT_LE(worst, 1e-13);
  }
}

TEST(MMatrixLuTest, ASetThatNeverLeaksIsNamed) {
  // Unknowns 0 -> 1 -> 2 -> 0 cycle without leak; 3 leaks and moves to 0.
  LeakySystem a;
  a.size = 4;
  a.col = {1, 2, 0, 0};
  a.weight = {1.0, 1.0, 1.0, 0.5};
  a.leak = {0.0, 0.0, 0.0, 0.5};
  a.row_begin = {0, 1, 2, 3, 4};
  FactorPlan plan = PlanFactors(a, kNoCap);
  MMatrixLu lu;
  const Status status = lu.Factorize(a, std::move(plan), StopCheck{});
  EXPECT_EQ(status.code(), StatusCode::kFailedPrecondition);
  EXPECT_GE(lu.singular_at(), 0);
  EXPECT_LE(lu.singular_at(), 2);
}

// A grid large enough that the factorisation splits its rows between threads (at least
// 4,096 rows per thread), in both orders (a band: FactorizeByRows; dissected:
// FactorizeByPattern): on 2 and 3 threads the factors solve as Eigen's sparse LU does, and
// give the very bits of the one-thread factors.
TEST(MMatrixLuTest, FactorsAreTheSameOnAnyThreadCount) {
  const LeakySystem a = GridLeakySystem(11, 110);  // 12,100 unknowns.
  const Eigen::SparseMatrix<double> matrix = Assemble(a);
  Eigen::SparseLU<Eigen::SparseMatrix<double>> reference;
  reference.compute(matrix);
  ASSERT_EQ(reference.info(), Eigen::Success);
  std::mt19937_64 rng(11);
  Eigen::VectorXd b(a.size);
  for (int32_t i = 0; i < a.size; ++i) b[i] = static_cast<double>(rng() % 2001) / 1000.0 - 1.0;
  const Eigen::VectorXd want = reference.solve(b);
  for (const FactorOrdering ordering :
       {FactorOrdering::kCuthillMcKee, FactorOrdering::kDissection}) {
    const FactorPlan plan = PlanFactors(a, kNoCap, ordering);
    ASSERT_TRUE(plan.complete);
    ASSERT_EQ(plan.ordering, ordering);
    if (ordering == FactorOrdering::kCuthillMcKee) {  // A band wide enough for threads.
      ASSERT_GE(plan.multiply_adds, internal::kBandRowWorkForThreads * a.size);
    }
    std::vector<Eigen::VectorXd> x, z;
    std::vector<int64_t> entries;
    for (const int threads : {1, 2, 3}) {
      SCOPED_TRACE(::testing::Message()
                   << "ordering " << static_cast<int>(ordering) << ", " << threads << " threads");
      MMatrixLu lu;
      ASSERT_OK(lu.Factorize(a, plan, StopCheck{}, threads));
      entries.push_back(lu.lower_entries() + lu.upper_entries());
      x.push_back(b);
      lu.Solve(std::span<double>(x.back().data(), x.back().size()));
      EXPECT_LE((x.back() - want).lpNorm<Eigen::Infinity>(),
                1e-9 * (1.0 + want.lpNorm<Eigen::Infinity>()));
      z.push_back(b);
      lu.SolveTransposed(std::span<double>(z.back().data(), z.back().size()));
    }
    for (size_t k = 1; k < x.size(); ++k) {
      EXPECT_EQ(entries[k], entries[0]);
      for (int32_t i = 0; i < a.size; ++i) {
        ASSERT_EQ(x[k][i], x[0][i]) << "unknown " << i << ", run " << k;
        ASSERT_EQ(z[k][i], z[0][i]) << "unknown " << i << ", run " << k;
      }
    }
  }
}

// The same grid with a closed corner: the unknowns of the 12 x 12 corner at the origin move
// only among themselves and never leak. Whatever the order and the number of threads, the
// factorisation names the same unknown, one of the corner's; rows after it that wait for it
// give up.
TEST(MMatrixLuTest, ASetThatNeverLeaksIsNamedTheSameOnAnyThreadCount) {
  const int32_t side = 110, corner = 12;
  LeakySystem a = GridLeakySystem(12, side);
  LeakySystem closed;
  closed.size = a.size;
  for (int32_t i = 0; i < a.size; ++i) {
    const bool inside = i / side < corner && i % side < corner;
    double kept = 0.0;
    for (int64_t e = a.row_begin[i]; e < a.row_begin[i + 1]; ++e) {
      const int32_t j = a.col[e];
      if (inside && !(j / side < corner && j % side < corner)) continue;
      closed.col.push_back(j);
      closed.weight.push_back(a.weight[e]);
      kept += a.weight[e];
    }
    closed.leak.push_back(inside ? 0.0 : a.leak[i]);
    if (inside && kept == 0.0) FAIL() << "corner unknown " << i << " has no entries";
    closed.row_begin.push_back(static_cast<int64_t>(closed.col.size()));
  }
  for (const FactorOrdering ordering :
       {FactorOrdering::kCuthillMcKee, FactorOrdering::kDissection}) {
    SCOPED_TRACE(::testing::Message() << "ordering " << static_cast<int>(ordering));
    const FactorPlan plan = PlanFactors(closed, kNoCap, ordering);
    ASSERT_TRUE(plan.complete);
    if (ordering == FactorOrdering::kCuthillMcKee) {
      ASSERT_GE(plan.multiply_adds, internal::kBandRowWorkForThreads * closed.size);
    }
    std::vector<int32_t> named;
    for (const int threads : {1, 2, 3}) {
      MMatrixLu lu;
      EXPECT_EQ(lu.Factorize(closed, plan, StopCheck{}, threads).code(),
                StatusCode::kFailedPrecondition);
      named.push_back(lu.singular_at());
    }
    EXPECT_LT(named[0] / side, corner);
    EXPECT_LT(named[0] % side, corner);
    EXPECT_EQ(named[1], named[0]);
    EXPECT_EQ(named[2], named[0]);
  }
}

TEST(MMatrixLuTest, FactorizationHearsStop) {
  const LeakySystem a = RandomLeakySystem(9, 300);
  CancelToken cancel;
  cancel.Cancel();
  MMatrixLu lu;
  EXPECT_EQ(lu.Factorize(a, PlanFactors(a, kNoCap), StopCheck{&cancel}).code(),
            StatusCode::kCancelled);
  StopCheck past;
  past.deadline = StopCheck::Clock::now() - std::chrono::seconds(1);
  EXPECT_EQ(lu.Factorize(a, PlanFactors(a, kNoCap), past).code(), StatusCode::kDeadlineExceeded);
  // On threads too.
  const LeakySystem grid = GridLeakySystem(9, 100);
  const FactorPlan dissected = PlanFactors(grid, kNoCap, FactorOrdering::kDissection);
  const FactorPlan band = PlanFactors(grid, kNoCap, FactorOrdering::kCuthillMcKee);
  ASSERT_GE(band.multiply_adds, internal::kBandRowWorkForThreads * grid.size);
  for (const FactorPlan* plan : {&dissected, &band}) {
    EXPECT_EQ(lu.Factorize(grid, *plan, StopCheck{&cancel}, 2).code(), StatusCode::kCancelled);
    EXPECT_EQ(lu.Factorize(grid, *plan, past, 2).code(), StatusCode::kDeadlineExceeded);
  }
}

TEST(MMatrixLuTest, PlanGivesUpOnAnExpanderAndCountsABand) {
  // Random next states: the count stops at the cap.
  const Model expander = testing::MustBuild(RandomNextSpec(3, 20000));
  LeakySystem random;
  random.size = expander.num_states() - 1;
  const std::vector<RowId> rows = FirstRows(expander);
  for (StateId s = 1; s < expander.num_states(); ++s) {
    double leak = 0.0;
    for (int64_t e = expander.entry_begin(rows[s]); e < expander.entry_end(rows[s]); ++e) {
      const StateId t = expander.entry_next(e);
      if (t == 0) {
        leak += expander.entry_probability(e);
      } else if (t != s) {
        random.col.push_back(t - 1);
        random.weight.push_back(expander.entry_probability(e));
      }
    }
    random.leak.push_back(leak);
    random.row_begin.push_back(static_cast<int64_t>(random.col.size()));
  }
  EXPECT_FALSE(PlanFactors(random, 10 * random.entries()).complete);
  // Asked for a band only, it never goes on to dissect (a wide layer ends the plan).
  const FactorPlan band_only =
      PlanFactors(random, 10 * random.entries(), FactorOrdering::kCuthillMcKee);
  EXPECT_FALSE(band_only.complete);
  EXPECT_NE(band_only.ordering, FactorOrdering::kDissection);
  // A path with reach 1 (tridiagonal): L has exactly one entry below the diagonal per row
  // after the first, whatever the order keeps it a band.
  LeakySystem path;
  path.size = 5000;
  for (int32_t i = 0; i < path.size; ++i) {
    if (i > 0) {
      path.col.push_back(i - 1);
      path.weight.push_back(0.5);
    }
    if (i + 1 < path.size) {
      path.col.push_back(i + 1);
      path.weight.push_back(0.4);
    }
    path.leak.push_back(i == 0 ? 0.5 : 0.1);
    path.row_begin.push_back(static_cast<int64_t>(path.col.size()));
  }
  const FactorPlan plan = PlanFactors(path, kNoCap);
  ASSERT_TRUE(plan.complete);
  EXPECT_EQ(plan.lower_entries, path.size - 1);
}

// ---------------------------------------------------------------------------------------
// EvaluateAverage beyond the small solver.

TEST(AverageScaleTest, FactoredEvaluationMatchesEigenOnALocalRing) {
  const StateId n = 4000;
  ASSERT_GT(n, EvaluateOptions().direct_max_states);
  const Model m = testing::MustBuild(LocalRingSpec(5, n, 3, 6, 12));
  for (uint64_t seed : {1u, 2u}) {
    SCOPED_TRACE(seed);
    const std::vector<RowId> rows = RandomRows(m, seed);
    AverageEvaluation eval;
    AverageSolveCounts counts;
    ASSERT_OK(EvaluateAverage(m, rows, 1e-12, StopCheck{}, {}, eval, &counts));
    ASSERT_EQ(eval.chain.classes.size(), 1u);
    EXPECT_GE(counts.factored, 1);
    EXPECT_EQ(counts.iterative, 0);
    const Reference ref = EigenEvaluation(m, rows);
    // Both solve the same well-posed system (h = 0 at state 0, the class's smallest).
    EXPECT_NEAR(eval.gain[0], ref.gain, 1e-10);
    double scale = 1.0;
    for (StateId s = 0; s < n; ++s) scale = std::max(scale, std::fabs(ref.bias[s]));
    for (StateId s = 0; s < n; ++s) EXPECT_NEAR(eval.bias[s], ref.bias[s], 1e-9 * scale) << s;
    EXPECT_LE(eval.gain_error, 1e-9);
    EXPECT_LE(EquationResidual(m, rows, eval.bias, eval.gain[0]), 1e-9);
    // The stationary distribution it found sums to 1 and is stationary.
    double total = 0.0;
    for (double p : eval.stationary) total += p;
    EXPECT_NEAR(total, 1.0, 1e-12);
  }
}

// The birth-death chain of BirthDeathSpec with up = 0.99 on n states: detailed balance
// pi(k + 1) / pi(k) = 0.99 / 0.01 = 99 puts almost all its mass at the top, and the chain
// needs some 99^n steps to come down to state 0, so a solve pinned there could not even
// represent its hitting times. The gain is sum_k pi(k) k / n, summed here from the top;
// also pi(n - 1).
struct ClimbingChain {
  double gain = 0.0;
  double top = 0.0;  // pi(n - 1).
};
ClimbingChain ClimbingChainLaw(StateId n) {
  long double weight = 1.0L, total = 0.0L, reward = 0.0L;
  for (StateId k = n - 1; k >= 0 && weight > 1e-40L; --k) {
    total += weight;
    reward += weight * static_cast<long double>(k) / n;
    weight /= 99.0L;
  }
  return {static_cast<double>(reward / total), static_cast<double>(1.0L / total)};
}

TEST(AverageScaleTest, ClimbingChainGainFromDetailedBalance) {
  const StateId n = 4000;
  const Model m = testing::MustBuild(BirthDeathSpec(n, 0.99));
  const double gain = ClimbingChainLaw(n).gain;
  const std::vector<RowId> rows = FirstRows(m);
  AverageEvaluation eval;
  AverageSolveCounts counts;
  ASSERT_OK(EvaluateAverage(m, rows, 1e-12, StopCheck{}, {}, eval, &counts));
  EXPECT_GE(counts.factored, 1);
  EXPECT_NEAR(eval.gain[0], gain, 1e-13);
  EXPECT_LE(eval.gain_error, 1e-10);
  EXPECT_NEAR(eval.stationary[n - 1], ClimbingChainLaw(n).top, 1e-13);

  // Policy iteration (one action: it only evaluates) certifies the same.
  Result<AverageRewardSolution> s =
      AverageRewardPolicyIteration(m, AverageRewardOptions(), nullptr, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  EXPECT_LE(s->gain_lower, gain);
  EXPECT_GE(s->gain_upper, gain);
  EXPECT_LE(s->gain_upper - s->gain_lower, AverageRewardOptions().tolerance);
}

// An evaluation told by the previous one to skip planning factors (declined_factor_size 0,
// as after an expander) tries BiCGSTAB on the climbing chain, which misses: the factors are
// planned then and give the closed-form gain, and the evaluation after it factors first,
// without trying BiCGSTAB again.
TEST(AverageScaleTest, AMissedIterativeSolveIsFactoredThenFactoredFirst) {
  const StateId n = 4000;
  const Model m = testing::MustBuild(BirthDeathSpec(n, 0.99));
  const std::vector<RowId> rows = FirstRows(m);
  AverageEvaluation declined;
  declined.gain.assign(n, 0.0);
  declined.bias.assign(n, 0.0);
  declined.stationary.assign(n, 0.0);
  declined.declined_factor_size = 0;
  AverageEvaluation eval;
  AverageSolveCounts counts;
  ASSERT_OK(EvaluateAverage(m, rows, 1e-12, StopCheck{}, declined, eval, &counts));
  EXPECT_GE(counts.iterative, 1);
  EXPECT_GE(counts.factored, 1);
  EXPECT_NEAR(eval.gain[0], ClimbingChainLaw(n).gain, 1e-13);
  EXPECT_LE(eval.gain_error, 1e-10);
  EXPECT_EQ(eval.missed_iterative_size, n - 1);  // The class without its anchor.
  EXPECT_EQ(eval.declined_factor_size, 0);

  AverageEvaluation next;
  ASSERT_OK(EvaluateAverage(m, rows, 1e-12, StopCheck{}, eval, next, &counts));
  EXPECT_EQ(counts.iterative, 0);
  EXPECT_GE(counts.factored, 1);
  EXPECT_NEAR(next.gain[0], ClimbingChainLaw(n).gain, 1e-13);
  EXPECT_EQ(next.missed_iterative_size, n - 1);
}

// Two classes (the ring is cut into two closed arcs) and transient states between them,
// all beyond the small solver: gains per state against the absorption probabilities
// computed by Eigen's LU on the transient system.
TEST(AverageScaleTest, FactoredTransientGainsMatchEigen) {
  const StateId n = 11000;  // Arcs [0, 3500) and [7500, n) closed; [3500, 7500) transient.
  std::mt19937_64 rng(11);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.criterion.kind = CriterionKind::kAverage;
  spec.criterion.discount = 1.0;
  spec.action_names = {"go"};
  auto arc = [](StateId s) { return s < 3500 ? 0 : s >= 7500 ? 2 : 1; };
  for (StateId s = 0; s < n; ++s) {
    spec.AddState("s" + std::to_string(s));
    spec.AddStateAction(0, arc(s) == 0 ? 1.0 + 0.1 * unit(rng) : arc(s) == 2 ? -unit(rng) : 0.5);
    std::vector<StateId> next;
    for (int k = -3; k <= 3; ++k) {
      const StateId t = s + k;
      if (t < 0 || t >= n || k == 0) continue;
      if (arc(s) != 1 && arc(t) != arc(s)) continue;  // Closed arcs.
      next.push_back(t);
    }
    for (StateId t : next) spec.AddOutcome(t, 1.0 / next.size());
  }
  const Model m = testing::MustBuild(spec);
  const std::vector<RowId> rows = FirstRows(m);
  AverageEvaluation eval;
  AverageSolveCounts counts;
  ASSERT_OK(EvaluateAverage(m, rows, 1e-12, StopCheck{}, {}, eval, &counts));
  ASSERT_EQ(eval.chain.classes.size(), 2u);
  EXPECT_GE(counts.factored, 3);
  EXPECT_EQ(counts.small_lu, 0);
  EXPECT_EQ(counts.iterative, 0);
  // Reference: (I - P_TT) g_T = P_TR g_R by Eigen, with the class gains from Eigen too.
  auto class_gain = [&](StateId first, StateId last) {
    // A symmetric walk on an arc with reflecting ends is doubly stochastic up to the ends;
    // take the gain from Eigen on the class alone.
    const StateId size = last - first;
    std::vector<Eigen::Triplet<double>> t;
    Eigen::VectorXd b(size);
    for (StateId i = 0; i < size; ++i) {
      const StateId s = first + i;
      t.emplace_back(i, 0, 1.0);
      if (i > 0) t.emplace_back(i, i, 1.0);
      for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
        if (m.entry_next(e) - first > 0) {
          t.emplace_back(i, m.entry_next(e) - first, -m.entry_probability(e));
        }
      }
      b[i] = m.row_reward(rows[s]);
    }
    Eigen::SparseMatrix<double> a(size, size);
    a.setFromTriplets(t.begin(), t.end());
    Eigen::SparseLU<Eigen::SparseMatrix<double>> lu(a);
    return static_cast<double>(lu.solve(b)[0]);
  };
  const double g0 = class_gain(0, 3500);
  const double g2 = class_gain(7500, n);
  EXPECT_NEAR(eval.gain[0], g0, 1e-10);
  EXPECT_NEAR(eval.gain[n - 1], g2, 1e-10);
  const StateId size = 4000;
  std::vector<Eigen::Triplet<double>> t;
  Eigen::VectorXd b = Eigen::VectorXd::Zero(size);
  for (StateId i = 0; i < size; ++i) {
    const StateId s = 3500 + i;
    t.emplace_back(i, i, 1.0);
    for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
      const StateId to = m.entry_next(e);
      if (arc(to) == 1) {
        t.emplace_back(i, to - 3500, -m.entry_probability(e));
      } else {
        b[i] += m.entry_probability(e) * (arc(to) == 0 ? g0 : g2);
      }
    }
  }
  Eigen::SparseMatrix<double> a(size, size);
  a.setFromTriplets(t.begin(), t.end());
  Eigen::SparseLU<Eigen::SparseMatrix<double>> lu(a);
  const Eigen::VectorXd g_t = lu.solve(b);
  double worst = 0.0;
  for (StateId i = 0; i < size; ++i) {
    worst = std::max(worst, std::fabs(eval.gain[3500 + i] - g_t[i]));
  }
  EXPECT_LE(worst, 1e-9);
  EXPECT_LE(eval.gain_error, 1e-8);
}

// Checked by its residual in long double: the true gain of a policy is pi (r + P h - h) for
// any h, so it lies within max |r + P h - h - g| of g (Eigen's LU would take seconds here).
TEST(AverageScaleTest, ExpanderTakesTheIterativeSolver) {
  const Model m = testing::MustBuild(RandomNextSpec(7, 3500));
  const std::vector<RowId> rows = FirstRows(m);
  AverageEvaluation eval;
  AverageSolveCounts counts;
  ASSERT_OK(EvaluateAverage(m, rows, 1e-11, StopCheck{}, {}, eval, &counts));
  ASSERT_EQ(eval.chain.classes.size(), 1u);
  EXPECT_EQ(counts.factored, 0);
  EXPECT_GE(counts.iterative, 1);
  EXPECT_LE(EquationResidual(m, rows, eval.bias, eval.gain[0]), 1e-9);
  // The next evaluation, given this one, does not plan factors again.
  AverageEvaluation next;
  ASSERT_OK(EvaluateAverage(m, RandomRows(m, 3), 1e-11, StopCheck{}, eval, next, &counts));
  EXPECT_EQ(counts.factored, 0);
  EXPECT_LE(next.declined_factor_size, m.num_states());
}

// A stop already due is heard by the evaluation itself, before any policy is improved.
TEST(AverageScaleTest, EvaluationHearsCancelAndDeadline) {
  const Model m = testing::MustBuild(LocalRingSpec(6, 4000, 2, 6, 12));
  const std::vector<RowId> rows = FirstRows(m);
  CancelToken cancel;
  cancel.Cancel();
  AverageEvaluation eval;
  EXPECT_EQ(EvaluateAverage(m, rows, 1e-12, StopCheck{&cancel}, {}, eval).code(),
            StatusCode::kCancelled);
  StopCheck past;
  past.deadline = StopCheck::Clock::now() - std::chrono::seconds(1);
  EXPECT_EQ(EvaluateAverage(m, rows, 1e-12, past, {}, eval).code(), StatusCode::kDeadlineExceeded);
}

// ---------------------------------------------------------------------------------------
// Policy iteration on a slowly mixing ring beyond the small solver.

// The optimality equation's bracket recomputed in long double from the returned bias:
// d(s) = max_a [r + P h] - h(s); g* lies in [min d, max d] for any h (average_reward.h).
struct Bracket {
  double lower = 0.0;
  double upper = 0.0;
};
// Over the states [first, last) only (last < 0: to the end): the bracket of that part of the
// model when no transition leaves it.
Bracket BracketAt(const Model& m, const std::vector<double>& h, StateId first = 0,
                  StateId last = -1) {
  long double lower = INFINITY, upper = -INFINITY;
  for (StateId s = first; s < (last < 0 ? m.num_states() : last); ++s) {
    long double best = -INFINITY;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      long double q = m.row_reward(r);
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        q += static_cast<long double>(m.entry_probability(e)) * h[m.entry_next(e)];
      }
      best = std::max(best, q);
    }
    lower = std::min(lower, best - h[s]);
    upper = std::max(upper, best - h[s]);
  }
  return {static_cast<double>(lower), static_cast<double>(upper)};
}

TEST(AverageScaleTest, PolicyIterationSolvesASlowlyMixingRing) {
  const StateId n = 6000;
  const Model m = testing::MustBuild(LocalRingSpec(8, n, 4, 8, 16));
  Result<AverageRewardSolution> s =
      AverageRewardPolicyIteration(m, AverageRewardOptions(), nullptr, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  const Bracket b = BracketAt(m, s->bias);
  EXPECT_LE(b.upper - b.lower, AverageRewardOptions().tolerance);
  EXPECT_LE(s->gain_lower, b.lower + 1e-12);
  EXPECT_GE(s->gain_upper, b.upper - 1e-12);
  // The chosen policy earns the gain, by Eigen's evaluation of it.
  const std::vector<RowId> rows(s->best_row.begin(), s->best_row.end());
  const Reference ref = EigenEvaluation(m, rows);
  EXPECT_NEAR(ref.gain, s->gain, 1e-8);
  EXPECT_GE(ref.gain, s->gain_lower - s->policy_loss_bound);

  // Minimising the negated rewards is the mirror image.
  ModelSpec negated = LocalRingSpec(8, n, 4, 8, 16);
  negated.objective = Objective::kMinimize;
  for (double& r : negated.slot_reward) r = -r;
  Result<AverageRewardSolution> t = AverageRewardPolicyIteration(
      testing::MustBuild(negated), AverageRewardOptions(), nullptr, nullptr);
  ASSERT_OK(t);
  EXPECT_EQ(t->outcome, SolveOutcome::kConverged);
  EXPECT_NEAR(t->gain, -s->gain, 1e-8);
}

// A time limit too short for one evaluation: the first evaluation hears it (the method's
// own check comes only after an evaluation), and the answer is the starting policy's honest
// bracket around the optimum found by an unlimited run.
TEST(AverageScaleTest, PolicyIterationStopsInsideTheFirstEvaluation) {
  const Model m = testing::MustBuild(LocalRingSpec(8, 6000, 4, 8, 16));
  Result<AverageRewardSolution> full =
      AverageRewardPolicyIteration(m, AverageRewardOptions(), nullptr, nullptr);
  ASSERT_OK(full);
  AverageRewardOptions limited;
  limited.time_limit_seconds = 1e-9;
  Result<AverageRewardSolution> s = AverageRewardPolicyIteration(m, limited, nullptr, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kTimeLimit);
  EXPECT_EQ(s->iterations, 0);
  EXPECT_LE(s->gain_lower, full->gain_upper);
  EXPECT_GE(s->gain_upper, full->gain_lower);

  CancelToken cancel;
  cancel.Cancel();
  s = AverageRewardPolicyIteration(m, AverageRewardOptions(), nullptr, &cancel);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kCancelled);
  EXPECT_EQ(s->iterations, 0);
  EXPECT_LE(s->gain_lower, full->gain_upper);
  EXPECT_GE(s->gain_upper, full->gain_lower);

  // Cancelled from the progress report after the first improvement: one iteration, and a
  // bracket that still holds the optimum.
  CancelToken later;
  ProgressFn progress = [&](const Progress&) { later.Cancel(); };
  s = AverageRewardPolicyIteration(m, AverageRewardOptions(), &progress, &later);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kCancelled);
  EXPECT_EQ(s->iterations, 1);
  EXPECT_LE(s->gain_lower, full->gain_upper);
  EXPECT_GE(s->gain_upper, full->gain_lower);
}

// ---------------------------------------------------------------------------------------
// The method `auto` beyond the small solver (AverageRewardAutomatic).

// Every row of every state, whatever the action, jumps to one of 8 hub states with the same
// probabilities mu (the first 8 states, mu(k) = (k + 1) / 36). The next state never depends
// on the action, so the chain's stationary law is mu under every policy, and the best
// policy takes the larger reward in every state: g* = sum_k mu(k) max_a r(k, a). Rewards
// r(s, a) = ((7 s + 3 a) mod 11) / 10 with actions a = 0, 1, 2.
ModelSpec HubSpec(StateId states) {
  ModelSpec spec;
  spec.criterion.kind = CriterionKind::kAverage;
  spec.criterion.discount = 1.0;
  spec.action_names = {"a0", "a1", "a2"};
  for (StateId s = 0; s < states; ++s) {
    spec.AddState("s" + std::to_string(s));
    for (int a = 0; a < 3; ++a) {
      spec.AddStateAction(a, static_cast<double>((7 * s + 3 * a) % 11) / 10.0);
      for (StateId k = 0; k < 8; ++k) spec.AddOutcome(k, static_cast<double>(k + 1) / 36.0);
    }
  }
  return spec;
}

TEST(AverageAutomaticTest, ChainsThatMixFastAreAnsweredByRelativeValueIteration) {
  // The closed form of HubSpec.
  const Model hub = testing::MustBuild(HubSpec(4000));
  double g_star = 0.0;
  for (StateId k = 0; k < 8; ++k) {
    double best = 0.0;
    for (int a = 0; a < 3; ++a) best = std::max(best, static_cast<double>((7 * k + 3 * a) % 11));
    g_star += static_cast<double>(k + 1) / 36.0 * best / 10.0;
  }
  SolveOptions o;
  o.tolerance = 1e-9;
  Result<Solution> s = Solve(hub, o);
  ASSERT_OK(s);
  EXPECT_EQ(s->method, Method::kRelativeValueIteration);
  EXPECT_EQ(s->options.method, Method::kRelativeValueIteration);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  EXPECT_LE(s->average.gain_lower, g_star + 1e-12);
  EXPECT_GE(s->average.gain_upper, g_star - 1e-12);
  EXPECT_LE(s->average.gain_upper - s->average.gain_lower, o.tolerance);

  // An expander: the bracket recomputed in long double from the returned bias is as narrow
  // as asked, and policy iteration's gain, asked for by name, lies in it.
  const Model m = testing::MustBuild(RandomNextSpec(5, 6000));
  s = Solve(m, o);
  ASSERT_OK(s);
  EXPECT_EQ(s->method, Method::kRelativeValueIteration);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  EXPECT_LE(s->sweeps, 100);
  const Bracket b = BracketAt(m, s->values);
  EXPECT_LE(b.upper - b.lower, o.tolerance);
  o.method = Method::kPolicyIteration;
  Result<Solution> pi = Solve(m, o);
  ASSERT_OK(pi);
  EXPECT_EQ(pi->method, Method::kPolicyIteration);
  EXPECT_GE(pi->average.gain, b.lower - 1e-12);
  EXPECT_LE(pi->average.gain, b.upper + 1e-12);

  // Up to 3,000 states policy iteration answers (its evaluations are small exact solves).
  o.method = Method::kAuto;
  s = Solve(testing::MustBuild(RandomNextSpec(5, kAutomaticPreludeMinStates)), o);
  ASSERT_OK(s);
  EXPECT_EQ(s->method, Method::kPolicyIteration);
}

TEST(AverageAutomaticTest, ASlowlyMixingRingIsHandedToPolicyIteration) {
  const Model m = testing::MustBuild(LocalRingSpec(8, 6000, 4, 8, 16));
  Result<AverageRewardSolution> pi =
      AverageRewardPolicyIteration(m, AverageRewardOptions(), nullptr, nullptr);
  ASSERT_OK(pi);
  std::vector<Progress> reports;
  const ProgressFn progress = [&](const Progress& p) { reports.push_back(p); };
  Result<AverageRewardSolution> s =
      AverageRewardAutomatic(m, AverageRewardOptions(), &progress, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->method, AverageRewardMethod::kPolicyIteration);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  EXPECT_EQ(s->iterations, pi->iterations);
  EXPECT_NEAR(s->gain, pi->gain, 1e-9);
  const Bracket b = BracketAt(m, s->bias);
  EXPECT_LE(b.upper - b.lower, AverageRewardOptions().tolerance);
  // The prelude's sweeps count too, and it gave up long before its budget: the ring's
  // bracket shrinks slowly from the start.
  EXPECT_GT(s->sweeps, pi->sweeps);
  EXPECT_LE(s->sweeps, pi->sweeps + 64);
  // One progress stream: relative value iteration's sweeps, then policy iteration's
  // improvements continuing the count.
  ASSERT_FALSE(reports.empty());
  EXPECT_EQ(reports.front().phase, "sweep");
  EXPECT_EQ(reports.back().phase, "improve");
  for (size_t i = 1; i < reports.size(); ++i) {
    EXPECT_GE(reports[i].sweeps, reports[i - 1].sweeps) << "report " << i;
    EXPECT_GE(reports[i].elapsed_seconds, reports[i - 1].elapsed_seconds) << "report " << i;
  }
  EXPECT_LE(reports.back().sweeps, s->sweeps);

  // A time limit that ends the prelude: its bracket, which holds the optimum.
  AverageRewardOptions limited;
  limited.time_limit_seconds = 1e-9;
  s = AverageRewardAutomatic(m, limited, nullptr, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kTimeLimit);
  EXPECT_LE(s->gain_lower, pi->gain_upper);
  EXPECT_GE(s->gain_upper, pi->gain_lower);
}

// An iteration cap of 16 (relative value iteration's sweeps, then policy iteration's
// improvements) on a ring of moves of at most 2 states: the prelude hands over at sweep 16,
// before the cap, and policy iteration (270 improvements uncapped) stops at the cap. The
// answer carries the narrower of the two runs' brackets, each exactly what a run of its own
// with that cap reports (both are deterministic on one thread), and names the method that
// gave it.
TEST(AverageAutomaticTest, AnIterationCapKeepsTheNarrowerOfTheTwoBrackets) {
  const Model m = testing::MustBuild(LocalRingSpec(8, 10000, 4, 8, 2));
  AverageRewardOptions capped;
  capped.max_iterations = 16;
  Result<AverageRewardSolution> rvi = RelativeValueIteration(m, capped, nullptr, nullptr);
  Result<AverageRewardSolution> pi = AverageRewardPolicyIteration(m, capped, nullptr, nullptr);
  ASSERT_OK(rvi);
  ASSERT_OK(pi);
  ASSERT_EQ(rvi->outcome, SolveOutcome::kIterationLimit);
  ASSERT_EQ(pi->outcome, SolveOutcome::kIterationLimit);
  Result<AverageRewardSolution> s = AverageRewardAutomatic(m, capped, nullptr, nullptr);
  ASSERT_OK(s);
  EXPECT_EQ(s->outcome, SolveOutcome::kIterationLimit);
  const double rvi_width = rvi->gain_upper - rvi->gain_lower;
  const double pi_width = pi->gain_upper - pi->gain_lower;
  EXPECT_EQ(s->gain_upper - s->gain_lower, std::min(rvi_width, pi_width))
      << "relative value iteration " << rvi_width << ", policy iteration " << pi_width;
  EXPECT_EQ(s->method, rvi_width <= pi_width ? AverageRewardMethod::kRelativeValueIteration
                                             : AverageRewardMethod::kPolicyIteration);
  // The recomputed bracket of the returned bias agrees.
  const Bracket b = BracketAt(m, s->bias);
  EXPECT_LE(s->gain_lower, b.lower + 1e-12);
  EXPECT_GE(s->gain_upper, b.upper - 1e-12);
}

// Two expanders side by side, no transition between them, the second's rewards 1 higher:
// the optimal gain differs between the halves. The prelude cannot narrow its bracket below
// that difference; policy iteration answers with a gain per state. Each half is a model of
// its own, so its gains lie in the bracket of its own states (recomputed in long double).
TEST(AverageAutomaticTest, GainsThatDifferBetweenStatesAreLeftToPolicyIteration) {
  const StateId half = 3500;
  ModelSpec spec = RandomNextSpec(9, 2 * half);
  for (StateId s = 0; s < 2 * half; ++s) {
    for (SlotId slot = spec.state_first_slot[s]; slot < spec.state_first_slot[s + 1]; ++slot) {
      if (s >= half) spec.slot_reward[slot] += 1.0;
      for (OutcomeId e = spec.slot_first_outcome[slot]; e < spec.slot_first_outcome[slot + 1];
           ++e) {
        spec.outcome_next[e] = spec.outcome_next[e] % half + (s >= half ? half : 0);
      }
    }
  }
  const Model m = testing::MustBuild(spec);
  SolveOptions o;
  Result<Solution> s = Solve(m, o);
  ASSERT_OK(s);
  EXPECT_EQ(s->method, Method::kPolicyIteration);
  EXPECT_EQ(s->outcome, SolveOutcome::kConverged);
  ASSERT_EQ(s->average.state_gain.size(), 2u * half);
  for (int part = 0; part < 2; ++part) {
    const Bracket b = BracketAt(m, s->values, part * half, (part + 1) * half);
    SCOPED_TRACE("half " + std::to_string(part));
    EXPECT_LE(b.upper - b.lower, 1e-7);
    for (StateId st = part * half; st < (part + 1) * half; ++st) {
      EXPECT_GE(s->average.state_gain[st], b.lower - 1e-9);
      EXPECT_LE(s->average.state_gain[st], b.upper + 1e-9);
    }
  }
  EXPECT_GT(s->average.state_gain[half] - s->average.state_gain[0], 0.5);
}

}  // namespace
}  // namespace mdp
