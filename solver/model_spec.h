// ModelSpec is a finite MDP as its author wrote it: states, actions and outcomes in document
// order, probabilities as given (not yet normalised), nothing merged. It is what a decoder
// fills and what Validate() checks; BuildModel() compiles it into a solver-ready Model.
// A plain value type: not synchronised, owned by whoever holds it.
#ifndef MDP_SOLVER_MODEL_SPEC_H_
#define MDP_SOLVER_MODEL_SPEC_H_

#include <cstdint>
#include <string>
#include <vector>

namespace mdp {

enum class Objective { kMaximize, kMinimize };

enum class CriterionKind { kDiscounted };

struct Criterion {
  CriterionKind kind = CriterionKind::kDiscounted;
  double discount = 0.9;  // In [0, 1) for kDiscounted.
};

// Index types. States and catalogue actions fit in 32 bits (caps are far below 2^31);
// state actions ("slots", one per (state, available action)) and outcomes use 64 bits.
using StateId = int32_t;
using ActionId = int32_t;
using SlotId = int64_t;
using OutcomeId = int64_t;

struct ModelSpec {
  std::string name;
  std::string description;
  std::string reward_unit;
  Objective objective = Objective::kMaximize;
  Criterion criterion;

  std::vector<std::string> action_names;  // The action catalogue.

  std::vector<std::string> state_names;
  std::vector<uint8_t> terminal;              // Per state, 1 iff absorbing with value 0.
  std::vector<SlotId> state_first_slot = {0};  // Size states + 1.

  std::vector<ActionId> slot_action;  // Per slot: index into action_names.
  std::vector<double> slot_reward;    // Per slot: expected immediate reward given on (s, a).
  std::vector<OutcomeId> slot_first_outcome = {0};  // Size slots + 1.

  std::vector<StateId> outcome_next;  // Per outcome: next state index.
  std::vector<double> outcome_probability;
  std::vector<double> outcome_reward;

  StateId num_states() const { return static_cast<StateId>(state_names.size()); }
  SlotId num_slots() const { return static_cast<SlotId>(slot_action.size()); }
  OutcomeId num_outcomes() const { return static_cast<OutcomeId>(outcome_next.size()); }

  // Appends a state with no actions yet; returns its index.
  StateId AddState(std::string state_name, bool is_terminal = false);
  // Appends an available action to the last added state; returns the slot index.
  // REQUIRES: at least one state.
  SlotId AddStateAction(ActionId action, double reward = 0.0);
  // Appends an outcome to the last added slot. REQUIRES: at least one slot.
  void AddOutcome(StateId next, double probability, double reward = 0.0);
  // Returns the index of `action_name` in the catalogue, appending it if absent.
  ActionId InternAction(const std::string& action_name);
};

}  // namespace mdp

#endif  // MDP_SOLVER_MODEL_SPEC_H_
