// Tests the tiled copy of value iteration's sweep (solver/internal/tiled_sweep.h). Its
// contract is the row sweep's values and residual bit for bit, so the checks compare bits
// with SyncSweep's portable copy (itself checked against the Bellman backup's definition in
// bellman_test.cc), on models that span several blocks of states and of next states, with
// rows both shorter and longer than the window of 8, terminal states and both objectives.
#include "solver/internal/tiled_sweep.h"

#include <gtest/gtest.h>

#include <cmath>
#include <cstring>
#include <limits>
#include <vector>

#include "solver/internal/bellman.h"
#include "solver/internal/renumber.h"
#include "solver/internal/run_control.h"
#include "solver/value_iteration.h"
#include "tests/large/large_model.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using internal::KernelSet;
using internal::TiledEntries;
using testing::SomeValues;

// 100,000 states with 1-4 rows of 1-12 entries each, next states anywhere: 4 blocks of next
// states and several blocks of rows.
Model SpreadModel(Objective objective, uint64_t seed) {
  testing::RandomModelOptions o;
  o.states = 100000;
  o.max_actions = 4;
  o.max_outcomes = 12;
  o.objective = objective;
  o.discount = 0.95;
  return testing::MustBuild(testing::RandomSpec(seed, o));
}

// Bitwise equality, NaN included.
bool SameBits(double a, double b) { return std::memcmp(&a, &b, sizeof a) == 0; }

int64_t FirstDifference(const std::vector<double>& a, const std::vector<double>& b) {
  for (size_t i = 0; i < a.size(); ++i) {
    if (!SameBits(a[i], b[i])) return static_cast<int64_t>(i);
  }
  return -1;
}

TEST(TiledSweepTest, GivesTheRowSweepsValuesBitForBit) {
  for (Objective objective : {Objective::kMaximize, Objective::kMinimize}) {
    const Model m = SpreadModel(objective, 7);
    std::optional<TiledEntries> tiled = TiledEntries::Build(m, 2);
    ASSERT_TRUE(tiled.has_value());
    ASSERT_EQ(tiled->num_column_blocks(), 4);
    ASSERT_GE(tiled->num_blocks(), 3);
    int64_t short_rows = 0, long_rows = 0, terminal = 0;
    for (RowId r = 0; r < m.num_rows(); ++r) {
      (m.entry_end(r) - m.entry_begin(r) <= 8 ? short_rows : long_rows) += 1;
    }
    for (StateId s = 0; s < m.num_states(); ++s) terminal += m.terminal(s) ? 1 : 0;
    ASSERT_GT(short_rows, 0);
    ASSERT_GT(long_rows, 0);
    ASSERT_GT(terminal, 0);

    std::vector<double> in = SomeValues(m.num_states(), 3);
    for (int threads : {1, 2, 3}) {
      // Several sweeps in a row, so the row sums kept between calls are exercised too.
      std::vector<double> v = in;
      for (int sweep = 0; sweep < 3; ++sweep) {
        std::vector<double> rows(m.num_states()), tiles(m.num_states(), -1.0);
        const double d_rows =
            internal::SyncSweep(m, v.data(), rows.data(), threads, KernelSet::kPortable);
        const double d_tiles = tiled->Sweep(m, v.data(), tiles.data(), threads);
        ASSERT_EQ(FirstDifference(rows, tiles), -1)
            << "objective " << static_cast<int>(objective) << ", " << threads
            << " threads, sweep " << sweep;
        ASSERT_TRUE(SameBits(d_rows, d_tiles)) << d_rows << " vs " << d_tiles;
        v = rows;
      }
    }
  }
}

TEST(TiledSweepTest, InfiniteAndNanValuesGiveTheSameBitsToo) {
  const Model m = SpreadModel(Objective::kMaximize, 11);
  std::optional<TiledEntries> tiled = TiledEntries::Build(m, 2);
  ASSERT_TRUE(tiled.has_value());
  std::vector<double> in = SomeValues(m.num_states(), 5);
  in[17] = std::numeric_limits<double>::infinity();
  in[40000] = -std::numeric_limits<double>::infinity();
  in[99999] = std::numeric_limits<double>::quiet_NaN();
  std::vector<double> rows(m.num_states()), tiles(m.num_states());
  const double d_rows = internal::SyncSweep(m, in.data(), rows.data(), 2, KernelSet::kPortable);
  const double d_tiles = tiled->Sweep(m, in.data(), tiles.data(), 2);
  int64_t not_finite = 0;
  for (double x : rows) not_finite += std::isfinite(x) ? 0 : 1;
  ASSERT_GT(not_finite, 0);  // Some state reads one of them.
  EXPECT_EQ(FirstDifference(rows, tiles), -1);
  EXPECT_TRUE(SameBits(d_rows, d_tiles));
}

TEST(TiledSweepTest, AStateWithMoreRowsThanABlockHoldsIsNotTiled) {
  ModelSpec spec;
  spec.name = "many-actions";
  spec.criterion.discount = 0.9;
  const int64_t actions = internal::kTileMaxRows + 1;
  for (int64_t a = 0; a < actions; ++a) spec.action_names.push_back("a" + std::to_string(a));
  spec.AddState("hub");
  for (int64_t a = 0; a < actions; ++a) {
    spec.AddStateAction(static_cast<ActionId>(a), 0.0);
    spec.AddOutcome(1, 1.0, static_cast<double>(a % 7));
  }
  spec.AddState("rim");
  spec.AddStateAction(0, 1.0);
  spec.AddOutcome(0, 1.0, 0.0);
  const Model m = testing::MustBuild(spec);
  ASSERT_EQ(m.row_end(0) - m.row_begin(0), actions);
  EXPECT_FALSE(TiledEntries::Build(m, 1).has_value());
}

// 2^19 states, one row each of 1-16 entries to states anywhere: past every size threshold.
Model LargeScatteredModel() {
  testing::RandomModelOptions o;
  o.states = internal::kTiledMinStates;
  o.max_actions = 1;
  o.max_outcomes = 16;
  o.terminal_fraction = 0.0;
  o.discount = 0.9;
  return testing::MustBuild(testing::RandomSpec(23, o));
}

TEST(TiledSweepTest, TheRuleTilesLargeScatteredModelsOnly) {
  const Model scattered = LargeScatteredModel();
  ASSERT_GE(scattered.num_entries(), internal::kTiledMinEntries);
  EXPECT_TRUE(internal::TilingPays(scattered, 2));

  // The same size, 90 % of next states within 32 of the state (tests/large/large_model.h).
  const Model ring = testing::MustBuild(testing::LargeSpec(internal::kTiledMinStates, 1, 16, 3));
  ASSERT_GE(ring.num_entries(), internal::kTiledMinEntries);
  EXPECT_LT(internal::FarEntryFraction(ring, {}, 2), internal::kTiledMinFarFraction);
  EXPECT_FALSE(internal::TilingPays(ring, 2));

  // Scattered but below the size threshold: V stays in cache row by row.
  testing::RandomModelOptions o;
  o.states = 300000;
  o.max_actions = 1;
  o.max_outcomes = 4;
  const Model small = testing::MustBuild(testing::RandomSpec(5, o));
  EXPECT_GE(internal::FarEntryFraction(small, {}, 2), internal::kTiledMinFarFraction);
  EXPECT_FALSE(internal::TilingPays(small, 2));
}

TEST(TiledSweepTest, ShouldTileCountsTheSweepsLeftAtTheDiscount) {
  const Model m = LargeScatteredModel();  // Discount 0.9: one sweep divides by 0.9.
  const double target = 1e-9;
  const double at_limit = target / std::pow(0.9, internal::kTiledMinSweepsLeft);
  EXPECT_TRUE(internal::ShouldTile(m, 2, at_limit * 1.01, target));
  EXPECT_FALSE(internal::ShouldTile(m, 2, at_limit * 0.99, target));
  EXPECT_FALSE(internal::ShouldTile(m, 2, target, target));  // Done already.
  // The run's limits leave too few sweeps (iteration or time limit).
  EXPECT_TRUE(internal::ShouldTile(m, 2, at_limit * 10.0, target, 200.0));
  EXPECT_FALSE(internal::ShouldTile(m, 2, at_limit * 10.0, target, 199.0));
}

TEST(TiledSweepTest, SweepsAllowedByTheLimits) {
  SolveOptions options;
  options.max_iterations = 1000;
  EXPECT_DOUBLE_EQ(internal::SweepsAllowed(options, 4, 4, 1.0), 996.0);
  options.time_limit_seconds = 10.0;  // 1 s for 4 sweeps: 9 s left at 0.25 s per sweep.
  EXPECT_DOUBLE_EQ(internal::SweepsAllowed(options, 4, 4, 1.0), 36.0);
  options.max_iterations = 20;
  EXPECT_DOUBLE_EQ(internal::SweepsAllowed(options, 4, 4, 1.0), 16.0);
  options.max_iterations = 1000;
  EXPECT_LE(internal::SweepsAllowed(options, 4, 4, 11.0), 0.0);  // Past the limit already.
}

// Value iteration switches to the tiled sweep on this model (ShouldTile is true after the
// deciding sweep, checked below on the same bits). Its sweeps, final residual and values must
// be those of the row sweep run to the same stopping rule, written out here.
TEST(TiledSweepTest, ValueIterationGivesTheSameAnswerWithTheTiledSweep) {
  const Model m = LargeScatteredModel();
  SolveOptions options;
  options.method = Method::kValueIteration;
  options.tolerance = 1e-9;
  options.threads = 2;
  const Solution solution = ValueIteration(m, options, nullptr, nullptr);

  const double target = internal::ResidualTarget(m.discount(), options.tolerance);
  std::vector<double> v(m.num_states(), 0.0), next(m.num_states(), 0.0);
  int64_t sweeps = 0;
  bool tiles = false;
  for (double e = target + 1.0; e > target;) {
    e = internal::SyncSweep(m, v.data(), next.data(), 2, KernelSet::kPortable);
    v.swap(next);
    ++sweeps;
    if (sweeps == internal::kTiledDecideAfterSweeps) tiles = internal::ShouldTile(m, 2, e, target);
  }
  ASSERT_TRUE(tiles) << "the model no longer exercises the tiled path";
  // Finalize: residual from one more backup v1 = T v, values the best Q against v1.
  std::vector<double> v1(m.num_states()), v2(m.num_states());
  const double residual = internal::SyncSweep(m, v.data(), v1.data(), 2, KernelSet::kPortable);
  (void)internal::SyncSweep(m, v1.data(), v2.data(), 2, KernelSet::kPortable);
  EXPECT_EQ(solution.sweeps, sweeps + 2);
  EXPECT_TRUE(SameBits(solution.residual, residual)) << solution.residual << " vs " << residual;
  EXPECT_EQ(FirstDifference(solution.values, v2), -1);
  EXPECT_EQ(solution.outcome, SolveOutcome::kConverged);
}

}  // namespace
}  // namespace mdp
