// Tests of solver/internal/renumber.cc and its use in Solve(): the locality order is a
// permutation that keeps components together, the permuted model is the same MDP, the
// locality score sees shuffled local structure, and solving with renumbering forced on gives
// the answers of solving without it, mapped back to the document's states and rows.
#include "solver/internal/renumber.h"

#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <map>
#include <numeric>
#include <random>
#include <string>

#include "solver/solver.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp {
namespace {

using internal::FarEntryFraction;
using internal::LocalityOrder;
using internal::StateOrder;
using testing::RandomModelOptions;
using testing::RandomSpec;

// A ring of n states whose actions lead to states within +-reach around the ring, written
// down in a seeded random order when `shuffle` (the same local structure, numbered so that
// the document order shows none of it). Ring states 5 and 15 are terminal, so states without
// rows take part too. A share `random_share` of the outcomes leads to a uniformly random
// state instead.
ModelSpec RingSpec(StateId n, int actions, int outcomes, StateId reach, uint64_t seed,
                   bool shuffle, double random_share = 0.0) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  std::vector<StateId> ring_of_doc(n);
  std::iota(ring_of_doc.begin(), ring_of_doc.end(), 0);
  if (shuffle) std::shuffle(ring_of_doc.begin(), ring_of_doc.end(), rng);
  std::vector<StateId> doc_of_ring(n);
  for (StateId p = 0; p < n; ++p) doc_of_ring[ring_of_doc[p]] = p;
  ModelSpec spec;
  spec.name = "ring";
  spec.criterion.discount = 0.9;
  for (int a = 0; a < actions; ++a) spec.action_names.push_back("a" + std::to_string(a));
  for (StateId p = 0; p < n; ++p) {
    const StateId x = ring_of_doc[p];
    const bool terminal = x < 20 && x % 10 == 5;
    spec.AddState("r" + std::to_string(x), terminal);
    if (terminal) continue;
    for (int a = 0; a < actions; ++a) {
      spec.AddStateAction(a, unit(rng) - 0.5);
      for (int k = 0; k < outcomes; ++k) {
        const auto step = static_cast<StateId>(rng() % (2 * reach + 1)) - reach;
        const StateId to = unit(rng) < random_share ? static_cast<StateId>(rng() % n)
                                                    : ((x + step) % n + n) % n;
        spec.AddOutcome(doc_of_ring[to], 1.0 / outcomes, unit(rng));
      }
    }
  }
  return spec;
}

// Large enough that its values do not fit the locality window: 300,000 states, 1.8M entries.
constexpr StateId kLargeStates = 300000;

// A side x side grid, its cells written down in a seeded random order: actions N, E, S, W
// move one cell (0.8) or slip to either side (0.1 each); a move into the edge stays put.
ModelSpec ShuffledGridSpec(StateId side, uint64_t seed) {
  const StateId n = side * side;
  std::mt19937_64 rng(seed);
  std::vector<StateId> cell_of_doc(n);
  std::iota(cell_of_doc.begin(), cell_of_doc.end(), 0);
  std::shuffle(cell_of_doc.begin(), cell_of_doc.end(), rng);
  std::vector<StateId> doc_of_cell(n);
  for (StateId p = 0; p < n; ++p) doc_of_cell[cell_of_doc[p]] = p;
  constexpr int kDx[] = {0, 1, 0, -1}, kDy[] = {-1, 0, 1, 0};
  ModelSpec spec;
  spec.name = "grid";
  spec.criterion.discount = 0.9;
  for (const char* a : {"N", "E", "S", "W"}) spec.action_names.push_back(a);
  for (StateId p = 0; p < n; ++p) {
    const StateId x = cell_of_doc[p] % side, y = cell_of_doc[p] / side;
    spec.AddState("c" + std::to_string(cell_of_doc[p]), false);
    auto to = [&](int d) {
      const StateId nx = x + kDx[d], ny = y + kDy[d];
      const bool inside = nx >= 0 && nx < side && ny >= 0 && ny < side;
      return inside ? doc_of_cell[ny * side + nx] : p;
    };
    for (int a = 0; a < 4; ++a) {
      spec.AddStateAction(a, x == 0 && y == 0 ? 1.0 : 0.0);
      spec.AddOutcome(to(a), 0.8, 0.0);
      spec.AddOutcome(to((a + 1) % 4), 0.1, 0.0);
      spec.AddOutcome(to((a + 3) % 4), 0.1, 0.0);
    }
  }
  return spec;
}

void ExpectPermutation(const StateOrder& order, StateId n) {
  ASSERT_EQ(order.new_of_old.size(), static_cast<size_t>(n));
  ASSERT_EQ(order.old_of_new.size(), static_cast<size_t>(n));
  std::vector<uint8_t> hit(n, 0);
  for (StateId s = 0; s < n; ++s) {
    const StateId t = order.new_of_old[s];
    ASSERT_TRUE(t >= 0 && t < n) << "state " << s << " -> " << t;
    EXPECT_FALSE(hit[t]) << "two states renamed " << t;
    hit[t] = 1;
    EXPECT_EQ(order.old_of_new[t], s);
  }
}

bool IsIdentity(const std::vector<StateId>& p) {
  for (size_t i = 0; i < p.size(); ++i) {
    if (p[i] != static_cast<StateId>(i)) return false;
  }
  return true;
}

TEST(RenumberTest, LocalityOrderIsAPermutationOfRandomModels) {
  for (uint64_t seed : {1, 2, 3, 4, 5}) {
    RandomModelOptions o;
    o.states = 30 + static_cast<StateId>(seed) * 37;
    o.terminal_fraction = 0.2;  // Terminal states have no rows; some are reached by none.
    const Model m = testing::MustBuild(RandomSpec(seed, o));
    const StateOrder order = LocalityOrder(m);
    SCOPED_TRACE("seed " + std::to_string(seed));
    ExpectPermutation(order, m.num_states());
    EXPECT_FALSE(IsIdentity(order.new_of_old));
  }
}

TEST(RenumberTest, EachComponentGetsOneBlockOfNewIds) {
  // Three rings with no transitions between them, their states interleaved in the document.
  testing::SpecWriter w(0.9, Objective::kMaximize);
  std::vector<std::string> names;
  constexpr int kRings = 3, kSize = 7;
  for (int i = 0; i < kRings * kSize; ++i) names.push_back("x" + std::to_string(i));
  w.States(names, {});
  auto name = [&](int ring, int k) { return names[((k + kSize) % kSize) * kRings + ring]; };
  for (int ring = 0; ring < kRings; ++ring) {
    for (int k = 0; k < kSize; ++k) {
      w.Action(name(ring, k), "step", {{name(ring, k + 1), 0.5, 1.0}, {name(ring, k - 1), 0.5}});
    }
  }
  const Model m = w.Build();
  const StateOrder order = LocalityOrder(m);
  ExpectPermutation(order, m.num_states());
  for (int ring = 0; ring < kRings; ++ring) {
    StateId lo = m.num_states(), hi = -1;
    for (int k = 0; k < kSize; ++k) {
      const StateId t = order.new_of_old[*m.FindState(name(ring, k))];
      lo = std::min(lo, t);
      hi = std::max(hi, t);
    }
    EXPECT_EQ(hi - lo, kSize - 1) << "ring " << ring << " is split";
  }
}

TEST(RenumberTest, PermutedModelIsTheSameMdp) {
  RandomModelOptions o;
  o.states = 120;
  const Model m = testing::MustBuild(RandomSpec(11, o));
  const StateOrder order = LocalityOrder(m);
  const Model p = internal::PermuteStates(m, order.new_of_old, 2);
  ASSERT_EQ(p.num_states(), m.num_states());
  ASSERT_EQ(p.num_rows(), m.num_rows());
  ASSERT_EQ(p.num_entries(), m.num_entries());
  EXPECT_EQ(p.discount(), m.discount());
  EXPECT_EQ(p.objective(), m.objective());
  for (StateId s = 0; s < m.num_states(); ++s) {
    const StateId t = order.new_of_old[s];
    EXPECT_EQ(p.state_name(t), m.state_name(s));
    EXPECT_EQ(p.terminal(t), m.terminal(s));
    ASSERT_EQ(p.row_end(t) - p.row_begin(t), m.row_end(s) - m.row_begin(s));
    for (RowId k = 0; k < m.row_end(s) - m.row_begin(s); ++k) {
      const RowId r = m.row_begin(s) + k, pr = p.row_begin(t) + k;
      EXPECT_EQ(p.row_action_name(pr), m.row_action_name(r));
      EXPECT_EQ(p.row_reward(pr), m.row_reward(r));
      std::map<std::string, double> want, got;
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        want[m.state_name(m.entry_next(e))] = m.entry_probability(e);
      }
      for (int64_t e = p.entry_begin(pr); e < p.entry_end(pr); ++e) {
        got[p.state_name(p.entry_next(e))] = p.entry_probability(e);
        if (e > p.entry_begin(pr)) {
          EXPECT_LT(p.entry_next(e - 1), p.entry_next(e));
        }
      }
      EXPECT_EQ(got, want) << m.state_name(s) << " " << m.row_action_name(r);
    }
  }
}

TEST(RenumberTest, ScoreSeesShuffledLocalStructureAndTheOrderRestoresIt) {
  const Model local = testing::MustBuild(RingSpec(kLargeStates, 2, 3, 16, 7, false));
  const Model shuffled = testing::MustBuild(RingSpec(kLargeStates, 2, 3, 16, 7, true));
  const double local_far = FarEntryFraction(local, {}, 2);
  const double shuffled_far = FarEntryFraction(shuffled, {}, 2);
  // Uniformly shuffled, two distinct states are far with probability (1 - window / states)^2
  // (both ids uniform); a step of 0 (probability 1 / 33) stays at the state, never far.
  const double w = static_cast<double>(internal::kLocalityWindow) / kLargeStates;
  const double expected = (1.0 - w) * (1.0 - w) * (1.0 - 1.0 / 33.0);
  EXPECT_LT(local_far, 1e-3);  // Only the ring's seam is far.
  EXPECT_NEAR(shuffled_far, expected, 0.01);
  const StateOrder order = LocalityOrder(shuffled);
  ExpectPermutation(order, shuffled.num_states());
  EXPECT_LT(FarEntryFraction(shuffled, order.new_of_old, 2), 1e-3);
}

// Solves `m` with `method` and renumbering `mode`; tolerance tight enough that near-ties are
// far below tie_tolerance.
Solution SolveWith(const Model& m, Method method, Renumber mode, double tolerance = 1e-10) {
  SolveOptions options;
  options.method = method;
  options.tolerance = tolerance;
  options.renumber = mode;
  Result<Solution> s = Solve(m, options);
  EXPECT_OK(s);
  return s.ok() ? std::move(*s) : Solution();
}

// Q of every row of `spec` against `v`, computed from the document's outcomes (raw
// probabilities normalised per slot): an independent one-step backup.
std::vector<double> BackupFromSpec(const ModelSpec& spec, const std::vector<double>& v) {
  std::vector<double> q(spec.num_slots());
  for (SlotId slot = 0; slot < spec.num_slots(); ++slot) {
    double sum = 0.0, reward = 0.0, next = 0.0;
    for (OutcomeId o = spec.slot_first_outcome[slot]; o < spec.slot_first_outcome[slot + 1]; ++o) {
      sum += spec.outcome_probability[o];
      reward += spec.outcome_probability[o] * spec.outcome_reward[o];
      next += spec.outcome_probability[o] * v[spec.outcome_next[o]];
    }
    q[slot] = spec.slot_reward[slot] + (reward + spec.criterion.discount * next) / sum;
  }
  return q;
}

// `on` (renumbered) and `off` answer alike: outcome, picks, optimal sets, values and Q within
// their bounds.
void ExpectSameAnswers(const Model& m, const Solution& on, const Solution& off) {
  EXPECT_EQ(on.options.renumber, Renumber::kOn);
  EXPECT_EQ(off.options.renumber, Renumber::kOff);
  EXPECT_EQ(on.outcome, off.outcome);
  EXPECT_EQ(on.best_row, off.best_row);
  EXPECT_EQ(on.optimal_row, off.optimal_row);
  EXPECT_EQ(on.tied_states, off.tied_states);
  for (StateId s = 0; s < m.num_states(); ++s) {
    const double scale = 1e-9 * std::max(1.0, std::fabs(off.values[s]));
    EXPECT_NEAR(on.values[s], off.values[s], on.value_error_bound + off.value_error_bound + scale)
        << m.state_name(s);
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      EXPECT_NEAR(on.q[r], off.q[r], on.q_error_bound + off.q_error_bound + scale);
    }
  }
}

class RenumberSolveTest : public ::testing::TestWithParam<uint64_t> {};

TEST_P(RenumberSolveTest, ForcedRenumberingGivesTheSameAnswersByEveryMethod) {
  RandomModelOptions o;
  o.states = 60 + static_cast<StateId>(GetParam() % 4) * 25;
  o.objective = GetParam() % 2 == 0 ? Objective::kMaximize : Objective::kMinimize;
  const Model m = testing::MustBuild(RandomSpec(GetParam(), o));
  ASSERT_FALSE(IsIdentity(LocalityOrder(m).new_of_old));  // Else mapping back is untested.
  for (Method method : testing::kAllMethods) {
    SCOPED_TRACE(std::string(MethodName(method)));
    ExpectSameAnswers(m, SolveWith(m, method, Renumber::kOn), SolveWith(m, method, Renumber::kOff));
  }
}

TEST_P(RenumberSolveTest, RenumberedQIsAOneStepBackupOfTheReturnedValues) {
  RandomModelOptions o;
  o.states = 80;
  const ModelSpec spec = RandomSpec(100 + GetParam(), o);
  const Model m = testing::MustBuild(spec);
  // A loose tolerance, so that the bounds below are what the check leans on.
  const Solution s = SolveWith(m, Method::kValueIteration, Renumber::kOn, 1e-4);
  ASSERT_EQ(s.options.renumber, Renumber::kOn);
  const std::vector<double> backup = BackupFromSpec(spec, s.values);
  // |q - Q*| <= q_error_bound and |backup - Q*| <= g * value_error_bound.
  const double slack = s.q_error_bound + m.discount() * s.value_error_bound + 1e-9;
  for (StateId st = 0; st < m.num_states(); ++st) {
    if (m.terminal(st)) {
      EXPECT_EQ(s.best_row[st], -1);
      continue;
    }
    for (RowId r = m.row_begin(st); r < m.row_end(st); ++r) {
      EXPECT_NEAR(s.q[r], backup[r], slack) << m.state_name(st) << " " << m.row_action_name(r);
    }
    ASSERT_GE(s.best_row[st], m.row_begin(st));
    ASSERT_LT(s.best_row[st], m.row_end(st));
    EXPECT_NEAR(backup[s.best_row[st]], s.values[st], slack + s.value_error_bound);
  }
}

INSTANTIATE_TEST_SUITE_P(Seeds, RenumberSolveTest, ::testing::Values(1, 2, 3, 4, 5, 6));

TEST(RenumberTest, ShuffledLocalModelIsRenumberedByTheAutoRuleWithTheSameAnswers) {
  const Model m = testing::MustBuild(RingSpec(kLargeStates, 2, 3, 16, 3, true));
  for (Method method : {Method::kValueIteration, Method::kPolicyIteration}) {
    SCOPED_TRACE(std::string(MethodName(method)));
    const Solution automatic = SolveWith(m, method, Renumber::kAuto, 1e-6);
    const Solution off = SolveWith(m, method, Renumber::kOff, 1e-6);
    ExpectSameAnswers(m, automatic, off);
  }
}

// The share of far entries the locality order leaves, over the share before.
double OrderFarRatio(const Model& m) {
  return FarEntryFraction(m, LocalityOrder(m).new_of_old, 2) / FarEntryFraction(m, {}, 2);
}

std::string Describe(const std::vector<internal::LayerProbe>& probes) {
  std::string out;
  for (const internal::LayerProbe& p : probes) {
    out += "start " + std::to_string(p.start) + ": " + std::to_string(p.layers) +
           " layers, widest " + std::to_string(p.widest) + ", reached " +
           std::to_string(p.reached) + (p.wide ? " (wide)\n" : "\n");
  }
  return out;
}

TEST(RenumberTest, ProbeFindsWideLayersInALargeRandomModelAndTheRuleSkipsTheOrder) {
  RandomModelOptions o;
  o.states = kLargeStates;
  o.max_actions = 2;
  o.max_outcomes = 6;
  const Model m = testing::MustBuild(RandomSpec(9, o));
  ASSERT_GE(m.num_entries(), internal::kRenumberMinEntries);
  const std::vector<internal::LayerProbe> probes = internal::ProbeLayers(m);
  SCOPED_TRACE(Describe(probes));
  ASSERT_EQ(probes.size(), static_cast<size_t>(internal::kProbeStarts));
  for (const internal::LayerProbe& p : probes) {
    EXPECT_TRUE(p.wide);
    EXPECT_GT(p.widest, internal::kLocalityWindow);
    EXPECT_LE(p.layers, internal::kProbeMaxLayers);
    EXPECT_GT(m.row_end(p.start), m.row_begin(p.start));  // Starts have entries.
  }
  EXPECT_FALSE(internal::OrderCanPay(m));
  internal::RenumberStep step = internal::RenumberStep::kRenumbered;
  EXPECT_FALSE(internal::RenumberForLocality(m, Renumber::kAuto, 2, &step).has_value());
  EXPECT_EQ(step, internal::RenumberStep::kExpands);
  // The skip is right: the order, computed anyway, leaves more than half the far share.
  EXPECT_GT(OrderFarRatio(m), internal::kRenumberMaxFarRatio);
  // kOn still forces the order.
  EXPECT_TRUE(internal::RenumberForLocality(m, Renumber::kOn, 2, &step).has_value());
  EXPECT_EQ(step, internal::RenumberStep::kRenumbered);
}

TEST(RenumberTest, ProbeStaysNarrowOnShuffledRingsAndGridsAndTheRuleRenumbers) {
  const Model ring = testing::MustBuild(RingSpec(kLargeStates, 2, 3, 16, 7, true));
  const Model grid = testing::MustBuild(ShuffledGridSpec(550, 4));
  ASSERT_GE(grid.num_entries(), internal::kRenumberMinEntries);
  for (const Model* m : {&ring, &grid}) {
    SCOPED_TRACE(m->name());
    const std::vector<internal::LayerProbe> probes = internal::ProbeLayers(*m);
    SCOPED_TRACE(Describe(probes));
    ASSERT_EQ(probes.size(), static_cast<size_t>(internal::kProbeStarts));
    for (const internal::LayerProbe& p : probes) {
      EXPECT_FALSE(p.wide);
      EXPECT_EQ(p.layers, internal::kProbeMaxLayers);
      // Within k = kProbeMaxLayers - 1 steps the ring reaches at most the 2 * 16k states
      // around the start, the grid the 2k(k + 1) cells at most k moves away.
      const StateId k = internal::kProbeMaxLayers - 1;
      EXPECT_LE(p.reached, 1 + (m == &ring ? 32 * k : 2 * k * (k + 1)));
    }
    EXPECT_TRUE(internal::OrderCanPay(*m));
    internal::RenumberStep step = internal::RenumberStep::kNotAsked;
    const auto r = internal::RenumberForLocality(*m, Renumber::kAuto, 2, &step);
    EXPECT_EQ(step, internal::RenumberStep::kRenumbered);
    ASSERT_TRUE(r.has_value());
    EXPECT_LT(r->far_after, 1e-3);
  }
}

TEST(RenumberTest, ProbeSkipsOnlyWhereTheOrderDoesNotPay) {
  // Shuffled rings with a share of their outcomes sent anywhere: the more, the faster the
  // searches grow. The probe may leave a hopeless case to the order (it then computes and
  // declines), but must never skip a model the order would halve.
  bool skipped_any = false, kept_any = false;
  for (double share : {0.0, 0.001, 0.1, 0.5}) {
    SCOPED_TRACE("random share " + std::to_string(share));
    const Model m = testing::MustBuild(RingSpec(kLargeStates, 2, 3, 16, 12, true, share));
    const bool can_pay = internal::OrderCanPay(m);
    const double ratio = OrderFarRatio(m);
    SCOPED_TRACE(Describe(internal::ProbeLayers(m)) + "order far ratio " +
                 std::to_string(ratio));
    if (!can_pay) {
      EXPECT_GT(ratio, internal::kRenumberMaxFarRatio);
    }
    (can_pay ? kept_any : skipped_any) = true;
  }
  EXPECT_TRUE(skipped_any);  // Else the loop above checked nothing.
  EXPECT_TRUE(kept_any);
}

TEST(RenumberTest, AutoRuleLeavesSmallWellOrderedAndRandomModelsAlone) {
  // Small: too few entries (its values fit in cache whatever the order).
  const Model small = testing::MustBuild(RingSpec(5000, 2, 3, 16, 5, true));
  EXPECT_LT(small.num_entries(), internal::kRenumberMinEntries);
  internal::RenumberStep step = internal::RenumberStep::kRenumbered;
  EXPECT_FALSE(internal::RenumberForLocality(small, Renumber::kAuto, 1, &step).has_value());
  EXPECT_EQ(step, internal::RenumberStep::kTooSmall);
  EXPECT_TRUE(internal::RenumberForLocality(small, Renumber::kOn, 1).has_value());
  EXPECT_EQ(SolveWith(small, Method::kValueIteration, Renumber::kAuto).options.renumber,
            Renumber::kOff);
  // Large but already local: the score says no.
  const Model local = testing::MustBuild(RingSpec(kLargeStates, 2, 3, 16, 5, false));
  EXPECT_FALSE(internal::RenumberForLocality(local, Renumber::kAuto, 2, &step).has_value());
  EXPECT_EQ(step, internal::RenumberStep::kAlreadyLocal);
  // Large and random: no order makes it local, so the copy would not pay.
  RandomModelOptions o;
  o.states = kLargeStates;
  o.max_actions = 2;
  o.max_outcomes = 6;
  const Model random = testing::MustBuild(RandomSpec(9, o));
  ASSERT_GE(random.num_entries(), internal::kRenumberMinEntries);
  EXPECT_FALSE(internal::RenumberForLocality(random, Renumber::kAuto, 2, &step).has_value());
  EXPECT_EQ(step, internal::RenumberStep::kExpands);
  EXPECT_FALSE(internal::RenumberForLocality(random, Renumber::kOff, 2, &step).has_value());
  EXPECT_EQ(step, internal::RenumberStep::kNotAsked);
}

TEST(RenumberTest, OtherCriteriaAreNeverRenumbered) {
  // Their answers list states (recurrent classes, notes) in numbering order.
  ModelSpec spec = RingSpec(200, 2, 3, 4, 8, true);
  spec.criterion = testing::CriterionOf(CriterionKind::kFiniteHorizon, 1.0, 5);
  const Model m = testing::MustBuild(spec);
  SolveOptions options;
  options.renumber = Renumber::kOn;
  Result<Solution> s = Solve(m, options);
  ASSERT_OK(s);
  EXPECT_EQ(s->options.renumber, Renumber::kOff);
}

}  // namespace
}  // namespace mdp
