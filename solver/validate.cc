#include "solver/validate.h"

#include <algorithm>
#include <cmath>
#include <sstream>
#include <string_view>
#include <unordered_map>

namespace mdp {
namespace {

using Field = Location::Field;

class Collector {
 public:
  explicit Collector(const ValidateOptions& options) : options_(options) {}

  void Error(Location where, std::string message) {
    any_error_ = true;
    if (Skipped(Finding::Severity::kError, where, message)) return;
    Add(Finding::Severity::kError, where, std::move(message), report_.errors,
        report_.errors_not_listed, options_.max_errors);
  }
  void Warning(Location where, std::string message) {
    if (Skipped(Finding::Severity::kWarning, where, message)) return;
    Add(Finding::Severity::kWarning, where, std::move(message), report_.warnings,
        report_.warnings_not_listed, options_.max_warnings);
  }
  ValidationReport Take() { return std::move(report_); }
  // True iff an error was found, listed or not, skipped or not.
  bool any_error() const { return any_error_; }

 private:
  bool Skipped(Finding::Severity severity, const Location& where, const std::string& message) {
    return options_.skip && options_.skip(Finding{severity, where, message});
  }

  static void Add(Finding::Severity severity, Location where, std::string message,
                  std::vector<Finding>& list, int64_t& not_listed, int64_t cap) {
    if (static_cast<int64_t>(list.size()) >= cap) {
      ++not_listed;
      return;
    }
    list.push_back(Finding{severity, where, std::move(message)});
  }

  ValidateOptions options_;
  ValidationReport report_;
  bool any_error_ = false;
};

std::string Number(double x) {
  std::ostringstream out;
  out.precision(12);
  out << x;
  return out.str();
}

Location At(Field field, int64_t state = -1, int64_t slot = -1, int64_t outcome = -1) {
  Location where;
  where.field = field;
  where.state = state;
  where.slot = slot;
  where.outcome = outcome;
  return where;
}

void CheckFiniteHorizon(const ModelSpec& spec, Collector& out) {
  const Criterion& c = spec.criterion;
  if (!(c.discount >= 0.0 && c.discount <= 1.0)) {
    out.Error(At(Field::kDiscount), "discount must be between 0 and 1, got " + Number(c.discount));
  }
  if (c.horizon < 1 || c.horizon > kMaxHorizon) {
    out.Error(At(Field::kHorizon), "horizon must be a whole number from 1 to " +
                                       std::to_string(kMaxHorizon) + ", got " +
                                       std::to_string(c.horizon));
  } else if ((c.horizon + 1) * static_cast<int64_t>(spec.state_names.size()) >
             kMaxStageTableEntries) {
    out.Error(At(Field::kHorizon),
              "horizon " + std::to_string(c.horizon) + " with " +
                  std::to_string(spec.state_names.size()) +
                  " states needs a per-stage value table of (horizon + 1) x states entries, "
                  "more than the limit of " + std::to_string(kMaxStageTableEntries));
  }
  if (c.terminal_values.empty()) return;
  if (c.terminal_values.size() != spec.state_names.size()) {
    out.Error(At(Field::kCriterion), "internal: terminal values do not match the states");
    return;
  }
  for (StateId s = 0; s < spec.num_states(); ++s) {
    const double v = c.terminal_values[s];
    if (!std::isfinite(v)) {
      out.Error(At(Field::kTerminalValue, s), "terminal value must be a finite number");
    } else if (v != 0.0 && spec.terminal[s]) {
      out.Error(At(Field::kTerminalValue, s),
                "a terminal (absorbing) state has value 0 at every stage; got " + Number(v));
    }
  }
}

void CheckCriterion(const ModelSpec& spec, Collector& out) {
  const Criterion& c = spec.criterion;
  switch (c.kind) {
    case CriterionKind::kDiscounted:
      if (!(c.discount >= 0.0 && c.discount < 1.0)) {
        out.Error(At(Field::kDiscount),
                  "discount must be at least 0 and below 1, got " + Number(c.discount));
      }
      return;
    case CriterionKind::kFiniteHorizon:
      CheckFiniteHorizon(spec, out);
      return;
    case CriterionKind::kTotal:
      if (!spec.state_names.empty() &&
          std::find(spec.terminal.begin(), spec.terminal.end(), 1) == spec.terminal.end()) {
        out.Error(At(Field::kCriterion),
                  "the total criterion adds rewards until a terminal (goal) state is reached, "
                  "but no state is terminal; mark the goal states \"terminal\": true");
      }
      return;
    case CriterionKind::kAverage:
      return;
  }
}

void CheckHeader(const ModelSpec& spec, Collector& out) {
  CheckCriterion(spec, out);
  if (spec.state_names.empty()) out.Error(At(Field::kStates), "the model has no states");
  if (spec.action_names.empty()) out.Error(At(Field::kCatalogue), "the model lists no actions");
  std::unordered_map<std::string_view, int64_t> seen;
  for (size_t a = 0; a < spec.action_names.size(); ++a) {
    Location where = At(Field::kCatalogueEntry);
    where.action = static_cast<int64_t>(a);
    const std::string& name = spec.action_names[a];
    if (name.empty()) out.Error(where, "action name is empty");
    auto [it, inserted] = seen.emplace(name, static_cast<int64_t>(a));
    if (!inserted) {
      out.Error(where, "duplicate action name '" + name + "' (first listed at index " +
                           std::to_string(it->second) + ")");
    }
  }
}

// Finds repeated names with an open-addressing table of state indices (linear probing, at
// most half full): one array instead of a node per name, which for a million states was
// about a million allocations and frees.
void CheckStateNames(const ModelSpec& spec, Collector& out) {
  size_t capacity = 16;
  while (capacity < 2 * spec.state_names.size()) capacity *= 2;
  std::vector<StateId> first(capacity, -1);  // A slot holds the first state of its name.
  const std::hash<std::string_view> hash;
  for (StateId s = 0; s < spec.num_states(); ++s) {
    const std::string& name = spec.state_names[s];
    if (name.empty()) out.Error(At(Field::kStateName, s), "state name is empty");
    size_t i = hash(name) & (capacity - 1);
    while (first[i] >= 0 && spec.state_names[first[i]] != name) i = (i + 1) & (capacity - 1);
    if (first[i] < 0) {
      first[i] = s;
    } else {
      out.Error(At(Field::kStateName, s), "duplicate state name '" + name +
                                              "' (first defined by state " +
                                              std::to_string(first[i]) + ")");
    }
  }
}

// Checks one state action; returns nothing, reports into `out`.
void CheckSlot(const ModelSpec& spec, StateId s, SlotId slot, int64_t k,
               std::vector<uint8_t>& referenced, Collector& out) {
  const ActionId a = spec.slot_action[slot];
  if (a < 0 || a >= static_cast<ActionId>(spec.action_names.size())) {
    out.Error(At(Field::kSlotAction, s, k), "action is not in the model's action list");
  }
  if (!std::isfinite(spec.slot_reward[slot])) {
    out.Error(At(Field::kSlotReward, s, k), "reward must be a finite number");
  }
  const OutcomeId begin = spec.slot_first_outcome[slot];
  const OutcomeId end = spec.slot_first_outcome[slot + 1];
  if (begin == end) {
    out.Error(At(Field::kSlotOutcomes, s, k), "a state action needs at least one outcome");
    return;
  }
  double sum = 0.0;
  bool all_finite = true;
  for (OutcomeId o = begin; o < end; ++o) {
    const int64_t j = o - begin;
    const StateId next = spec.outcome_next[o];
    if (next < 0 || next >= spec.num_states()) {
      out.Error(At(Field::kOutcomeNext, s, k, j), "next state does not exist");
    } else if (next != s) {
      referenced[next] = 1;
    }
    const double p = spec.outcome_probability[o];
    if (!std::isfinite(p)) {
      out.Error(At(Field::kOutcomeProbability, s, k, j), "probability must be a finite number");
      all_finite = false;
    } else if (p < 0.0) {
      out.Error(At(Field::kOutcomeProbability, s, k, j), "probability is negative: " + Number(p));
    } else if (p > 1.0) {
      out.Error(At(Field::kOutcomeProbability, s, k, j), "probability exceeds 1: " + Number(p));
    } else if (p == 0.0) {
      out.Warning(At(Field::kOutcomeProbability, s, k, j), "outcome has probability 0");
    }
    if (!std::isfinite(spec.outcome_reward[o])) {
      out.Error(At(Field::kOutcomeReward, s, k, j), "reward must be a finite number");
    }
    sum += std::isfinite(p) ? p : 0.0;
  }
  if (all_finite && std::fabs(sum - 1.0) > kProbabilitySumTolerance) {
    out.Error(At(Field::kSlotOutcomes, s, k),
              "outcome probabilities sum to " + Number(sum) + ", not 1 (tolerance 1e-6)");
  }
}

void CheckStates(const ModelSpec& spec, Collector& out) {
  std::vector<uint8_t> referenced(spec.state_names.size(), 0);
  std::vector<uint8_t> used(spec.action_names.size(), 0);
  std::vector<int64_t> seen_in_state(spec.action_names.size(), -1);
  for (StateId s = 0; s < spec.num_states(); ++s) {
    const SlotId begin = spec.state_first_slot[s];
    const SlotId end = spec.state_first_slot[s + 1];
    if (spec.terminal[s] && end > begin) {
      out.Error(At(Field::kStateActions, s), "a terminal state cannot have actions");
    } else if (!spec.terminal[s] && end == begin) {
      out.Error(At(Field::kStateActions, s), "a non-terminal state needs at least one action");
    }
    for (SlotId slot = begin; slot < end; ++slot) {
      const ActionId a = spec.slot_action[slot];
      if (a >= 0 && a < static_cast<ActionId>(used.size())) {
        used[a] = 1;
        if (seen_in_state[a] == s) {
          out.Error(At(Field::kSlotAction, s, slot - begin),
                    "action '" + spec.action_names[a] + "' is listed twice in this state");
        }
        seen_in_state[a] = s;
      }
      CheckSlot(spec, s, slot, slot - begin, referenced, out);
    }
  }
  for (StateId s = 0; s < spec.num_states(); ++s) {
    if (!referenced[s] && spec.num_states() > 1) {
      out.Warning(At(Field::kState, s), "no other state leads to this state");
    }
  }
  for (size_t a = 0; a < used.size(); ++a) {
    if (!used[a]) {
      Location where = At(Field::kCatalogueEntry);
      where.action = static_cast<int64_t>(a);
      out.Warning(where, "action '" + spec.action_names[a] + "' is not available in any state");
    }
  }
}

bool ShapeIsConsistent(const ModelSpec& spec) {
  const size_t states = spec.state_names.size();
  const size_t slots = spec.slot_action.size();
  const size_t outcomes = spec.outcome_next.size();
  return spec.terminal.size() == states && spec.state_first_slot.size() == states + 1 &&
         spec.slot_reward.size() == slots && spec.slot_first_outcome.size() == slots + 1 &&
         spec.outcome_probability.size() == outcomes && spec.outcome_reward.size() == outcomes &&
         spec.state_first_slot.front() == 0 &&
         spec.state_first_slot.back() == static_cast<SlotId>(slots) &&
         spec.slot_first_outcome.front() == 0 &&
         spec.slot_first_outcome.back() == static_cast<OutcomeId>(outcomes);
}

}  // namespace

ValidationReport Validate(const ModelSpec& spec, const ValidateOptions& options) {
  Collector out(options);
  if (!ShapeIsConsistent(spec)) {
    out.Error(At(Field::kModel), "internal: model arrays have inconsistent sizes");
    return out.Take();
  }
  CheckHeader(spec, out);
  CheckStateNames(spec, out);
  CheckStates(spec, out);
  const bool valid = !out.any_error();
  ValidationReport report = out.Take();
  if (valid) report.proof = ValidSpecProof(spec);
  return report;
}

ValidSpecProof::ArrayIds ValidSpecProof::Arrays(const ModelSpec& spec) {
  auto id = [](const auto& v) { return std::pair<const void*, size_t>(v.data(), v.size()); };
  return {id(spec.action_names),     id(spec.state_names),          id(spec.terminal),
          id(spec.state_first_slot), id(spec.slot_action),          id(spec.slot_reward),
          id(spec.slot_first_outcome), id(spec.outcome_next),       id(spec.outcome_probability),
          id(spec.outcome_reward),   id(spec.criterion.terminal_values)};
}

}  // namespace mdp
