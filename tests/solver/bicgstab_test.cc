// Tests of the BiCGSTAB pass (solver/internal/bicgstab.h) on its own, through a test operator
// built on Eigen's sparse matrices (its products and its lower-triangular solves are Eigen's,
// not ours): answers against Eigen's dense LU, the work accounting against the operator calls
// counted here, and the budget, interruption and look rules of the contract.
#include "solver/internal/bicgstab.h"

#include <gtest/gtest.h>

#include <Eigen/Dense>
#include <Eigen/SparseCore>
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <functional>
#include <random>
#include <string>
#include <utility>
#include <vector>

#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using internal::BiCgStab;
using internal::BiCgStabLook;
using internal::BiCgStabLookFn;
using internal::kLowerSolveCost;
using internal::Preconditioner;

using RowMajorMatrix = Eigen::SparseMatrix<double, Eigen::RowMajor>;

const std::function<bool()> kNever = [] { return false; };
constexpr Preconditioner kBoth[] = {Preconditioner::kDiagonal, Preconditioner::kLowerTriangle};

// The operator BiCgStab needs, over a sparse matrix A; counts its products and solves.
class SparseSystem {
 public:
  explicit SparseSystem(RowMajorMatrix a) : a_(std::move(a)), diagonal_(a_.rows()) {
    for (int64_t i = 0; i < size(); ++i) diagonal_[i] = a_.coeff(i, i);
  }

  int64_t size() const { return a_.rows(); }
  void MultiplySystem(const double* x, double* y, int /*threads*/) const {
    ++products_;
    Eigen::Map<Eigen::VectorXd>(y, size()) = a_ * Eigen::Map<const Eigen::VectorXd>(x, size());
  }
  // The whole lower triangle: these test systems have fewer than kLowerSolveBlock unknowns,
  // one block.
  void LowerSolve(const double* b, double* z, int /*threads*/) const {
    EXPECT_LT(size(), internal::kLowerSolveBlock);
    ++lower_solves_;
    Eigen::Map<Eigen::VectorXd>(z, size()) =
        a_.triangularView<Eigen::Lower>().solve(Eigen::Map<const Eigen::VectorXd>(b, size()));
  }
  const std::vector<double>& diagonal() const { return diagonal_; }

  const RowMajorMatrix& matrix() const { return a_; }
  // The work the pass should report for the calls made since the last Reset.
  double counted_work() const { return products_ + kLowerSolveCost * lower_solves_; }
  int products() const { return products_; }
  void Reset() const { products_ = lower_solves_ = 0; }

 private:
  RowMajorMatrix a_;
  std::vector<double> diagonal_;
  mutable int products_ = 0;
  mutable int lower_solves_ = 0;
};

// I - g P for a seeded random substochastic P: each state has up to 8 next states (itself
// possibly among them), with probabilities summing to between 0.3 and 1.
RowMajorMatrix RandomSystem(uint64_t seed, int n, double g) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  std::vector<Eigen::Triplet<double>> triplets;
  for (int i = 0; i < n; ++i) {
    triplets.emplace_back(i, i, 1.0);
    const int outcomes = 1 + static_cast<int>(rng() % 8);
    std::vector<int> next(outcomes);
    std::vector<double> weight(outcomes);
    double sum = 0.0;
    for (int k = 0; k < outcomes; ++k) {
      next[k] = static_cast<int>(rng() % n);
      weight[k] = unit(rng);
      sum += weight[k];
    }
    const double mass = 0.3 + 0.7 * unit(rng);
    for (int k = 0; k < outcomes; ++k) {
      triplets.emplace_back(i, next[k], -g * mass * weight[k] / sum);  // Duplicates are summed.
    }
  }
  RowMajorMatrix a(n, n);
  a.setFromTriplets(triplets.begin(), triplets.end());
  return a;
}

// I - g S for the ring shift S: s -> s + 1 (mod n). Every eigenvalue of S lies on the unit
// circle, so a Krylov method gains only about a factor g per product here: many iterations.
RowMajorMatrix RingSystem(int n, double g) {
  std::vector<Eigen::Triplet<double>> triplets;
  for (int i = 0; i < n; ++i) {
    triplets.emplace_back(i, i, 1.0);
    triplets.emplace_back(i, (i + 1) % n, -g);
  }
  RowMajorMatrix a(n, n);
  a.setFromTriplets(triplets.begin(), triplets.end());
  return a;
}

std::vector<double> RandomVector(uint64_t seed, int n) {
  return testing::SomeValues(n, seed, -10.0, 10.0);
}

// b - A x, computed here with Eigen.
std::vector<double> TrueResidual(const RowMajorMatrix& a, const std::vector<double>& b,
                                 const std::vector<double>& x) {
  const Eigen::VectorXd r = Eigen::Map<const Eigen::VectorXd>(b.data(), b.size()) -
                            a * Eigen::Map<const Eigen::VectorXd>(x.data(), x.size());
  return std::vector<double>(r.data(), r.data() + r.size());
}

double Sup(const std::vector<double>& v) {
  double sup = 0.0;
  for (double x : v) sup = std::max(sup, std::fabs(x));
  return sup;
}

double SupDiff(const std::vector<double>& u, const std::vector<double>& v) {
  double sup = 0.0;
  for (size_t i = 0; i < u.size(); ++i) sup = std::max(sup, std::fabs(u[i] - v[i]));
  return sup;
}

std::string Name(Preconditioner c) {
  return c == Preconditioner::kDiagonal ? "diagonal" : "lower triangle";
}

TEST(BiCgStabTest, ReachesTheAimAndTheDenseLuSolution) {
  const int n = 60;
  const double g = 0.95;
  const double aim = 1e-10;
  // The recursive residual drifts from the true one by rounding only on a system this small.
  const double drift = 1e-12;
  for (uint64_t seed : {1u, 2u, 3u}) {
    const SparseSystem system(RandomSystem(seed, n, g));
    const std::vector<double> b = RandomVector(100 + seed, n);
    // The independent answer: Eigen's dense LU with partial pivoting.
    const Eigen::VectorXd exact = Eigen::MatrixXd(system.matrix())
                                      .partialPivLu()
                                      .solve(Eigen::Map<const Eigen::VectorXd>(b.data(), n));
    const std::vector<double> expected(exact.data(), exact.data() + n);
    for (Preconditioner c : kBoth) {
      for (int threads : {1, 2}) {
        SCOPED_TRACE("seed " + std::to_string(seed) + ", " + Name(c) + ", threads " +
                     std::to_string(threads));
        std::vector<double> x = RandomVector(200 + seed, n);  // A warm start.
        std::vector<double> res = TrueResidual(system.matrix(), b, x);
        BiCgStab<SparseSystem> krylov(system, threads);
        system.Reset();
        const double budget = 1000.0;
        const double work = krylov.Pass(c, aim, budget, kNever, {}, x, res);
        EXPECT_LE(Sup(res), aim);  // The recursive residual, returned in res.
        const std::vector<double> true_residual = TrueResidual(system.matrix(), b, x);
        EXPECT_LE(SupDiff(res, true_residual), drift);
        EXPECT_LE(Sup(true_residual), aim + drift);
        // sup |x - x*| <= sup |b - A x| / (1 - g), as sup-norm ||(I - g P)^-1|| <= 1 / (1 - g).
        EXPECT_LE(SupDiff(x, expected), (aim + drift) / (1.0 - g) + 1e-12 * Sup(expected));
        EXPECT_NEAR(work, system.counted_work(), 1e-9);
        EXPECT_GT(work, 0.0);
        EXPECT_LE(work, budget);
      }
    }
  }
}

// Where the preconditioner M is A itself (a diagonal A for kDiagonal, a lower-triangular A for
// kLowerTriangle), A M^-1 = I and the first half step solves the system: one product and,
// for the lower triangle, one solve.
TEST(BiCgStabTest, EachPreconditionerSolvesInOneHalfStepWhereItIsExact) {
  const int n = 60;
  const double g = 0.95;
  std::mt19937_64 rng(14);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  for (Preconditioner c : kBoth) {
    SCOPED_TRACE(Name(c));
    const bool lower = c == Preconditioner::kLowerTriangle;
    std::vector<Eigen::Triplet<double>> triplets;
    for (int i = 0; i < n; ++i) {
      const double self = unit(rng);  // Self-loops make the diagonal range over [1 - g, 1].
      triplets.emplace_back(i, i, 1.0 - g * self);
      if (lower && i > 0) {
        triplets.emplace_back(i, static_cast<int>(rng() % i), -g * (1.0 - self));
      }
    }
    RowMajorMatrix a(n, n);
    a.setFromTriplets(triplets.begin(), triplets.end());
    const SparseSystem system(a);
    const std::vector<double> b = RandomVector(15, n);
    std::vector<double> x(n, 0.0), res = b;
    BiCgStab<SparseSystem> krylov(system, 1);
    system.Reset();
    const double aim = 1e-10;
    const double work = krylov.Pass(c, aim, 1000.0, kNever, {}, x, res);
    EXPECT_EQ(work, lower ? 1.0 + kLowerSolveCost : 1.0);
    const Eigen::VectorXd exact =
        Eigen::MatrixXd(a).partialPivLu().solve(Eigen::Map<const Eigen::VectorXd>(b.data(), n));
    const std::vector<double> expected(exact.data(), exact.data() + n);
    EXPECT_LE(Sup(TrueResidual(a, b, x)), aim);
    EXPECT_LE(SupDiff(x, expected), aim / (1.0 - g));
  }
}

TEST(BiCgStabTest, NoIterationRunsPastTheBudget) {
  const int n = 60;
  const SparseSystem system(RandomSystem(7, n, 0.95));
  const std::vector<double> b = RandomVector(8, n);
  for (Preconditioner c : kBoth) {
    const double iteration =
        2.0 * (c == Preconditioner::kLowerTriangle ? 1.0 + kLowerSolveCost : 1.0);
    for (double budget : {0.5 * iteration, 2.5 * iteration, 3.25 * iteration}) {
      SCOPED_TRACE(Name(c) + ", budget " + std::to_string(budget));
      std::vector<double> x(n, 0.0), res = b;
      BiCgStab<SparseSystem> krylov(system, 1);
      system.Reset();
      // Aim 0: only the budget ends this pass (a few iterations do not solve it exactly).
      const double work = krylov.Pass(c, 0.0, budget, kNever, {}, x, res);
      EXPECT_NEAR(work, system.counted_work(), 1e-9);
      EXPECT_LE(work, budget);
      EXPECT_GT(work + iteration, budget);  // Another iteration would not have fitted.
    }
  }
}

TEST(BiCgStabTest, AnInterruptionBeforeTheFirstIterationLeavesXAlone) {
  const int n = 60;
  const SparseSystem system(RandomSystem(9, n, 0.95));
  const std::vector<double> b = RandomVector(10, n);
  for (Preconditioner c : kBoth) {
    SCOPED_TRACE(Name(c));
    const std::vector<double> start = RandomVector(11, n);
    std::vector<double> x = start, res = TrueResidual(system.matrix(), b, x);
    const std::vector<double> start_res = res;
    BiCgStab<SparseSystem> krylov(system, 1);
    system.Reset();
    int polls = 0;
    const double work = krylov.Pass(
        c, 1e-10, 1000.0, [&] { return ++polls > 0; }, {}, x, res);
    EXPECT_EQ(polls, 1);
    EXPECT_EQ(work, 0.0);
    EXPECT_EQ(system.counted_work(), 0.0);
    EXPECT_EQ(x, start);
    EXPECT_EQ(res, start_res);
  }
}

// The look sees the current iterate every kLookEvery work units; the pass ends at the first
// look that meets the caller's aim (here: the true residual, computed in the look, halved).
TEST(BiCgStabTest, ThePassEndsAtTheFirstLookThatMeetsTheAim) {
  const int n = 5000;
  const double g = 0.99;
  const SparseSystem system(RingSystem(n, g));
  const std::vector<double> b = RandomVector(12, n);
  std::vector<double> x(n, 0.0), res = b;
  const double goal = 0.5 * Sup(b);
  std::vector<int> products_at_look;
  std::vector<bool> met;
  const BiCgStabLookFn look = [&](const std::vector<double>& y) {
    products_at_look.push_back(system.products());
    const std::vector<double> r = TrueResidual(system.matrix(), b, y);
    met.push_back(Sup(r) <= goal);
    double sum = 0.0;
    for (double v : r) sum += v * v;
    return BiCgStabLook{met.back(), false, std::sqrt(sum)};
  };
  BiCgStab<SparseSystem> krylov(system, 2);
  system.Reset();
  // Aim 0 for the recursive residual: only the look (or the budget) can end this pass.
  const double budget = 100000.0;
  const double work = krylov.Pass(Preconditioner::kDiagonal, 0.0, budget, kNever, look, x, res);
  ASSERT_FALSE(met.empty());
  EXPECT_TRUE(met.back());
  EXPECT_EQ(std::count(met.begin(), met.end(), true), 1);
  for (size_t k = 0; k < products_at_look.size(); ++k) {
    // With the diagonal preconditioner the work is the products; looks come every
    // kLookEvery of them.
    EXPECT_EQ(products_at_look[k], (k + 1) * BiCgStab<SparseSystem>::kLookEvery) << k;
  }
  EXPECT_EQ(work, products_at_look.back());  // Nothing after the look that met the aim.
  EXPECT_LE(Sup(TrueResidual(system.matrix(), b, x)), goal);  // x is the iterate it saw.
}

// A look whose 2-norm never reaches a new low ends the pass after kStaleLooks looks when it
// says it is near the aim, and never when it says it is far from it.
TEST(BiCgStabTest, StagnationEndsThePassOnlyNearTheAim) {
  const int n = 5000;
  const SparseSystem system(RingSystem(n, 0.99));
  const std::vector<double> b = RandomVector(13, n);
  using Pass = BiCgStab<SparseSystem>;
  for (bool near : {true, false}) {
    SCOPED_TRACE(near ? "near" : "far");
    std::vector<double> x(n, 0.0), res = b;
    int looks = 0;
    // A norm above the initial residual's: never a new low.
    const BiCgStabLookFn look = [&](const std::vector<double>&) {
      ++looks;
      return BiCgStabLook{false, near, 1e300};
    };
    Pass krylov(system, 1);
    system.Reset();
    const double budget = 1000.0;  // Whole iterations of work 2 fill it exactly.
    const double work = krylov.Pass(Preconditioner::kDiagonal, 0.0, budget, kNever, look, x, res);
    EXPECT_NEAR(work, system.counted_work(), 1e-9);
    if (near) {
      EXPECT_EQ(looks, Pass::kStaleLooks);
      EXPECT_EQ(work, Pass::kStaleLooks * Pass::kLookEvery);
    } else {
      // Looks at kLookEvery, 2 kLookEvery, ... while an iteration (work 2) still fits.
      EXPECT_EQ(looks, static_cast<int>(std::floor((budget - 2.0) / Pass::kLookEvery)));
      EXPECT_EQ(work, budget);
    }
  }
}

}  // namespace
}  // namespace mdp
