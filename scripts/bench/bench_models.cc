#include "scripts/bench/bench_models.h"

#include <algorithm>
#include <array>
#include <cassert>
#include <cmath>
#include <numeric>
#include <string>
#include <vector>

namespace mdp::bench {
namespace {

// A counter-based random stream per (seed, state): the SplitMix64 finaliser applied to a
// Weyl sequence. Seeding per state (not one stream for the whole model) is what lets the
// shuffled structure generate each state's rows exactly as the unshuffled one does.
class StateRng {
 public:
  StateRng(uint64_t seed, int64_t state)
      : x_(Mix(seed * 0x9E3779B97F4A7C15ULL ^ Mix(static_cast<uint64_t>(state) + 1))) {}
  uint64_t Next() { return Mix(x_ += 0x9E3779B97F4A7C15ULL); }
  double Unit() { return static_cast<double>(Next() >> 11) * 0x1.0p-53; }  // In [0, 1).
  int64_t Below(int64_t n) { return static_cast<int64_t>(Next() % static_cast<uint64_t>(n)); }

 private:
  static uint64_t Mix(uint64_t z) {
    z = (z ^ (z >> 30)) * 0xBF58476D1CE4E5B9ULL;
    z = (z ^ (z >> 27)) * 0x94D049BB133111EBULL;
    return z ^ (z >> 31);
  }
  uint64_t x_;
};

// Appends one state's rows to the spec, renaming next states through `label` (old -> new)
// when it is not empty.
class SpecSink {
 public:
  SpecSink(ModelSpec& spec, const std::vector<StateId>& label) : spec_(spec), label_(label) {}
  void Action(int a, double reward) { spec_.AddStateAction(a, reward); }
  void Outcome(int64_t next, double probability) {
    spec_.AddOutcome(label_.empty() ? static_cast<StateId>(next) : label_[next], probability);
  }

 private:
  ModelSpec& spec_;
  const std::vector<StateId>& label_;
};

// Random and local structures: reward uniform in [-1, 1), weights uniform in [0.05, 1.05)
// normalised, next states anywhere (random) or within +-reach on a ring (local).
void EmitScattered(const ModelShape& shape, int64_t s, StateRng& rng, SpecSink& sink) {
  const bool local = shape.structure != Structure::kRandom;
  const int64_t n = shape.states;
  const int64_t width = std::min<int64_t>(2 * shape.reach + 1, n);
  std::vector<double> weight(shape.outcomes);
  for (int a = 0; a < shape.actions; ++a) {
    sink.Action(a, 2.0 * rng.Unit() - 1.0);
    for (double& w : weight) w = 0.05 + rng.Unit();
    const double sum = std::accumulate(weight.begin(), weight.end(), 0.0);
    for (double w : weight) {
      const int64_t next = local ? ((s + rng.Below(width) - width / 2) % n + n) % n
                                 : rng.Below(n);
      sink.Outcome(next, w / sum);
    }
  }
}

// Grid: compass directions N, NE, E, SE, S, SW, W, NW (y grows southwards).
constexpr std::array<int, 8> kDx = {0, 1, 1, 1, 0, -1, -1, -1};
constexpr std::array<int, 8> kDy = {-1, -1, 0, 1, 1, 1, 0, -1};
constexpr int kStay = 100;
struct Slip {
  int turn;  // Compass steps away from the intended direction, or kStay.
  double probability;
};
// Mostly where intended, sometimes sideways, rarely nowhere or backwards-sideways.
constexpr std::array<Slip, 8> kSlips = {{{0, 0.6}, {-1, 0.1}, {1, 0.1}, {-2, 0.05},
                                         {2, 0.05}, {kStay, 0.05}, {3, 0.025}, {-3, 0.025}}};

int64_t GridWidth(int64_t states) {
  return std::max<int64_t>(1, static_cast<int64_t>(std::ceil(std::sqrt(double(states)))));
}

// Cell s of a ragged grid (the last row may be short); a move off the grid stays put.
void EmitGrid(const ModelShape& shape, int64_t s, StateRng& rng, SpecSink& sink) {
  const int64_t w = GridWidth(shape.states);
  const int64_t x = s % w, y = s / w;
  // Step cost in [-1, 0); about one cell in a thousand is a goal worth +10 per visit.
  const double cell_reward = rng.Below(1000) == 0 ? 10.0 : -rng.Unit();
  double total = 0.0;
  for (int k = 0; k < shape.outcomes; ++k) total += kSlips[k].probability;
  for (int a = 0; a < shape.actions; ++a) {
    const int intended = a * 8 / shape.actions;
    sink.Action(a, cell_reward);
    for (int k = 0; k < shape.outcomes; ++k) {
      int64_t next = s;
      if (kSlips[k].turn != kStay) {
        const int d = ((intended + kSlips[k].turn) % 8 + 8) % 8;
        const int64_t nx = x + kDx[d], ny = y + kDy[d];
        if (nx >= 0 && nx < w && ny >= 0 && ny * w + nx < shape.states) next = ny * w + nx;
      }
      sink.Outcome(next, kSlips[k].probability / total);
    }
  }
}

// Inventory: stock s; action a orders q_a units (0 .. 2 mu); demand takes `outcomes` values
// spread over 0 .. 2 mu with binomial weights (mean mu); sales are capped by stock and stock
// by capacity. Reward = 2 per unit sold - 1 per unit ordered - 0.5 per order - 0.001 per
// unit held, all divided by mu.
void EmitInventory(const ModelShape& shape, int64_t s, SpecSink& sink) {
  const int64_t capacity = shape.states - 1;
  const int64_t mu = std::clamp<int64_t>(shape.states / 64, 1, 32);
  const int k_max = shape.outcomes - 1;
  std::vector<int64_t> demand(shape.outcomes);
  std::vector<double> p(shape.outcomes);
  double binomial = 1.0;  // C(k_max, k), built up incrementally.
  for (int k = 0; k <= k_max; ++k) {
    demand[k] = k_max == 0 ? mu : (2 * mu * k + k_max / 2) / k_max;
    p[k] = binomial / std::ldexp(1.0, k_max);
    binomial = binomial * (k_max - k) / (k + 1);
  }
  for (int a = 0; a < shape.actions; ++a) {
    const int64_t q = shape.actions == 1 ? 0 : (2 * mu * a + (shape.actions - 1) / 2) /
                                                   (shape.actions - 1);
    const int64_t stock = s + q;
    double sales = 0.0;
    for (int k = 0; k <= k_max; ++k) sales += p[k] * double(std::min(stock, demand[k]));
    const double reward =
        (2.0 * sales - 1.0 * double(q) - (q > 0 ? 0.5 : 0.0) - 0.001 * double(s)) / double(mu);
    sink.Action(a, reward);
    for (int k = 0; k <= k_max; ++k) {
      sink.Outcome(std::clamp<int64_t>(stock - demand[k], 0, capacity), p[k]);
    }
  }
}

std::vector<std::string> ActionNames(const ModelShape& shape) {
  static constexpr std::array<const char*, 8> kCompass = {"N", "NE", "E", "SE",
                                                          "S", "SW", "W", "NW"};
  std::vector<std::string> names;
  for (int a = 0; a < shape.actions; ++a) {
    switch (shape.structure) {
      case Structure::kGrid: names.emplace_back(kCompass[a * 8 / shape.actions]); break;
      case Structure::kInventory: names.push_back("order" + std::to_string(a)); break;
      default: names.push_back("a" + std::to_string(a)); break;
    }
  }
  return names;
}

// A random permutation old -> new (Fisher-Yates), empty unless the structure shuffles.
std::vector<StateId> Relabelling(const ModelShape& shape) {
  std::vector<StateId> label;
  if (shape.structure != Structure::kLocalShuffled) return label;
  label.resize(shape.states);
  std::iota(label.begin(), label.end(), StateId{0});
  StateRng rng(shape.seed, -1);
  for (int64_t i = shape.states - 1; i > 0; --i) std::swap(label[i], label[rng.Below(i + 1)]);
  return label;
}

}  // namespace

std::string_view StructureName(Structure structure) {
  switch (structure) {
    case Structure::kRandom: return "random";
    case Structure::kLocal: return "local";
    case Structure::kLocalShuffled: return "local_shuffled";
    case Structure::kGrid: return "grid";
    case Structure::kInventory: return "inventory";
  }
  return "random";
}

std::optional<Structure> ParseStructure(std::string_view name) {
  for (Structure s : {Structure::kRandom, Structure::kLocal, Structure::kLocalShuffled,
                      Structure::kGrid, Structure::kInventory}) {
    if (StructureName(s) == name) return s;
  }
  return std::nullopt;
}

ModelSpec GenerateSpec(const ModelShape& shape) {
  assert(shape.states >= 1 && shape.actions >= 1 && shape.outcomes >= 1);
  assert(shape.structure != Structure::kGrid || (shape.actions <= 8 && shape.outcomes <= 8));
  ModelSpec spec;
  spec.name = "bench-" + std::string(StructureName(shape.structure));
  spec.criterion.discount = shape.discount;
  spec.action_names = ActionNames(shape);
  const int64_t slots = shape.states * shape.actions;
  const int64_t outcomes = slots * shape.outcomes;
  spec.state_names.reserve(shape.states);
  spec.terminal.reserve(shape.states);
  spec.state_first_slot.reserve(shape.states + 1);
  spec.slot_action.reserve(slots);
  spec.slot_reward.reserve(slots);
  spec.slot_first_outcome.reserve(slots + 1);
  spec.outcome_next.reserve(outcomes);
  spec.outcome_probability.reserve(outcomes);
  spec.outcome_reward.reserve(outcomes);

  const std::vector<StateId> label = Relabelling(shape);
  std::vector<StateId> old_of_new(label.size());
  for (size_t old = 0; old < label.size(); ++old) old_of_new[label[old]] = StateId(old);
  SpecSink sink(spec, label);
  for (int64_t t = 0; t < shape.states; ++t) {
    const int64_t s = label.empty() ? t : old_of_new[t];
    spec.AddState("s" + std::to_string(t));
    StateRng rng(shape.seed, s);
    switch (shape.structure) {
      case Structure::kRandom:
      case Structure::kLocal:
      case Structure::kLocalShuffled: EmitScattered(shape, s, rng, sink); break;
      case Structure::kGrid: EmitGrid(shape, s, rng, sink); break;
      case Structure::kInventory: EmitInventory(shape, s, sink); break;
    }
  }
  return spec;
}

}  // namespace mdp::bench
