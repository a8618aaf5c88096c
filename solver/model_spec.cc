#include "solver/model_spec.h"

#include <algorithm>
#include <cassert>

namespace mdp {

std::string_view CriterionKindName(CriterionKind kind) {
  switch (kind) {
    case CriterionKind::kDiscounted: return "discounted";
    case CriterionKind::kAverage: return "average";
    case CriterionKind::kFiniteHorizon: return "finite_horizon";
    case CriterionKind::kTotal: return "total";
  }
  return "discounted";
}

StateId ModelSpec::AddState(std::string state_name, bool is_terminal) {
  state_names.push_back(std::move(state_name));
  terminal.push_back(is_terminal ? 1 : 0);
  state_first_slot.push_back(num_slots());
  return num_states() - 1;
}

SlotId ModelSpec::AddStateAction(ActionId action, double reward) {
  assert(!state_names.empty());
  slot_action.push_back(action);
  slot_reward.push_back(reward);
  slot_first_outcome.push_back(num_outcomes());
  state_first_slot.back() = num_slots();
  return num_slots() - 1;
}

void ModelSpec::AddOutcome(StateId next, double probability, double reward) {
  assert(!slot_action.empty());
  outcome_next.push_back(next);
  outcome_probability.push_back(probability);
  outcome_reward.push_back(reward);
  slot_first_outcome.back() = num_outcomes();
}

ActionId ModelSpec::InternAction(const std::string& action_name) {
  auto it = std::find(action_names.begin(), action_names.end(), action_name);
  if (it != action_names.end()) return static_cast<ActionId>(it - action_names.begin());
  action_names.push_back(action_name);
  return static_cast<ActionId>(action_names.size() - 1);
}

}  // namespace mdp
