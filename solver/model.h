// A Model is an immutable finite MDP compiled for solving: per state a contiguous range of
// rows (one per available action, in document order), per row the expected immediate reward
// and a sparse distribution over next states in CSR form (sorted by next state, duplicates
// merged, probabilities scaled to sum to exactly 1). Terminal states have no rows; their
// value is 0. Once built a Model may be shared by any number of threads without locking.
// Build one with BuildModel(); the caller owns the result.
#ifndef MDP_SOLVER_MODEL_H_
#define MDP_SOLVER_MODEL_H_

#include <cstdint>
#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <unordered_map>
#include <vector>

#include "solver/internal/large_array.h"
#include "solver/model_spec.h"
#include "solver/status.h"

namespace mdp {

using RowId = int64_t;  // A row is one (state, available action); same order as spec slots.

class ValidSpecProof;  // solver/validate.h

class Model;
namespace internal {
// The same MDP with states renumbered (solver/internal/renumber.h).
Model PermuteStates(const Model& m, std::span<const StateId> new_of_old, int threads);
}  // namespace internal

class Model {
 public:
  Model() = default;
  Model(Model&&) = default;
  Model& operator=(Model&&) = default;
  Model(const Model&) = delete;
  Model& operator=(const Model&) = delete;

  StateId num_states() const { return static_cast<StateId>(terminal_.size()); }
  RowId num_rows() const { return static_cast<RowId>(row_action_.size()); }
  int64_t num_entries() const { return static_cast<int64_t>(entry_next_.size()); }
  int64_t num_outcomes_in_document() const { return outcomes_in_document_; }
  ActionId num_actions() const { return static_cast<ActionId>(action_names_.size()); }

  double discount() const { return criterion_.discount; }
  const Criterion& criterion() const { return criterion_; }
  Objective objective() const { return objective_; }
  const std::string& name() const { return name_; }
  const std::string& description() const { return description_; }
  const std::string& reward_unit() const { return reward_unit_; }

  bool terminal(StateId s) const { return terminal_[s] != 0; }
  RowId row_begin(StateId s) const { return state_row_begin_[s]; }
  RowId row_end(StateId s) const { return state_row_begin_[s + 1]; }
  ActionId row_action(RowId r) const { return row_action_[r]; }
  double row_reward(RowId r) const { return row_reward_[r]; }
  int64_t entry_begin(RowId r) const { return row_entry_begin_[r]; }
  int64_t entry_end(RowId r) const { return row_entry_begin_[r + 1]; }
  StateId entry_next(int64_t e) const { return entry_next_[e]; }
  double entry_probability(int64_t e) const { return entry_probability_[e]; }

  // Raw arrays for hot loops.
  const RowId* state_row_begin_data() const { return state_row_begin_.data(); }
  const double* row_reward_data() const { return row_reward_.data(); }
  const int64_t* row_entry_begin_data() const { return row_entry_begin_.data(); }
  const StateId* entry_next_data() const { return entry_next_.data(); }
  const double* entry_probability_data() const { return entry_probability_.data(); }

  const std::string& state_name(StateId s) const { return state_names_[s]; }
  const std::string& action_name(ActionId a) const { return action_names_[a]; }
  // Name of the action row `r` takes.
  const std::string& row_action_name(RowId r) const { return action_names_[row_action_[r]]; }

  // Returns the state named `state_name`, or nullopt.
  std::optional<StateId> FindState(std::string_view state_name) const;
  // Returns the row of state `s` that takes the action named `action_name`, or nullopt.
  std::optional<RowId> FindRow(StateId s, std::string_view action_name) const;

  // Bytes held by this model (arrays and names), for cache accounting.
  int64_t ByteSize() const;

 private:
  friend Result<Model> BuildModel(const ModelSpec& spec);
  friend Result<Model> BuildModel(const ModelSpec& spec, const ValidSpecProof& proof);
  friend Model internal::PermuteStates(const Model&, std::span<const StateId>, int);

  std::string name_, description_, reward_unit_;
  Objective objective_ = Objective::kMaximize;
  Criterion criterion_;
  int64_t outcomes_in_document_ = 0;

  std::vector<std::string> state_names_;
  std::vector<std::string> action_names_;
  // FindState's index: an open-addressing table (linear probing, at most half full) of
  // state indices by name hash; -1 marks a free slot. Empty until built.
  std::vector<StateId> state_index_;

  std::vector<uint8_t> terminal_;
  // The arrays the sweeps stream, on huge pages when large (internal/large_array.h).
  internal::LargeVector<RowId> state_row_begin_;  // Size states + 1.
  std::vector<ActionId> row_action_;
  internal::LargeVector<double> row_reward_;        // Expected immediate reward r(s, a).
  internal::LargeVector<int64_t> row_entry_begin_;  // Size rows + 1.
  internal::LargeVector<StateId> entry_next_;
  internal::LargeVector<double> entry_probability_;
};

// Compiles `spec` into a Model. Returns kInvalidArgument (naming the first problem) unless
// Validate(spec) reports no errors; kResourceExhausted if memory runs out.
Result<Model> BuildModel(const ModelSpec& spec);
// The same for a caller that has just run Validate(spec) (validate.h) and holds its proof:
// compiles without validating again, or validates as above if `proof` does not cover `spec`.
Result<Model> BuildModel(const ModelSpec& spec, const ValidSpecProof& proof);

}  // namespace mdp

#endif  // MDP_SOLVER_MODEL_H_
