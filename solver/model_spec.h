// ModelSpec is a finite MDP as its author wrote it: states, actions and outcomes in document
// order, probabilities as given (not yet normalised), nothing merged. It is what a decoder
// fills and what Validate() checks; BuildModel() compiles it into a solver-ready Model.
// A plain value type: not synchronised, owned by whoever holds it.
#ifndef MDP_SOLVER_MODEL_SPEC_H_
#define MDP_SOLVER_MODEL_SPEC_H_

#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

namespace mdp {

enum class Objective { kMaximize, kMinimize };

// How rewards over time combine into a value (api-schema/README.md states each in full).
enum class CriterionKind {
  kDiscounted,     // sum_t g^t r_t, g in [0, 1).
  kAverage,        // Long-run reward per step (gain), with a bias.
  kFiniteHorizon,  // sum_{t<H} g^t r_t + g^H V_H(S_H), g in [0, 1]; stage-dependent policy.
  kTotal,          // sum_t r_t until a terminal (goal) state is reached; undiscounted.
};

// "discounted", "average", "finite_horizon", "total".
std::string_view CriterionKindName(CriterionKind kind);

// Largest horizon a finite-horizon criterion may name; the per-stage value table is further
// limited to kMaxStageTableEntries = (horizon + 1) x states.
inline constexpr int64_t kMaxHorizon = 1000000;
inline constexpr int64_t kMaxStageTableEntries = int64_t{1} << 28;

struct Criterion {
  CriterionKind kind = CriterionKind::kDiscounted;
  // kDiscounted: in [0, 1). kFiniteHorizon: in [0, 1], default 1. Otherwise unused (1).
  double discount = 0.9;
  int64_t horizon = 0;  // kFiniteHorizon: 1..kMaxHorizon periods. Otherwise 0.
  // kFiniteHorizon: V_H per state, the value of ending the horizon there; empty means 0
  // everywhere. Terminal (absorbing) states must have 0.
  std::vector<double> terminal_values;
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
