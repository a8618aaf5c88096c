// Validate() checks a ModelSpec and returns every problem it finds (up to a cap), each with
// the place it concerns; it never stops at the first. Errors make a model unusable; warnings
// do not. Pure function of its input: thread-safe, returns values the caller owns.
//
// Rules (api-schema/README.md is the user-facing statement of them):
//  - the criterion's parameters: discount in [0, 1) (discounted) or [0, 1] (finite horizon);
//    horizon in 1..kMaxHorizon with (horizon + 1) x states <= kMaxStageTableEntries; terminal
//    values finite, one per state or none, 0 at terminal states; total reward needs at least
//    one terminal (goal) state;
//  - at least one state; at least one catalogue action;
//  - non-terminal states have at least one action, terminal states none;
//  - each state action names a catalogue action, at most once per state, and has outcomes;
//  - outcome next states exist; probabilities finite and in [0, 1]; rewards finite;
//  - outcome probabilities of a state action sum to 1 within kProbabilitySumTolerance;
//  - names non-empty and unique (states; catalogue actions);
//  - warnings: states no other state leads to, catalogue actions never used, outcomes with
//    probability 0.
#ifndef MDP_SOLVER_VALIDATE_H_
#define MDP_SOLVER_VALIDATE_H_

#include <cstdint>
#include <functional>
#include <optional>
#include <string>
#include <utility>
#include <vector>

#include "solver/model_spec.h"

namespace mdp {

// Absolute tolerance on |sum of outcome probabilities - 1| for one state action.
inline constexpr double kProbabilitySumTolerance = 1e-6;

// Which part of the model a finding is about. Indices that do not apply are -1.
struct Location {
  enum class Field {
    kModel,              // The whole model.
    kDiscount,           // criterion.discount
    kCriterion,          // The criterion as a whole (e.g. total reward without a goal).
    kHorizon,            // criterion.horizon
    kTerminalValue,      // criterion.terminal_values[state name]
    kStates,             // The states list.
    kCatalogue,          // The action catalogue.
    kCatalogueEntry,     // catalogue[action]
    kStateName,          // states[state].name
    kStateActions,       // states[state].actions
    kSlotAction,         // states[state].actions[slot].action
    kSlotReward,         // states[state].actions[slot].reward
    kSlotOutcomes,       // states[state].actions[slot].outcomes
    kOutcomeNext,        // ...outcomes[outcome].next
    kOutcomeProbability, // ...outcomes[outcome].probability
    kOutcomeReward,      // ...outcomes[outcome].reward
    kState,              // states[state]
  };
  Field field = Field::kModel;
  int64_t state = -1;    // Index of the state.
  int64_t slot = -1;     // Index of the action within its state (0-based, document order).
  int64_t outcome = -1;  // Index of the outcome within its state action.
  int64_t action = -1;   // Index in the catalogue (kCatalogueEntry).
};

struct Finding {
  enum class Severity { kError, kWarning };
  Severity severity = Severity::kError;
  Location where;
  std::string message;  // Plain words, e.g. "probabilities sum to 0.97, not 1".
};

struct ValidateOptions {
  int64_t max_errors = 100;  // Errors listed; beyond this only counted.
  int64_t max_warnings = 100;
  // If set, findings for which it returns true are dropped: neither listed nor counted.
  // A decoder that has already reported a problem uses it to avoid reporting it twice.
  std::function<bool(const Finding&)> skip;
};

struct ValidationReport;
ValidationReport Validate(const ModelSpec& spec, const ValidateOptions& options);

// Evidence that Validate() found no error at all (listed, over the cap, or dropped by `skip`)
// in one ModelSpec, so that BuildModel(spec, proof) need not validate it again. Only
// Validate() makes one. It names the spec object and the size and storage of each of its
// arrays, so it never vouches for another spec or for one whose arrays were resized or
// reallocated. REQUIRES (not checked): the values in the spec are not changed between
// Validate() and BuildModel(). A plain copyable value.
class ValidSpecProof {
 public:
  // True iff Validate() made this proof for `spec` as it is sized and stored now.
  bool Covers(const ModelSpec& spec) const { return spec_ == &spec && arrays_ == Arrays(spec); }

 private:
  friend ValidationReport Validate(const ModelSpec& spec, const ValidateOptions& options);
  using ArrayIds = std::vector<std::pair<const void*, size_t>>;
  explicit ValidSpecProof(const ModelSpec& spec) : spec_(&spec), arrays_(Arrays(spec)) {}
  static ArrayIds Arrays(const ModelSpec& spec);

  const ModelSpec* spec_;
  ArrayIds arrays_;  // Data pointer and size of every array of the spec.
};

struct ValidationReport {
  std::vector<Finding> errors;
  std::vector<Finding> warnings;
  int64_t errors_not_listed = 0;
  int64_t warnings_not_listed = 0;
  // Set iff no error was found, including errors `skip` dropped.
  std::optional<ValidSpecProof> proof;
  bool ok() const { return errors.empty() && errors_not_listed == 0; }
};

ValidationReport Validate(const ModelSpec& spec, const ValidateOptions& options = {});

}  // namespace mdp

#endif  // MDP_SOLVER_VALIDATE_H_
