// A large seeded model for size tests and benchmarks: a ring of warehouse bins where each
// action shifts stock to one of several nearby bins at random. Same seed, same model.
#ifndef MDP_TESTS_LARGE_LARGE_MODEL_H_
#define MDP_TESTS_LARGE_LARGE_MODEL_H_

#include <cstdint>
#include <random>
#include <string>

#include "solver/model_spec.h"

namespace mdp::testing {

// Calls emit_state(name), emit_action(action_index, reward), emit_outcome(next, p, reward)
// in document order, so the same generator feeds a ModelSpec or a JSON writer.
template <typename State, typename Action, typename Outcome>
void GenerateLarge(int64_t states, int actions, int outcomes, uint64_t seed, State emit_state,
                   Action emit_action, Outcome emit_outcome) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  const double p = 1.0 / outcomes;  // Exact for powers of two.
  for (int64_t s = 0; s < states; ++s) {
    emit_state(s);
    for (int a = 0; a < actions; ++a) {
      emit_action(a, a == 0 ? 0.0 : -0.1 * a);
      for (int k = 0; k < outcomes; ++k) {
        // Mostly local moves (cache friendly, like real layouts) with some long jumps.
        const int64_t jump = unit(rng) < 0.9 ? static_cast<int64_t>(rng() % 64) - 32
                                             : static_cast<int64_t>(rng() % states);
        const int64_t next = ((s + jump) % states + states) % states;
        emit_outcome(next, p, 10.0 * unit(rng) - 5.0 + (next % 97 == 0 ? 20.0 : 0.0));
      }
    }
  }
}

inline ModelSpec LargeSpec(int64_t states, int actions, int outcomes, uint64_t seed) {
  ModelSpec spec;
  spec.name = "large-ring";
  spec.criterion.discount = 0.95;
  for (int a = 0; a < actions; ++a) spec.action_names.push_back("a" + std::to_string(a));
  spec.state_names.reserve(states);
  spec.slot_action.reserve(states * actions);
  spec.outcome_next.reserve(states * actions * outcomes);
  spec.outcome_probability.reserve(states * actions * outcomes);
  spec.outcome_reward.reserve(states * actions * outcomes);
  GenerateLarge(
      states, actions, outcomes, seed,
      [&](int64_t s) { spec.AddState("b" + std::to_string(s)); },
      [&](int a, double r) { spec.AddStateAction(a, r); },
      [&](int64_t next, double p, double r) {
        spec.AddOutcome(static_cast<StateId>(next), p, r);
      });
  return spec;
}

}  // namespace mdp::testing

#endif  // MDP_TESTS_LARGE_LARGE_MODEL_H_
