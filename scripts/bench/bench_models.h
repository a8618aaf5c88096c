// Seeded benchmark models of a given size and structure, generated directly as a ModelSpec.
// Same shape and seed, same model, on any machine: every state draws from its own counter-
// based random stream, so a relabelled structure (kLocalShuffled) is exactly kLocal with its
// states renumbered. Plain functions; the caller owns what they return.
#ifndef MDP_SCRIPTS_BENCH_BENCH_MODELS_H_
#define MDP_SCRIPTS_BENCH_BENCH_MODELS_H_

#include <cstdint>
#include <optional>
#include <string_view>

#include "solver/model_spec.h"

namespace mdp::bench {

enum class Structure {
  kRandom,         // Next states uniform over all states: V is read at random.
  kLocal,          // Next states within +-reach of s (on a ring).
  kLocalShuffled,  // kLocal with states renumbered at random: same model, no locality.
  kGrid,           // A width x ceil(states / width) grid, king moves that slip sideways.
  kInventory,      // Stock level 0..states-1; order quantities; random demand.
};

std::string_view StructureName(Structure structure);  // "random", "local", ...
std::optional<Structure> ParseStructure(std::string_view name);

struct ModelShape {
  Structure structure = Structure::kRandom;
  int64_t states = 100000;  // Exactly this many states.
  int actions = 4;          // Per state; kGrid allows at most 8 (compass directions).
  int outcomes = 8;         // Per action before merging; kGrid allows at most 8.
  uint64_t seed = 1;
  double discount = 0.99;
  int64_t reach = 16;  // kLocal, kLocalShuffled: |next - s| <= reach (mod states).
};

// The model of `shape`, discounted, maximising, without terminal states. Outcomes that land
// on the same next state (walls, stock limits, random collisions) are left unmerged, as an
// author would write them; BuildModel merges them.
// REQUIRES: states >= 1, actions >= 1, outcomes >= 1 (and <= 8 for kGrid).
ModelSpec GenerateSpec(const ModelShape& shape);

}  // namespace mdp::bench

#endif  // MDP_SCRIPTS_BENCH_BENCH_MODELS_H_
