#include "solver/internal/renumber.h"

#include <omp.h>

#include <algorithm>
#include <cassert>
#include <cstdlib>
#include <numeric>
#include <tuple>
#include <utility>

#include "solver/internal/bellman.h"

namespace mdp::internal {
namespace {

// Entries of all rows of state s form one contiguous range (rows are contiguous per state and
// entries per row).
int64_t StateEntryBegin(const Model& m, StateId s) { return m.entry_begin(m.row_begin(s)); }
int64_t StateEntryEnd(const Model& m, StateId s) { return m.entry_begin(m.row_end(s)); }

// The symmetrised transition graph in CSR form: adjacent[begin[s] .. begin[s + 1]) lists the
// next states of every entry of s and the state of every entry leading to s (repeats kept:
// the search skips states already seen, and removing them would cost a sort).
struct Graph {
  std::vector<int64_t> begin;
  std::vector<StateId> adjacent;
};

// One copy of both directions, so that the search reads one range per state instead of a
// chain of row, entry and reverse-edge lookups, each a likely cache and TLB miss.
Graph SymmetricGraph(const Model& m) {
  const StateId n = m.num_states();
  const StateId* next = m.entry_next_data();
  Graph g;
  g.begin.assign(static_cast<size_t>(n) + 1, 0);
  for (StateId s = 0; s < n; ++s) {
    const int64_t first = StateEntryBegin(m, s), last = StateEntryEnd(m, s);
    g.begin[s + 1] += last - first;
    for (int64_t e = first; e < last; ++e) ++g.begin[next[e] + 1];
  }
  std::partial_sum(g.begin.begin(), g.begin.end(), g.begin.begin());
  g.adjacent.resize(g.begin.back());
  std::vector<int64_t> cursor(g.begin.begin(), g.begin.end() - 1);
  for (StateId s = 0; s < n; ++s) {
    for (int64_t e = StateEntryBegin(m, s), last = StateEntryEnd(m, s); e < last; ++e) {
      g.adjacent[cursor[s]++] = next[e];
      g.adjacent[cursor[next[e]]++] = s;
    }
  }
  return g;
}

// States by increasing degree, ties by id: a counting sort with degrees capped, so the search
// can take each component's least-degree state as its start in O(states) overall.
std::vector<StateId> StatesByDegree(const Graph& g) {
  constexpr int64_t kCap = 1024;  // Higher degrees share the last bucket (by id).
  const size_t n = g.begin.size() - 1;
  auto bucket = [&](size_t s) { return std::min(g.begin[s + 1] - g.begin[s], kCap); };
  std::vector<int64_t> first(kCap + 2, 0);
  for (size_t s = 0; s < n; ++s) ++first[bucket(s) + 1];
  std::partial_sum(first.begin(), first.end(), first.begin());
  std::vector<StateId> out(n);
  for (size_t s = 0; s < n; ++s) out[first[bucket(s)]++] = static_cast<StateId>(s);
  return out;
}

// Appends the states of [first, last) not yet seen to queue[tail...], marking them seen.
// Branch-free (a branch on `seen` is mispredicted about as often as not): every state is
// written at the tail, which advances only past new ones, so the queue needs one spare slot.
void Visit(const StateId* first, const StateId* last, uint8_t* seen, StateId* queue, size_t& tail) {
  size_t t = tail;
  for (; first != last; ++first) {
    const StateId v = *first;
    queue[t] = v;
    t += seen[v] ^ 1;
    seen[v] = 1;
  }
  tail = t;
}

// Asks the memory system for what the search reads a few states down the queue: in a badly
// numbered model each state's range start and then its range are dependent misses the
// hardware cannot run ahead of; issuing them 16 and 8 states ahead overlaps them.
void PrefetchQueued(const Graph& g, const StateId* queue, size_t head, size_t tail) {
  if (head + 16 < tail) __builtin_prefetch(g.begin.data() + queue[head + 16]);
  if (head + 8 < tail) {
    const StateId* range = g.adjacent.data() + g.begin[queue[head + 8]];
    for (int k = 0; k < 64; k += 16) __builtin_prefetch(range + k);
  }
}

// Cuthill-McKee: breadth-first search of every component from its least-degree state,
// each state's newly reached neighbours in order of increasing degree (Cuthill and McKee
// 1969; the reversal is George 1971). A queue, not recursion: depth is unbounded.
std::vector<StateId> CuthillMcKee(const Graph& g) {
  const size_t n = g.begin.size() - 1;
  const std::vector<StateId> starts = StatesByDegree(g);
  auto by_degree = [&](StateId a, StateId b) {
    const int64_t da = g.begin[a + 1] - g.begin[a], db = g.begin[b + 1] - g.begin[b];
    return da != db ? da < db : a < b;
  };
  std::vector<uint8_t> seen(n, 0);
  std::vector<StateId> queue(n + 1);
  size_t head = 0, tail = 0;
  for (StateId start : starts) {
    if (seen[start]) continue;
    seen[start] = 1;
    queue[tail++] = start;
    while (head < tail) {
      PrefetchQueued(g, queue.data(), head, tail);
      const StateId u = queue[head++];
      const size_t reached = tail;
      Visit(g.adjacent.data() + g.begin[u], g.adjacent.data() + g.begin[u + 1], seen.data(),
            queue.data(), tail);
      std::sort(queue.begin() + reached, queue.begin() + tail, by_degree);
    }
  }
  queue.resize(n);
  return queue;
}

// The first state with entries at or after `from`, wrapping; -1 if there is none.
StateId FirstWithEntries(const Model& m, StateId from) {
  const int64_t n = m.num_states();
  for (int64_t k = 0; k < n; ++k) {
    const auto s = static_cast<StateId>((from + k) % n);
    if (StateEntryEnd(m, s) > StateEntryBegin(m, s)) return s;
  }
  return -1;
}

// One search of ProbeLayers, layer by layer along entries. It stops inside a layer as soon
// as that layer is wide or the cap is reached, so it never reads more than it needs to
// decide. `seen` is all zero on entry and again on return (only the reached states are
// cleared); `queue` is scratch.
LayerProbe SearchLayers(const Model& m, StateId start, std::vector<uint8_t>& seen,
                        std::vector<StateId>& queue) {
  const StateId* next = m.entry_next_data();
  LayerProbe p;
  p.start = start;
  p.layers = 1;
  p.widest = 1;
  queue.assign(1, start);
  seen[start] = 1;
  size_t layer_begin = 0, layer_end = 1;
  while (!p.wide && p.layers < kProbeMaxLayers && queue.size() < kProbeMaxReached) {
    for (size_t i = layer_begin; i < layer_end; ++i) {
      const StateId u = queue[i];
      for (int64_t e = StateEntryBegin(m, u), last = StateEntryEnd(m, u); e < last; ++e) {
        const StateId v = next[e];
        if (seen[v]) continue;
        seen[v] = 1;
        queue.push_back(v);
      }
      if (queue.size() - layer_end > static_cast<size_t>(kLocalityWindow) ||
          queue.size() >= kProbeMaxReached) {
        break;
      }
    }
    const auto width = static_cast<StateId>(queue.size() - layer_end);
    if (width == 0) break;  // Nothing left to reach from the start.
    ++p.layers;
    p.widest = std::max(p.widest, width);
    p.wide = width > kLocalityWindow;
    layer_begin = layer_end;
    layer_end = queue.size();
  }
  p.reached = static_cast<StateId>(queue.size());
  for (StateId s : queue) seen[s] = 0;
  return p;
}

// The CSR arrays of a permuted model, filled apart from the Model (whose members only the
// friend PermuteStates may set).
struct CsrArrays {
  LargeVector<RowId> state_row_begin;
  std::vector<ActionId> row_action;
  LargeVector<double> row_reward;
  LargeVector<int64_t> row_entry_begin;
  LargeVector<StateId> entry_next;
  LargeVector<double> entry_probability;
};

int64_t LongestRow(const Model& m) {
  int64_t longest = 0;
  for (RowId r = 0; r < m.num_rows(); ++r) {
    longest = std::max(longest, m.entry_end(r) - m.entry_begin(r));
  }
  return longest;
}

// Where each state's rows and entries start in the new numbering: its counts, written at
// its new place while the old arrays stream by, then prefix sums. Sets a.state_row_begin;
// returns the entry starts.
std::vector<int64_t> NewOffsets(const Model& m, std::span<const StateId> new_of_old, CsrArrays& a) {
  const StateId n = m.num_states();
  a.state_row_begin.assign(static_cast<size_t>(n) + 1, 0);
  std::vector<int64_t> state_entry_begin(static_cast<size_t>(n) + 1, 0);
  for (StateId s = 0; s < n; ++s) {
    a.state_row_begin[new_of_old[s] + 1] = m.row_end(s) - m.row_begin(s);
    state_entry_begin[new_of_old[s] + 1] = StateEntryEnd(m, s) - StateEntryBegin(m, s);
  }
  std::partial_sum(a.state_row_begin.begin(), a.state_row_begin.end(), a.state_row_begin.begin());
  std::partial_sum(state_entry_begin.begin(), state_entry_begin.end(), state_entry_begin.begin());
  return state_entry_begin;
}

// Sorts one row's entries by next state, probabilities alongside. Rows are mostly a handful
// of outcomes, where insertion sort in place wins; long rows go through `buffer`.
void SortRow(StateId* next, double* prob, int64_t length, std::pair<StateId, double>* buffer) {
  if (length <= 32) {
    for (int64_t i = 1; i < length; ++i) {
      const StateId key = next[i];
      const double p = prob[i];
      int64_t j = i;
      for (; j > 0 && next[j - 1] > key; --j) {
        next[j] = next[j - 1];
        prob[j] = prob[j - 1];
      }
      next[j] = key;
      prob[j] = p;
    }
    return;
  }
  for (int64_t k = 0; k < length; ++k) buffer[k] = {next[k], prob[k]};
  std::sort(buffer, buffer + length);
  for (int64_t k = 0; k < length; ++k) std::tie(next[k], prob[k]) = buffer[k];
}

// Copies every state's rows and entries to their new places, next states renamed, in the
// old model's order: that streams the old arrays and writes whole rows at a time, where a
// walk in new order would chase a chain of dependent cache misses per state. The renamed
// lookups are independent loads, kept free of the sort's branches so they overlap.
void ScatterStates(const Model& m, std::span<const StateId> new_of_old,
                   const std::vector<int64_t>& state_entry_begin, CsrArrays& a, int threads) {
  a.row_action.resize(m.num_rows());
  a.row_reward.resize(m.num_rows());
  a.row_entry_begin.resize(m.num_rows() + 1);
  a.row_entry_begin.back() = m.num_entries();
  a.entry_next.resize(m.num_entries());
  a.entry_probability.resize(m.num_entries());
  const StateId n = m.num_states();
#pragma omp parallel for num_threads(threads) schedule(static, 2048)
  for (StateId s = 0; s < n; ++s) {
    const StateId t = new_of_old[s];
    const RowId row_shift = a.state_row_begin[t] - m.row_begin(s);
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      a.row_action[r + row_shift] = m.row_action(r);
      a.row_reward[r + row_shift] = m.row_reward(r);
    }
    const int64_t first = StateEntryBegin(m, s), last = StateEntryEnd(m, s);
    const int64_t entry_shift = state_entry_begin[t] - first;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      a.row_entry_begin[r + row_shift] = m.entry_begin(r) + entry_shift;
    }
    for (int64_t e = first; e < last; ++e) {
      a.entry_next[e + entry_shift] = new_of_old[m.entry_next(e)];
      a.entry_probability[e + entry_shift] = m.entry_probability(e);
    }
  }
}

// Re-sorts every row of the scattered arrays by (new) next state; renaming keeps the entries
// of a row distinct, so the merged CSR invariant holds.
void SortRows(CsrArrays& a, int64_t longest, int threads) {
  // Buffers sized up front: nothing may allocate (and so throw) inside the parallel loop.
  std::vector<std::vector<std::pair<StateId, double>>> buffers(threads);
  for (auto& b : buffers) b.resize(longest);
  const RowId rows = static_cast<RowId>(a.row_action.size());
#pragma omp parallel for num_threads(threads) schedule(static, 8192)
  for (RowId r = 0; r < rows; ++r) {
    const int64_t begin = a.row_entry_begin[r];
    SortRow(a.entry_next.data() + begin, a.entry_probability.data() + begin,
            a.row_entry_begin[r + 1] - begin, buffers[omp_get_thread_num()].data());
  }
}

template <typename T>
std::vector<T> PermuteStateVector(const std::vector<T>& values,
                                  std::span<const StateId> old_of_new) {
  if (values.empty()) return {};
  std::vector<T> out(old_of_new.size());
  for (size_t t = 0; t < old_of_new.size(); ++t) out[t] = values[old_of_new[t]];
  return out;
}

std::vector<StateId> Inverse(std::span<const StateId> permutation) {
  std::vector<StateId> inverse(permutation.size());
  for (size_t i = 0; i < permutation.size(); ++i) {
    inverse[permutation[i]] = static_cast<StateId>(i);
  }
  return inverse;
}

// The start of search i of ProbeLayers.
StateId ProbeStart(const Model& m, int i) {
  const int64_t n = m.num_states();
  return FirstWithEntries(m, static_cast<StateId>((2 * i + 1) * n / (2 * kProbeStarts)));
}

}  // namespace

std::vector<LayerProbe> ProbeLayers(const Model& m) {
  std::vector<LayerProbe> probes;
  if (m.num_entries() == 0) return probes;
  std::vector<uint8_t> seen(m.num_states(), 0);
  std::vector<StateId> queue;
  for (int i = 0; i < kProbeStarts; ++i) {
    probes.push_back(SearchLayers(m, ProbeStart(m, i), seen, queue));
  }
  return probes;
}

bool OrderCanPay(const Model& m) {
  if (m.num_entries() == 0) return true;
  std::vector<uint8_t> seen(m.num_states(), 0);
  std::vector<StateId> queue;
  for (int i = 0; i < kProbeStarts; ++i) {
    if (!SearchLayers(m, ProbeStart(m, i), seen, queue).wide) return true;
  }
  return false;
}

double FarEntryFraction(const Model& m, std::span<const StateId> new_of_old, int threads) {
  if (m.num_entries() == 0) return 0.0;
  const bool renamed = !new_of_old.empty();
  const StateId* next = m.entry_next_data();
  int64_t far = 0;
#pragma omp parallel for num_threads(threads) reduction(+ : far) schedule(static, 2048)
  for (StateId s = 0; s < m.num_states(); ++s) {
    const StateId here = renamed ? new_of_old[s] : s;
    for (int64_t e = StateEntryBegin(m, s), end = StateEntryEnd(m, s); e < end; ++e) {
      const StateId there = renamed ? new_of_old[next[e]] : next[e];
      far += std::abs(there - here) > kLocalityWindow ? 1 : 0;
    }
  }
  return static_cast<double>(far) / static_cast<double>(m.num_entries());
}

StateOrder LocalityOrder(const Model& m) {
  std::vector<StateId> order;
  {
    const Graph g = SymmetricGraph(m);  // Freed before the caller builds anything larger.
    order = CuthillMcKee(g);
  }
  std::reverse(order.begin(), order.end());
  StateOrder out;
  out.new_of_old = Inverse(order);
  out.old_of_new = std::move(order);
  return out;
}

Model PermuteStates(const Model& m, std::span<const StateId> new_of_old, int threads) {
  assert(static_cast<StateId>(new_of_old.size()) == m.num_states());
  const std::vector<StateId> old_of_new = Inverse(new_of_old);
  Model p;
  p.name_ = m.name_;
  p.description_ = m.description_;
  p.reward_unit_ = m.reward_unit_;
  p.objective_ = m.objective_;
  p.criterion_ = m.criterion_;
  p.criterion_.terminal_values = PermuteStateVector(m.criterion_.terminal_values, old_of_new);
  p.outcomes_in_document_ = m.outcomes_in_document_;
  p.action_names_ = m.action_names_;
  p.state_names_ = PermuteStateVector(m.state_names_, old_of_new);
  p.terminal_ = PermuteStateVector(m.terminal_, old_of_new);
  CsrArrays a;
  const std::vector<int64_t> state_entry_begin = NewOffsets(m, new_of_old, a);
  ScatterStates(m, new_of_old, state_entry_begin, a, ThreadCount(threads));
  SortRows(a, LongestRow(m), ThreadCount(threads));
  p.state_row_begin_ = std::move(a.state_row_begin);
  p.row_action_ = std::move(a.row_action);
  p.row_reward_ = std::move(a.row_reward);
  p.row_entry_begin_ = std::move(a.row_entry_begin);
  p.entry_next_ = std::move(a.entry_next);
  p.entry_probability_ = std::move(a.entry_probability);
  return p;
}

std::optional<RenumberedModel> RenumberForLocality(const Model& m, Renumber mode, int threads,
                                                   RenumberStep* step) {
  RenumberStep ignored;
  RenumberStep& at = step != nullptr ? *step : ignored;
  const bool automatic = mode == Renumber::kAuto;
  at = RenumberStep::kNotAsked;
  if (mode == Renumber::kOff || m.num_states() == 0) return std::nullopt;
  at = RenumberStep::kTooSmall;
  if (automatic && m.num_entries() < kRenumberMinEntries) return std::nullopt;
  threads = ThreadCount(threads);
  const double before = FarEntryFraction(m, {}, threads);
  at = RenumberStep::kAlreadyLocal;
  if (automatic && before < kRenumberMinFarFraction) return std::nullopt;
  at = RenumberStep::kExpands;
  if (automatic && !OrderCanPay(m)) return std::nullopt;
  StateOrder order = LocalityOrder(m);
  const double after = FarEntryFraction(m, order.new_of_old, threads);
  at = RenumberStep::kOrderDidNotHelp;
  if (automatic && after > kRenumberMaxFarRatio * before) return std::nullopt;
  at = RenumberStep::kRenumbered;
  return RenumberedModel{PermuteStates(m, order.new_of_old, threads), std::move(order), before,
                         after};
}

void MapSolutionBack(const Model& m, const RenumberedModel& r, Solution& s) {
  assert(s.stage_values.empty() && s.average.state_gain.empty() && s.total.reaches_goal.empty() &&
         s.total.expected_steps.empty());
  const Model& p = r.model;
  std::vector<double> values(m.num_states()), gap(m.num_states()), q(m.num_rows());
  std::vector<RowId> best(m.num_states());
  std::vector<uint8_t> optimal(m.num_rows());
  for (StateId old_id = 0; old_id < m.num_states(); ++old_id) {
    const StateId t = r.order.new_of_old[old_id];
    values[old_id] = s.values[t];
    gap[old_id] = s.action_gap[t];
    // Rows keep their order within a state, so a row moves by its state's offset.
    const RowId shift = m.row_begin(old_id) - p.row_begin(t);
    best[old_id] = s.best_row[t] < 0 ? -1 : s.best_row[t] + shift;
    for (RowId row = p.row_begin(t); row < p.row_end(t); ++row) {
      q[row + shift] = s.q[row];
      optimal[row + shift] = s.optimal_row[row];
    }
  }
  s.values = std::move(values);
  s.action_gap = std::move(gap);
  s.best_row = std::move(best);
  s.q = std::move(q);
  s.optimal_row = std::move(optimal);
}

}  // namespace mdp::internal
