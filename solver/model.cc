#include "solver/model.h"

#include <algorithm>
#include <functional>
#include <new>
#include <utility>

#include "solver/validate.h"

namespace mdp {

std::optional<StateId> Model::FindState(std::string_view state_name) const {
  if (state_index_.empty()) return std::nullopt;
  const size_t mask = state_index_.size() - 1;
  for (size_t i = std::hash<std::string_view>()(state_name) & mask;; i = (i + 1) & mask) {
    const StateId s = state_index_[i];
    if (s < 0) return std::nullopt;
    if (state_names_[s] == state_name) return s;
  }
}

std::optional<RowId> Model::FindRow(StateId s, std::string_view action_name) const {
  for (RowId r = row_begin(s); r < row_end(s); ++r) {
    if (action_names_[row_action_[r]] == action_name) return r;
  }
  return std::nullopt;
}

int64_t Model::ByteSize() const {
  int64_t bytes = 0;
  for (const auto& n : state_names_) bytes += static_cast<int64_t>(sizeof(n) + n.capacity());
  for (const auto& n : action_names_) bytes += static_cast<int64_t>(sizeof(n) + n.capacity());
  bytes += static_cast<int64_t>(state_index_.capacity() * sizeof(StateId));
  bytes += static_cast<int64_t>(terminal_.size() + state_row_begin_.size() * sizeof(RowId) +
                                row_action_.size() * sizeof(ActionId) +
                                row_reward_.size() * sizeof(double) +
                                row_entry_begin_.size() * sizeof(int64_t) +
                                entry_next_.size() * sizeof(StateId) +
                                entry_probability_.size() * sizeof(double));
  return bytes;
}

namespace {

// Appends the outcomes of one spec slot as merged, sorted entries; returns the row's
// expected reward. Probabilities are scaled by 1 / sum so each row sums to 1 exactly up to
// rounding (the spec passed validation, so the sum is within 1e-6 of 1).
double AppendRow(const ModelSpec& spec, SlotId slot, std::vector<std::pair<StateId, double>>& tmp,
                 internal::LargeVector<StateId>& next, internal::LargeVector<double>& prob) {
  const size_t row_start = next.size();
  const OutcomeId begin = spec.slot_first_outcome[slot];
  const OutcomeId end = spec.slot_first_outcome[slot + 1];
  double sum = 0.0;
  double reward = 0.0;
  tmp.clear();
  for (OutcomeId o = begin; o < end; ++o) {
    sum += spec.outcome_probability[o];
    reward += spec.outcome_probability[o] * spec.outcome_reward[o];
    tmp.emplace_back(spec.outcome_next[o], spec.outcome_probability[o]);
  }
  std::sort(tmp.begin(), tmp.end());
  for (size_t i = 0; i < tmp.size(); ++i) {
    if (tmp[i].second == 0.0) continue;
    if (next.size() > row_start && next.back() == tmp[i].first) {
      prob.back() += tmp[i].second / sum;
      continue;
    }
    next.push_back(tmp[i].first);
    prob.push_back(tmp[i].second / sum);
  }
  return spec.slot_reward[slot] + reward / sum;
}

// FindState's table for `names` (unique, as validated). One array rather than a hash node
// per name: for a million states 8 MB instead of about 50 MB and a million allocations.
std::vector<StateId> NameIndex(const std::vector<std::string>& names) {
  size_t capacity = 16;
  while (capacity < 2 * names.size()) capacity *= 2;
  std::vector<StateId> table(capacity, -1);
  const std::hash<std::string_view> hash;
  for (size_t s = 0; s < names.size(); ++s) {
    size_t i = hash(names[s]) & (capacity - 1);
    while (table[i] >= 0) i = (i + 1) & (capacity - 1);
    table[i] = static_cast<StateId>(s);
  }
  return table;
}

}  // namespace

Result<Model> BuildModel(const ModelSpec& spec) {
  ValidateOptions first_error_only;
  first_error_only.max_errors = 1;
  first_error_only.max_warnings = 0;
  ValidationReport report = Validate(spec, first_error_only);
  if (!report.proof) {
    return InvalidArgumentError("model is not valid: " + report.errors.front().message);
  }
  return BuildModel(spec, *report.proof);
}

Result<Model> BuildModel(const ModelSpec& spec, const ValidSpecProof& proof) {
  if (!proof.Covers(spec)) return BuildModel(spec);
  try {
    Model m;
    m.name_ = spec.name;
    m.description_ = spec.description;
    m.reward_unit_ = spec.reward_unit;
    m.objective_ = spec.objective;
    m.criterion_ = spec.criterion;
    m.outcomes_in_document_ = spec.num_outcomes();
    m.state_names_ = spec.state_names;
    m.action_names_ = spec.action_names;
    m.terminal_ = spec.terminal;
    m.state_row_begin_.assign(spec.state_first_slot.begin(), spec.state_first_slot.end());
    m.row_action_ = spec.slot_action;
    m.row_reward_.resize(spec.num_slots());
    m.row_entry_begin_.reserve(spec.num_slots() + 1);
    m.row_entry_begin_.push_back(0);
    m.entry_next_.reserve(spec.num_outcomes());
    m.entry_probability_.reserve(spec.num_outcomes());
    std::vector<std::pair<StateId, double>> tmp;
    for (SlotId slot = 0; slot < spec.num_slots(); ++slot) {
      m.row_reward_[slot] = AppendRow(spec, slot, tmp, m.entry_next_, m.entry_probability_);
      m.row_entry_begin_.push_back(static_cast<int64_t>(m.entry_next_.size()));
    }
    m.entry_next_.shrink_to_fit();
    m.entry_probability_.shrink_to_fit();
    m.state_index_ = NameIndex(m.state_names_);
    return m;
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory while building the model");
  }
}

}  // namespace mdp
