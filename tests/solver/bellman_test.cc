// Tests the two compiled copies of the Bellman sweeps (solver/internal/bellman.h): each must
// compute the Bellman backup, checked against the definition written out plainly in this
// test, and the per-model choice between them must follow the model's locality. On a CPU
// without AVX2 and FMA the gather copy falls back to the portable one, so the value checks
// still run (and still check the portable copy).
#include "solver/internal/bellman.h"

#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <random>
#include <string>
#include <vector>

#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using internal::KernelSet;
using testing::SomeValues;

// (T v)(s) from the definition: the max (or min) over the rows of s of
// r + g * sum p v(next), or 0 at a terminal state. Each row's sum is kept in long double, so
// this is not the kernels' arithmetic.
double DefinitionBackupAt(const Model& m, const std::vector<double>& v, StateId s, double g) {
  double best = 0.0;
  for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
    long double acc = 0.0L;
    for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
      acc += static_cast<long double>(m.entry_probability(e)) * v[m.entry_next(e)];
    }
    const double q = static_cast<double>(m.row_reward(r) + g * acc);
    const bool better = m.objective() == Objective::kMaximize ? q > best : q < best;
    if (r == m.row_begin(s) || better) best = q;
  }
  return best;
}

std::vector<double> DefinitionBackup(const Model& m, const std::vector<double>& v, double g) {
  std::vector<double> out(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) out[s] = DefinitionBackupAt(m, v, s, g);
  return out;
}

// Rows of 1 to 12 outcomes, so every tail length of the gather loop (0-3 after blocks of 4
// and 8) occurs.
Model VariedRowsModel(Objective objective) {
  testing::RandomModelOptions o;
  o.states = 3000;
  o.max_outcomes = 12;
  o.objective = objective;
  o.discount = 0.97;
  return testing::MustBuild(testing::RandomSpec(31, o));
}

double Scale(const std::vector<double>& v) {
  double s = 1.0;
  for (double x : v) s = std::max(s, std::fabs(x));
  return s;
}

TEST(BellmanKernelsTest, BothCopiesComputeTheBackup) {
  for (Objective objective : {Objective::kMaximize, Objective::kMinimize}) {
    const Model m = VariedRowsModel(objective);
    std::vector<int> lengths(13, 0);
    for (RowId r = 0; r < m.num_rows(); ++r) ++lengths[m.entry_end(r) - m.entry_begin(r)];
    for (int k = 1; k <= 11; ++k) ASSERT_GT(lengths[k], 0) << "no row with " << k << " entries";

    const std::vector<double> v = SomeValues(m.num_states(), 5);
    const std::vector<double> expected = DefinitionBackup(m, v, m.discount());
    const double tolerance = 1e-13 * Scale(expected);
    for (KernelSet k : {KernelSet::kPortable, KernelSet::kGather}) {
      for (int threads : {1, 2}) {
        SCOPED_TRACE("kernels " + std::to_string(static_cast<int>(k)) + ", threads " +
                     std::to_string(threads));
        std::vector<double> out(m.num_states(), -1.0);
        const double diff = internal::SyncSweep(m, v.data(), out.data(), threads, k);
        double expected_diff = 0.0;
        for (StateId s = 0; s < m.num_states(); ++s) {
          ASSERT_NEAR(out[s], expected[s], tolerance) << "state " << s;
          expected_diff = std::max(expected_diff, std::fabs(expected[s] - v[s]));
        }
        EXPECT_NEAR(diff, expected_diff, tolerance);
      }
    }
  }
}

// Gauss-Seidel over states [lo, hi) in index order, from the definition: v starts as the
// old values and is updated in place, so each backup reads the new values of the states
// already swept and the old values of all others.
std::vector<double> DefinitionGaussSeidel(const Model& m, std::vector<double> v, StateId lo,
                                          StateId hi) {
  for (StateId s = lo; s < hi; ++s) v[s] = DefinitionBackupAt(m, v, s, m.discount());
  return v;
}

TEST(BellmanKernelsTest, BothCopiesSweepGaussSeidelInOrder) {
  testing::RandomModelOptions o;
  o.states = 2000;
  o.max_outcomes = 12;
  o.discount = 0.9;
  const Model m = testing::MustBuild(testing::RandomSpec(47, o));
  const std::vector<double> v = SomeValues(m.num_states(), 9);
  const double tolerance = 1e-12 * Scale(v);
  const std::vector<double> expected = DefinitionGaussSeidel(m, v, 0, m.num_states());
  for (KernelSet k : {KernelSet::kPortable, KernelSet::kGather}) {
    SCOPED_TRACE("kernels " + std::to_string(static_cast<int>(k)));
    std::vector<double> plain = v;
    internal::GaussSeidelSweep(m, plain.data(), k);
    for (StateId s = 0; s < m.num_states(); ++s) ASSERT_NEAR(plain[s], expected[s], tolerance);

    // Chunks of 300 states (the last one shorter): each swept in order, reading the other
    // chunks' old values, on any number of threads.
    const StateId chunk = 300;
    std::vector<double> block_expected(m.num_states());
    for (StateId lo = 0; lo < m.num_states(); lo += chunk) {
      const StateId hi = std::min(m.num_states(), lo + chunk);
      const std::vector<double> swept = DefinitionGaussSeidel(m, v, lo, hi);
      std::copy(swept.begin() + lo, swept.begin() + hi, block_expected.begin() + lo);
    }
    for (int threads : {1, 2, 3}) {
      std::vector<double> out(m.num_states(), 0.0);
      internal::BlockGaussSeidelSweep(m, v.data(), out.data(), threads, k, chunk);
      for (StateId s = 0; s < m.num_states(); ++s) {
        ASSERT_NEAR(out[s], block_expected[s], tolerance) << "state " << s << ", " << threads;
      }
    }
  }
}

// Gauss-Seidel's stopping aim (value_iteration.cc) rests on this: after a sweep that changed
// no value by more than d, one exact backup of the result moves no value by more than g d
// (each value was a backup of values that have since moved by at most d). Checked for the
// plain sweep and for chunks of 250 states on 2 threads, from values far from V* and near it.
TEST(BellmanKernelsTest, GaussSeidelResidualIsAtMostDiscountTimesChange) {
  testing::RandomModelOptions o;
  o.states = 1000;
  o.max_outcomes = 6;
  o.discount = 0.9;
  for (uint64_t seed : {3, 4}) {
    const Model m = testing::MustBuild(testing::RandomSpec(seed, o));
    const double g = m.discount();
    std::vector<double> v = SomeValues(m.num_states(), seed);
    for (int sweep = 0; sweep < 40; ++sweep) {
      for (StateId chunk : {m.num_states(), StateId{250}}) {
        std::vector<double> out(m.num_states());
        const double d =
            chunk == m.num_states()
                ? [&] { out = v; return internal::GaussSeidelSweep(m, out.data()); }()
                : internal::BlockGaussSeidelSweep(m, v.data(), out.data(), 2,
                                                  KernelSet::kPortable, chunk);
        double e = 0.0;
        for (StateId s = 0; s < m.num_states(); ++s) {
          e = std::max(e, std::fabs(DefinitionBackupAt(m, out, s, g) - out[s]));
        }
        ASSERT_LE(e, g * d + 1e-12 * Scale(out)) << "sweep " << sweep << ", chunk " << chunk;
        if (chunk == m.num_states()) v = out;
      }
    }
  }
}

// One action per state, `width` outcomes each; next states either s+1..s+width (mod n) or
// drawn uniformly from all states.
Model RingOrScatter(StateId n, int width, bool scattered) {
  ModelSpec spec;
  spec.action_names = {"go"};
  spec.criterion.discount = 0.9;
  std::mt19937_64 rng(3);
  for (StateId s = 0; s < n; ++s) {
    spec.AddState("s" + std::to_string(s));
    spec.AddStateAction(0, 1.0);
    for (int k = 1; k <= width; ++k) {
      const StateId next = scattered ? static_cast<StateId>(rng() % n) : (s + k) % n;
      spec.AddOutcome(next, 1.0 / width);
    }
  }
  return testing::MustBuild(spec);
}

// The solver's own sweeps take the portable copy (bellman.h says why): on a large scattered
// model, where the gather copy used to be chosen, the automatic sweep is the portable one bit
// for bit.
TEST(BellmanKernelsTest, SolverSweepsUseThePortableCopy) {
  const Model scattered = RingOrScatter(80000, 4, true);
  EXPECT_EQ(internal::ChooseKernels(scattered), KernelSet::kPortable);
  const std::vector<double> in = SomeValues(scattered.num_states(), 5);
  std::vector<double> automatic(scattered.num_states()), portable(scattered.num_states());
  const double d_auto = internal::SyncSweep(scattered, in.data(), automatic.data(), 2);
  const double d_portable =
      internal::SyncSweep(scattered, in.data(), portable.data(), 2, KernelSet::kPortable);
  EXPECT_EQ(d_auto, d_portable);
  for (StateId s = 0; s < scattered.num_states(); ++s) {
    ASSERT_EQ(automatic[s], portable[s]) << "state " << s;
  }
}

// The threaded sweeps hand out states in chunks on demand: on a model of several chunks, every
// state is computed, the result is the definition's and it is the same bit for bit on 1, 2
// and 3 threads, whichever thread took which chunk.
TEST(BellmanKernelsTest, ThreadedSweepsCoverEveryStateAndAgreeAcrossThreadCounts) {
  testing::RandomModelOptions o;
  o.states = 45001;  // Five full chunks of 8,192 states and a partial one.
  o.max_outcomes = 3;
  o.max_actions = 3;
  const Model m = testing::MustBuild(testing::RandomSpec(53, o));
  const StateId n = m.num_states();
  const std::vector<double> v = SomeValues(n, 11);
  const std::vector<double> expected = DefinitionBackup(m, v, m.discount());
  const double tolerance = 1e-13 * Scale(expected);

  std::vector<double> sync_1, greedy_1, policy_1;
  std::vector<RowId> rows_1, improved_1;
  double sync_diff_1 = 0.0, greedy_diff_1 = 0.0, policy_diff_1 = 0.0;
  internal::Improvement improvement_1;
  for (int threads : {1, 2, 3}) {
    SCOPED_TRACE("threads " + std::to_string(threads));
    std::vector<double> sync(n, -1.0), greedy(n, -1.0), policy(n, -1.0);
    std::vector<RowId> rows(n, -2);
    const double sync_diff = internal::SyncSweep(m, v.data(), sync.data(), threads);
    const double greedy_diff =
        internal::GreedySweep(m, v.data(), greedy.data(), rows.data(), threads);
    const double policy_diff =
        internal::PolicySweep(m, rows.data(), v.data(), policy.data(), threads);
    std::vector<RowId> improved(n, -1);  // From no rows: every non-terminal state changes.
    const internal::Improvement improvement =
        internal::ImprovePolicy(m, v.data(), 0.0, improved.data(), threads);
    for (StateId s = 0; s < n; ++s) {
      ASSERT_NEAR(sync[s], expected[s], tolerance) << "state " << s;
      ASSERT_EQ(greedy[s], sync[s]) << "state " << s;
      ASSERT_NE(rows[s], -2) << "state " << s;
      ASSERT_EQ(policy[s], sync[s]) << "state " << s;  // The greedy rows' own values.
      ASSERT_EQ(improved[s], rows[s]) << "state " << s;
    }
    if (threads == 1) {
      sync_1 = sync, greedy_1 = greedy, policy_1 = policy, rows_1 = rows, improved_1 = improved;
      sync_diff_1 = sync_diff, greedy_diff_1 = greedy_diff, policy_diff_1 = policy_diff;
      improvement_1 = improvement;
      EXPECT_GT(improvement.changed, n / 2);
      continue;
    }
    EXPECT_EQ(sync, sync_1);
    EXPECT_EQ(greedy, greedy_1);
    EXPECT_EQ(policy, policy_1);
    EXPECT_EQ(rows, rows_1);
    EXPECT_EQ(improved, improved_1);
    EXPECT_EQ(sync_diff, sync_diff_1);
    EXPECT_EQ(greedy_diff, greedy_diff_1);
    EXPECT_EQ(policy_diff, policy_diff_1);
    EXPECT_EQ(improvement.changed, improvement_1.changed);
    EXPECT_EQ(improvement.residual, improvement_1.residual);
  }
}

// CsrCombine (policy_matrix.h's products) against its definition, with rows of 0 to 12
// entries, for both copies and both signs.
TEST(BellmanKernelsTest, CsrCombineComputesItsDefinition) {
  std::mt19937_64 rng(21);
  const StateId n = 3000;
  std::vector<int64_t> begin = {0};
  std::vector<StateId> next;
  std::vector<double> p;
  for (StateId s = 0; s < n; ++s) {
    const int length = static_cast<int>(rng() % 13);
    for (int k = 0; k < length; ++k) {
      next.push_back(static_cast<StateId>(rng() % n));
      p.push_back(std::uniform_real_distribution<double>(0.0, 1.0)(rng));
    }
    begin.push_back(static_cast<int64_t>(next.size()));
  }
  const std::vector<double> x = SomeValues(n, 17), base = SomeValues(n, 19);
  for (double sign : {1.0, -1.0}) {
    std::vector<double> expected(n);
    double expected_diff = 0.0;
    for (StateId s = 0; s < n; ++s) {
      long double dot = 0.0L;
      for (int64_t e = begin[s]; e < begin[s + 1]; ++e) {
        dot += static_cast<long double>(p[e]) * x[next[e]];
      }
      expected[s] = static_cast<double>(base[s] + sign * dot);
      expected_diff = std::max(expected_diff, std::fabs(expected[s] - x[s]));
    }
    const double tolerance = 1e-13 * Scale(expected);
    for (KernelSet k : {KernelSet::kPortable, KernelSet::kGather}) {
      SCOPED_TRACE("kernels " + std::to_string(static_cast<int>(k)) + ", sign " +
                   std::to_string(sign));
      std::vector<double> y(n, 0.0);
      const double diff = internal::CsrCombine(begin.data(), next.data(), p.data(), n, base.data(),
                                               sign, x.data(), y.data(), 2, k);
      for (StateId s = 0; s < n; ++s) ASSERT_NEAR(y[s], expected[s], tolerance) << "row " << s;
      EXPECT_NEAR(diff, expected_diff, tolerance);
    }
  }
}

// The portable copy sums a row of up to 8 entries over a fixed window of 8 that reaches into
// the rows after it, keeping only the row's own products. Here every state has one row of one
// outcome, to the state after it, except that states 0-9 have two outcomes (to 10 and 11)
// and states 10 and 11 lead to 12, whose value is +infinity. The windows of states 0-9 read
// entries that point at 12 (p * inf would be NaN, 0 * inf too), yet their values must be the
// definition's finite ones; 10 and 11 back up to +infinity, the rest are finite. The same for
// Gauss-Seidel, sequential and in chunks, whose windows choose between two value arrays.
TEST(BellmanKernelsTest, ShortRowsIgnoreTheEntriesAfterThemEvenInfiniteOnes) {
  const StateId n = 40;
  ModelSpec spec;
  spec.action_names = {"go"};
  spec.criterion.discount = 0.5;
  for (StateId s = 0; s < n; ++s) {
    spec.AddState("s" + std::to_string(s));
    spec.AddStateAction(0, 1.0 + s);
    if (s < 10) {
      spec.AddOutcome(10, 0.25);
      spec.AddOutcome(11, 0.75);
    } else if (s < 12) {
      spec.AddOutcome(12, 1.0);
    } else {
      spec.AddOutcome((s + 1) % n, 1.0);
    }
  }
  const Model m = testing::MustBuild(spec);
  std::vector<double> in(n);
  for (StateId s = 0; s < n; ++s) in[s] = 2.0 * s;
  in[12] = std::numeric_limits<double>::infinity();
  for (KernelSet k : {KernelSet::kPortable, KernelSet::kGather}) {
    for (int threads : {1, 2}) {
      std::vector<double> out(n, -1.0);
      internal::SyncSweep(m, in.data(), out.data(), threads, k);
      for (StateId s = 0; s < 10; ++s) {
        // r + g * (0.25 * 20 + 0.75 * 22), from the values set above.
        ASSERT_EQ(out[s], 1.0 + s + 0.5 * (0.25 * 20.0 + 0.75 * 22.0)) << "state " << s;
      }
      EXPECT_EQ(out[10], std::numeric_limits<double>::infinity());
      EXPECT_EQ(out[11], std::numeric_limits<double>::infinity());
      for (StateId s = 12; s < n; ++s) {
        ASSERT_TRUE(std::isfinite(out[s])) << "state " << s;
        ASSERT_EQ(out[s], 1.0 + s + 0.5 * in[(s + 1) % n]) << "state " << s;
      }
    }
    // Gauss-Seidel in place, and in chunks of 8 states on 1 and 2 threads (states 8 and 9
    // read 10 and 11 from their own chunk, 0-7 from the previous sweep; neither is updated
    // before them). States 12-38 read s + 1 before it is updated; 39 reads the new value of 0
    // in place, and its previous one from another chunk.
    for (int threads : {0, 1, 2}) {
      SCOPED_TRACE(threads == 0 ? std::string("sequential")
                                : "chunks of 8 on " + std::to_string(threads) + " threads");
      std::vector<double> out = in;
      if (threads == 0) {
        internal::GaussSeidelSweep(m, out.data(), k);
      } else {
        internal::BlockGaussSeidelSweep(m, in.data(), out.data(), threads, k, 8);
      }
      for (StateId s = 0; s < 10; ++s) {
        ASSERT_EQ(out[s], 1.0 + s + 0.5 * (0.25 * 20.0 + 0.75 * 22.0)) << "state " << s;
      }
      EXPECT_EQ(out[10], std::numeric_limits<double>::infinity());
      EXPECT_EQ(out[11], std::numeric_limits<double>::infinity());
      for (StateId s = 12; s + 1 < n; ++s) {
        ASSERT_EQ(out[s], 1.0 + s + 0.5 * in[s + 1]) << "state " << s;
      }
      EXPECT_EQ(out[n - 1], n + 0.5 * (threads == 0 ? out[0] : in[0]));
    }
  }
}

// A finite horizon's stage uses its own discount (here 1 and 0.5, not the model's 0.97 or
// 0.9), on a small model and on a large scattered one.
TEST(BellmanKernelsTest, StageSweepUsesTheGivenDiscount) {
  const Model varied = VariedRowsModel(Objective::kMinimize);
  const Model scattered = RingOrScatter(80000, 4, true);
  for (const Model* m : {&varied, &scattered}) {
    const std::vector<double> next = SomeValues(m->num_states(), 13);
    for (double g : {1.0, 0.5}) {
      SCOPED_TRACE("states " + std::to_string(m->num_states()) + ", discount " + std::to_string(g));
      const std::vector<double> expected = DefinitionBackup(*m, next, g);
      std::vector<double> out(m->num_states(), -1.0);
      internal::StageSweep(*m, next.data(), g, out.data(), 2);
      const double tolerance = 1e-13 * Scale(expected);
      for (StateId s = 0; s < m->num_states(); ++s) {
        ASSERT_NEAR(out[s], expected[s], tolerance) << "state " << s;
      }
    }
  }
}

}  // namespace
}  // namespace mdp
