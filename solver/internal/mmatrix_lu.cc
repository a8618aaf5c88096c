#include "solver/internal/mmatrix_lu.h"

#include <algorithm>
#include <atomic>
#include <cmath>
#include <mutex>
#include <span>
#include <thread>
#include <utility>

namespace mdp::internal {
namespace {

// How many rows the factorisation eliminates between two looks at the stop check (a row of
// a 1M-state ring's factors takes about a microsecond).
constexpr int32_t kPollRows = 256;

// A factorisation on several threads (RowTurns): at least this many rows per thread, and
// this many spins waiting for a row before the waiting thread yields its core.
constexpr int32_t kMinRowsPerThread = 4096;
constexpr int kSpinsBeforeYield = 4096;

void SpinPause() {
#if defined(__x86_64__) || defined(__i386__)
  __builtin_ia32_pause();
#elif defined(__aarch64__)
  asm volatile("yield");
#endif
}

// A pivot the factors can divide by: positive and finite.
bool PivotOk(double diagonal) { return diagonal > 0.0 && std::isfinite(diagonal); }

// Rows 0..n-1 of an elimination handed out in turn to the threads that run it, each thread
// taking the next row not yet taken: row k waits for an earlier row i only where it is about
// to subtract row i (WaitFor), so rows that each subtract many earlier ones overlap except
// for their last updates. A row's arithmetic is the same whatever thread runs it and
// whenever, so the factors are the same bit for bit on any number of threads.
class RowTurns {
 public:
  RowTurns(int32_t n, const StopCheck& stop) : done_(n), singular_row_(n), stop_(stop) {}

  // The next row for the calling thread, or -1 once there is none left that is needed.
  int32_t Next() {
    const int32_t k = next_row_.fetch_add(1, std::memory_order_relaxed);
    if (k >= static_cast<int32_t>(done_.size()) ||
        k > singular_row_.load(std::memory_order_acquire) ||
        stopped_.load(std::memory_order_acquire)) {
      return -1;
    }
    if (k % kPollRows == 0) {
      if (Status poll = stop_.Poll(); !poll.ok()) {
        const std::lock_guard<std::mutex> lock(stop_mutex_);
        if (!stopped_.load(std::memory_order_relaxed)) stop_status_ = std::move(poll);
        stopped_.store(true, std::memory_order_release);
        return -1;
      }
    }
    return k;
  }

  // Waits until row i < k is final. False if row k must give up instead: the stop check
  // fired, or row k lies past the first singular row and row i may never come.
  bool WaitFor(int32_t i, int32_t k) const {
    for (int spins = 0; !done_[i].load(std::memory_order_acquire); ++spins) {
      if (stopped_.load(std::memory_order_relaxed) ||
          k > singular_row_.load(std::memory_order_relaxed)) {
        return false;
      }
      if (spins < kSpinsBeforeYield) {
        SpinPause();
      } else {
        std::this_thread::yield();
      }
    }
    return true;
  }

  // Row k is final: its pivot and leak are set, as SetPivot does, if the pivot is positive,
  // and what its thread wrote becomes visible to those that wait for it. The first row whose
  // pivot is not is kept: rows after it are not needed, and every row before it is still
  // finished (none waits for a later one), so the row named is the first on any number of
  // threads.
  void Settle(int32_t k, double leak, double diagonal, std::vector<double>& schur_leak,
              std::vector<double>& pivot) {
    if (PivotOk(diagonal)) {
      schur_leak[k] = leak;
      pivot[k] = diagonal;
    } else {
      int32_t first = singular_row_.load(std::memory_order_relaxed);
      while (k < first && !singular_row_.compare_exchange_weak(first, k)) {
      }
    }
    done_[k].store(1, std::memory_order_release);
  }

  // Once every thread has returned: the stop check's status, if it fired.
  bool stopped() const { return stopped_.load(); }
  const Status& stop_status() const { return stop_status_; }
  // The first singular row, or n.
  int32_t singular_row() const { return singular_row_.load(); }

 private:
  std::vector<std::atomic<uint8_t>> done_;
  std::atomic<int32_t> next_row_{0};
  std::atomic<int32_t> singular_row_;
  std::atomic<bool> stopped_{false};
  const StopCheck& stop_;
  std::mutex stop_mutex_;
  Status stop_status_;
};

// The threads an elimination of n rows runs on: up to `threads`, fewer so that each has at
// least kMinRowsPerThread rows.
int Workers(int32_t n, int threads) {
  return static_cast<int>(std::max<int64_t>(1, std::min<int64_t>(threads, n / kMinRowsPerThread)));
}

// Runs eliminate(scratch) on Workers(n, threads) threads; each thread makes its own scratch
// first.
template <typename MakeScratch, typename Eliminate>
void RunOnThreads(int32_t n, int threads, MakeScratch make_scratch, Eliminate eliminate) {
  const int workers = Workers(n, threads);
  if (workers > 1) {
#pragma omp parallel num_threads(workers)
    {
      auto scratch = make_scratch();
      eliminate(scratch);
    }
  } else {
    auto scratch = make_scratch();
    eliminate(scratch);
  }
}

// The pattern of A + A^T without the diagonal, by rows, each neighbour once.
void SymmetricPattern(const LeakySystem& a, std::vector<int64_t>& begin,
                      std::vector<int32_t>& adj) {
  const int32_t n = a.size;
  begin.assign(static_cast<size_t>(n) + 1, 0);
  for (int32_t i = 0; i < n; ++i) {
    for (int64_t e = a.row_begin[i]; e < a.row_begin[i + 1]; ++e) {
      ++begin[i + 1];
      ++begin[a.col[e] + 1];
    }
  }
  for (int32_t i = 0; i < n; ++i) begin[i + 1] += begin[i];
  adj.resize(begin[n]);
  std::vector<int64_t> fill(begin.begin(), begin.end() - 1);
  for (int32_t i = 0; i < n; ++i) {
    for (int64_t e = a.row_begin[i]; e < a.row_begin[i + 1]; ++e) {
      const int32_t j = a.col[e];
      adj[fill[i]++] = j;
      adj[fill[j]++] = i;
    }
  }
  // Drop the second copy of a pair present both ways, compacting in place (rows only move
  // towards the front).
  std::vector<int32_t> seen(n, -1);
  int64_t out = 0;
  for (int32_t i = 0; i < n; ++i) {
    const int64_t from = begin[i];
    const int64_t to = begin[i + 1];
    begin[i] = out;
    for (int64_t e = from; e < to; ++e) {
      if (seen[adj[e]] == i) continue;
      seen[adj[e]] = i;
      adj[out++] = adj[e];
    }
  }
  begin[n] = out;
  adj.resize(out);
  adj.shrink_to_fit();
}

// An unknown of near-greatest eccentricity around `root` (George and Liu 1981, from
// memory): search from it, move to a least-degree unknown of the search's last layer, and
// repeat while the search gets deeper, at most `rounds` times. `search(x)` searches from x
// and returns its depth and its last layer (a span that stays valid until the next search).
template <typename Search>
int32_t PseudoPeripheral(const std::vector<int64_t>& begin, int32_t root, int rounds,
                         Search search) {
  auto degree = [&begin](int32_t v) { return begin[v + 1] - begin[v]; };
  int32_t x = root;
  int32_t depth = -1;
  for (int round = 0; round < rounds; ++round) {
    const auto [d, last] = search(x);
    if (d <= depth) break;
    depth = d;
    int32_t best = last.front();
    for (const int32_t v : last) {
      if (degree(v) < degree(best)) best = v;
    }
    if (best == x) break;
    x = best;
  }
  return x;
}

// Reverse Cuthill-McKee order (George and Liu 1981, Computer Solution of Large Sparse
// Positive Definite Systems, ch. 4, from memory): breadth-first from a pseudo-peripheral
// unknown of each connected part, neighbours in order of increasing degree, then reversed.
// An unknown then has its pattern neighbours within about two layers of the search, so the
// factors stay in a band as wide as the widest layers.
class CuthillMcKee {
 public:
  CuthillMcKee(const std::vector<int64_t>& begin, const std::vector<int32_t>& adj)
      : begin_(begin), adj_(adj), n_(static_cast<int32_t>(begin.size()) - 1), stamp_(n_, -1) {}

  std::vector<int32_t> Order() {
    std::vector<int32_t> order;
    order.reserve(n_);
    std::vector<uint8_t> placed(n_, 0);
    for (int32_t root = 0; root < n_; ++root) {
      if (placed[root]) continue;
      const int32_t start = PseudoPeripheral(root);
      size_t head = order.size();
      order.push_back(start);
      placed[start] = 1;
      while (head < order.size()) {
        const int32_t v = order[head++];
        const size_t first = order.size();
        for (int64_t e = begin_[v]; e < begin_[v + 1]; ++e) {
          if (!placed[adj_[e]]) {
            placed[adj_[e]] = 1;
            order.push_back(adj_[e]);
          }
        }
        std::sort(order.begin() + first, order.end(), [this](int32_t x, int32_t y) {
          return Degree(x) != Degree(y) ? Degree(x) < Degree(y) : x < y;
        });
      }
    }
    std::reverse(order.begin(), order.end());
    return order;
  }

 private:
  int64_t Degree(int32_t v) const { return begin_[v + 1] - begin_[v]; }

  // Breadth-first from `from`; returns the number of layers after the first and leaves the
  // last layer in last_.
  int32_t Search(int32_t from) {
    ++search_;
    queue_.clear();
    queue_.push_back(from);
    stamp_[from] = search_;
    size_t layer_begin = 0;
    int32_t depth = 0;
    for (;;) {
      const size_t layer_end = queue_.size();
      for (size_t q = layer_begin; q < layer_end; ++q) {
        const int32_t v = queue_[q];
        for (int64_t e = begin_[v]; e < begin_[v + 1]; ++e) {
          if (stamp_[adj_[e]] != search_) {
            stamp_[adj_[e]] = search_;
            queue_.push_back(adj_[e]);
          }
        }
      }
      if (queue_.size() == layer_end) {
        last_.assign(queue_.begin() + static_cast<std::ptrdiff_t>(layer_begin),
                     queue_.begin() + static_cast<std::ptrdiff_t>(layer_end));
        return depth;
      }
      layer_begin = layer_end;
      ++depth;
    }
  }

  // PseudoPeripheral above, in the part of `root`.
  int32_t PseudoPeripheral(int32_t root) {
    return mdp::internal::PseudoPeripheral(begin_, root, 8, [this](int32_t x) {
      const int32_t depth = Search(x);
      return std::pair{depth, std::span<const int32_t>(last_)};
    });
  }

  const std::vector<int64_t>& begin_;
  const std::vector<int32_t>& adj_;
  int32_t n_;
  std::vector<int32_t> stamp_;
  int32_t search_ = -1;
  std::vector<int32_t> queue_;
  std::vector<int32_t> last_;
};

// Nested dissection (George 1973, "Nested dissection of a regular finite element mesh",
// SIAM J. Numer. Anal. 10(2); the automatic form of George and Liu 1981, ch. 8; from
// memory): a connected part is split by a middle layer of a breadth-first search from a
// pseudo-peripheral unknown, both sides are ordered (the same way, recursively) before the
// layer, and parts of at most kLeaf unknowns in the order of the search. Eliminating a side
// then never fills across the layer, so on a grid of side w the factors hold about
// n log n entries where a band order needs n w. Only the unknowns of the layer that touch
// the far side separate; the others join the near side.
class Dissection {
 public:
  Dissection(const std::vector<int64_t>& begin, const std::vector<int32_t>& adj)
      : begin_(begin),
        adj_(adj),
        n_(static_cast<int32_t>(begin.size()) - 1),
        part_(n_, kUnlabelled),
        stamp_(n_, -1),
        level_(n_, 0) {}

  std::vector<int32_t> Order() {
    // order is filled from the back: a part's layer first, then its sides, which are split
    // later (after the parts on the stack above them) and so come before it.
    std::vector<int32_t> order(n_);
    int32_t back = n_;
    std::vector<int32_t> stack;  // Seeds of parts to order; part_[seed] is the part's label.
    for (int32_t v = 0; v < n_; ++v) {
      if (part_[v] == kUnlabelled) stack.push_back(Label(v, kUnlabelled));
    }
    std::vector<int32_t> members;
    while (!stack.empty()) {
      const int32_t seed = stack.back();
      stack.pop_back();
      const int32_t label = part_[seed];
      Search(PseudoPeripheral(seed, label), label);
      const auto size = static_cast<int32_t>(queue_.size());
      const auto depth = static_cast<int32_t>(layer_begin_.size()) - 1;  // Layers.
      if (size <= kLeaf || depth < 3) {
        for (int32_t q = size - 1; q >= 0; --q) order[--back] = queue_[q];
        for (const int32_t v : queue_) part_[v] = kOrdered;
        continue;
      }
      // The first layer past the first whose end reaches half the part (not the first or
      // the last layer, so both sides are nonempty).
      int32_t middle = 1;
      while (middle + 1 < depth - 1 && layer_begin_[middle + 1] <= size / 2) ++middle;
      for (int32_t q = layer_begin_[middle]; q < layer_begin_[middle + 1]; ++q) {
        const int32_t v = queue_[q];
        if (TouchesLevel(v, label, middle + 1)) {
          part_[v] = kOrdered;
          order[--back] = v;
        } else {
          level_[v] = middle - 1;  // Joins the near side.
        }
      }
      members.assign(queue_.begin(), queue_.end());
      for (const int32_t v : members) {
        if (part_[v] == label) stack.push_back(Label(v, label));
      }
    }
    return order;
  }

 private:
  static constexpr int32_t kLeaf = 64;
  static constexpr int32_t kUnlabelled = -1;
  static constexpr int32_t kOrdered = -2;

  // Gives the connected set of unknowns labelled `from_label` around v a new label; returns v.
  int32_t Label(int32_t v, int32_t from_label) {
    const int32_t label = next_label_++;
    collect_.assign(1, v);
    part_[v] = label;
    for (size_t h = 0; h < collect_.size(); ++h) {
      const int32_t u = collect_[h];
      for (int64_t e = begin_[u]; e < begin_[u + 1]; ++e) {
        if (part_[adj_[e]] == from_label) {
          part_[adj_[e]] = label;
          collect_.push_back(adj_[e]);
        }
      }
    }
    return v;
  }

  bool TouchesLevel(int32_t v, int32_t label, int32_t level) const {
    for (int64_t e = begin_[v]; e < begin_[v + 1]; ++e) {
      if (part_[adj_[e]] == label && level_[adj_[e]] == level) return true;
    }
    return false;
  }

  // Breadth-first search of part `label` from `from`: queue_ in search order, layer k in
  // queue_[layer_begin_[k], layer_begin_[k + 1]), level_ set for every unknown reached.
  void Search(int32_t from, int32_t label) {
    ++search_;
    queue_.assign(1, from);
    layer_begin_.assign(1, 0);
    stamp_[from] = search_;
    level_[from] = 0;
    for (size_t begin = 0; begin < queue_.size();) {
      const size_t end = queue_.size();
      layer_begin_.push_back(static_cast<int32_t>(end));  // This layer is [begin, end).
      const auto next = static_cast<int32_t>(layer_begin_.size()) - 1;
      for (size_t q = begin; q < end; ++q) {
        const int32_t v = queue_[q];
        for (int64_t e = begin_[v]; e < begin_[v + 1]; ++e) {
          const int32_t u = adj_[e];
          if (part_[u] == label && stamp_[u] != search_) {
            stamp_[u] = search_;
            level_[u] = next;
            queue_.push_back(u);
          }
        }
      }
      begin = end;
    }
  }

  // PseudoPeripheral above, within part `label`.
  int32_t PseudoPeripheral(int32_t root, int32_t label) {
    return mdp::internal::PseudoPeripheral(begin_, root, 4, [this, label](int32_t x) {
      Search(x, label);
      const auto depth = static_cast<int32_t>(layer_begin_.size()) - 1;
      return std::pair{
          depth, std::span<const int32_t>(queue_).subspan(layer_begin_[depth - 1],
                                                          queue_.size() - layer_begin_[depth - 1])};
    });
  }

  const std::vector<int64_t>& begin_;
  const std::vector<int32_t>& adj_;
  int32_t n_;
  std::vector<int32_t> part_;   // A part's label, kUnlabelled or kOrdered.
  std::vector<int32_t> stamp_;  // == search_ iff reached by the current search.
  std::vector<int32_t> level_;  // Layer in the last search that reached the unknown.
  int32_t search_ = -1;
  int32_t next_label_ = 0;
  std::vector<int32_t> queue_;
  std::vector<int32_t> layer_begin_;  // Layers + 1 entries.
  std::vector<int32_t> collect_;
};

// The pattern of row k of L (by position): the unknowns met walking up the elimination tree
// from each neighbour j < k of k until k or an unknown already met (Liu 1990, "The role of
// elimination trees in sparse factorization", SIAM J. Matrix Anal. Appl. 11(1), from
// memory). Appends to `out` (unsorted) and marks with `mark[] = k`.
template <typename Visit>
void RowSubtree(int32_t k, const std::vector<int32_t>& order, const std::vector<int32_t>& position,
                const std::vector<int64_t>& begin, const std::vector<int32_t>& adj,
                const std::vector<int32_t>& parent, std::vector<int32_t>& mark, Visit visit) {
  mark[k] = k;
  const int32_t row = order[k];
  for (int64_t e = begin[row]; e < begin[row + 1]; ++e) {
    for (int32_t r = position[adj[e]]; r < k && mark[r] != k; r = parent[r]) {
      mark[r] = k;
      visit(r);
    }
  }
}

// True iff a breadth-first search from `from` meets a layer of more than `max_width`
// unknowns before it runs out. Reads the pattern rows of the unknowns it reaches.
bool HasWideLayer(const std::vector<int64_t>& begin, const std::vector<int32_t>& adj, int32_t from,
                  int64_t max_width, std::vector<int32_t>& stamp, int32_t id) {
  std::vector<int32_t> queue = {from};
  stamp[from] = id;
  size_t layer_begin = 0;
  while (layer_begin < queue.size()) {
    const size_t layer_end = queue.size();
    if (static_cast<int64_t>(layer_end - layer_begin) > max_width) return true;
    for (size_t q = layer_begin; q < layer_end; ++q) {
      for (int64_t e = begin[queue[q]]; e < begin[queue[q] + 1]; ++e) {
        if (stamp[adj[e]] != id) {
          stamp[adj[e]] = id;
          queue.push_back(adj[e]);
        }
      }
    }
    layer_begin = layer_end;
  }
  return false;
}

}  // namespace

double FactorPlan::bytes() const {
  const double per_entry = sizeof(int32_t) + sizeof(double);
  return 2.0 * static_cast<double>(lower_entries) * per_entry +
         static_cast<double>(order.size()) * (2 * sizeof(int64_t) + sizeof(double));
}

FactorPlan PlanWithin(const LeakySystem& a, double budget_bytes, FactorOrdering ordering) {
  constexpr double kBytesPerLowerEntry = 2.0 * (sizeof(int32_t) + sizeof(double));
  return PlanFactors(a, static_cast<int64_t>(budget_bytes / kBytesPerLowerEntry), ordering);
}

namespace {

// Packs rows r = [begin[r], end[r]) of (col, value) in place, dropping the zero values iff
// `drop_zeros`.
void Pack(std::vector<int64_t>& begin, const std::vector<int64_t>& end, bool drop_zeros,
          LargeVector<int32_t>& col, LargeVector<double>& value) {
  int64_t out = 0;
  for (size_t r = 0; r < end.size(); ++r) {
    const int64_t from = begin[r];
    begin[r] = out;
    for (int64_t e = from; e < end[r]; ++e) {
      if (drop_zeros && value[e] == 0.0) continue;
      col[out] = col[e];
      value[out++] = value[e];
    }
  }
  begin.back() = out;
  col.resize(out);
  value.resize(out);
}

// Elimination tree and counts of the factors of `plan.order`, complete = false once they
// pass max_lower_entries.
void CountFactors(FactorPlan& plan, int64_t max_lower_entries) {
  const int32_t n = static_cast<int32_t>(plan.order.size());
  const std::vector<int64_t>& begin = plan.pattern_begin;
  const std::vector<int32_t>& adj = plan.pattern;
  plan.position.assign(n, 0);
  for (int32_t k = 0; k < n; ++k) plan.position[plan.order[k]] = k;
  // Elimination tree by path compression (Liu 1990, from memory).
  plan.parent.assign(n, -1);
  std::vector<int32_t> ancestor(n, -1);
  for (int32_t k = 0; k < n; ++k) {
    const int32_t row = plan.order[k];
    for (int64_t e = begin[row]; e < begin[row + 1]; ++e) {
      int32_t i = plan.position[adj[e]];
      while (i != -1 && i < k) {
        const int32_t next = ancestor[i];
        ancestor[i] = k;
        if (next == -1) plan.parent[i] = k;
        i = next;
      }
    }
  }
  // Column counts from the row patterns; every step of a walk is one entry of L, so the
  // count costs no more than the cap.
  std::vector<int32_t> mark(n, -1);
  std::vector<int32_t>& count = plan.column_count;
  count.assign(n, 0);
  plan.row_count.assign(n, 0);
  int64_t total = 0;
  plan.complete = false;
  for (int32_t k = 0; k < n; ++k) {
    const int64_t before = total;
    RowSubtree(k, plan.order, plan.position, begin, adj, plan.parent, mark, [&](int32_t r) {
      ++count[r];
      ++total;
    });
    plan.row_count[k] = static_cast<int32_t>(total - before);
    if (total > max_lower_entries) return;
  }
  plan.lower_entries = total;
  plan.multiply_adds = 0.0;
  for (int32_t j = 0; j < n; ++j) {
    plan.multiply_adds += static_cast<double>(count[j]) * static_cast<double>(count[j] + 1);
  }
  plan.complete = true;
}

}  // namespace

FactorPlan PlanFactors(const LeakySystem& a, int64_t max_lower_entries, FactorOrdering ordering) {
  FactorPlan plan;
  const int32_t n = a.size;
  SymmetricPattern(a, plan.pattern_begin, plan.pattern);
  if (n == 0) {
    plan.complete = true;
    return plan;
  }
  std::vector<int32_t> stamp(n, -1);
  auto wide = [&](int64_t max_width) {
    return HasWideLayer(plan.pattern_begin, plan.pattern, 0, max_width, stamp, 0) ||
           HasWideLayer(plan.pattern_begin, plan.pattern, n / 2, max_width, stamp, 1);
  };
  // A quick look before each order. In a Cuthill-McKee order an unknown's factor row
  // reaches back about a layer's width, so a layer of w unknowns means some n w / 4 entries
  // or more in the layers around it; an expander's layers grow geometrically, and searches
  // from two spread unknowns that meet a layer wider than 4 cap / n make the count
  // pointless. Nested dissection ends with a separating layer, whose unknowns fill in
  // completely: a layer of w means about w^2 / 2 entries, so one wider than sqrt(2 cap)
  // rules it out. (Guesses that can only send a system to the iterative solver, never
  // change an answer.)
  if (ordering != FactorOrdering::kDissection &&
      !wide(std::max<int64_t>(16, 4 * max_lower_entries / n))) {
    plan.order = CuthillMcKee(plan.pattern_begin, plan.pattern).Order();
    plan.ordering = FactorOrdering::kCuthillMcKee;
    CountFactors(plan, max_lower_entries);
    // A band of up to kBandWork work per unknown (128 entries per column, a ring's band
    // is a few dozen) is kept without trying the other order.
    constexpr double kBandWork = 128.0 * 128.0;
    if (plan.complete && plan.multiply_adds <= kBandWork * n) return plan;
  }
  if (ordering == FactorOrdering::kCuthillMcKee) return plan;
  const auto max_separator =
      static_cast<int64_t>(std::sqrt(2.0 * static_cast<double>(max_lower_entries)));
  if (ordering == FactorOrdering::kAutomatic && wide(std::max<int64_t>(16, max_separator))) {
    return plan;
  }
  FactorPlan dissected;
  dissected.pattern_begin = std::move(plan.pattern_begin);
  dissected.pattern = std::move(plan.pattern);
  dissected.order = Dissection(dissected.pattern_begin, dissected.pattern).Order();
  dissected.ordering = FactorOrdering::kDissection;
  CountFactors(dissected, max_lower_entries);
  if (plan.complete && !(dissected.complete && dissected.multiply_adds < plan.multiply_adds)) {
    plan.pattern_begin = std::move(dissected.pattern_begin);  // The band stays.
    plan.pattern = std::move(dissected.pattern);
    return plan;
  }
  return dissected;
}

Status MMatrixLu::Factorize(const LeakySystem& a, FactorPlan plan, const StopCheck& stop,
                            int threads) {
  singular_at_ = -1;
  order_ = std::move(plan.order);
  pivot_.assign(a.size, 0.0);
  l_begin_.assign(static_cast<size_t>(a.size) + 1, 0);
  u_begin_.assign(static_cast<size_t>(a.size) + 1, 0);
  l_col_.clear();
  l_value_.clear();
  u_col_.clear();
  u_value_.clear();
  // Two kernels for the same elimination; they differ only in the order in which a row's
  // entries of U are stored and summed into its pivot, so they agree to rounding. Bands find
  // each row's pattern as they go (FactorizeByRows); dissected plans (grids) take
  // FactorizeByPattern, whose inner loop is a plain sparse update: on a 316 x 316 grid it
  // took 0.81-0.90 s against 1.50-1.75 s. On a band (a ring's chain, where A + A^T holds
  // twice the fill of A when the chain moves one way) it was 10-15 % slower: a
  // 1,000,000-state ring's total-cost solve took 14.3 and 14.9 s against 12.2 and 13.4 s in
  // alternating runs. FactorizeByPattern also shares its rows among `threads`: on 2 threads
  // a 316 x 316 grid whose chain steps to the 8 neighbours factored in 0.46-0.49 s against
  // 0.78-0.86 s on one, with steps up to 2 cells away 2.9 against 5.2-6.1 s, and a 1000 x 1000
  // grid 15.2-17.7 against 29.2-32.5 s (2 runs each).
  return plan.ordering == FactorOrdering::kDissection ? FactorizeByPattern(a, plan, stop, threads)
                                                      : FactorizeByRows(a, plan, stop, threads);
}

// Row k's pivot from the leak its Schur complement row keeps (`leak`) and the sum of its
// off-diagonal entries in U: U(k, k) = schur_leak(k) - sum_{j > k} U(k, j), a sum of terms
// >= 0 (GTH). kFailedPrecondition if it is not positive.
Status MMatrixLu::SetPivot(int32_t k, double leak, double diagonal,
                           std::vector<double>& schur_leak) {
  if (!PivotOk(diagonal)) return Singular(k);
  schur_leak[k] = leak;
  pivot_[k] = diagonal;
  return Status::Ok();
}

Status MMatrixLu::Singular(int32_t k) {
  // The unknowns eliminated into row k do not leak, in floating point at least (a leak
  // below the smallest double, or none at all).
  singular_at_ = order_[k];
  return FailedPreconditionError("policy evaluation: the chain never leaves a set of states");
}

// One thread's working rows for FactorizeByRows.
struct MMatrixLu::RowScratch {
  explicit RowScratch(int32_t n) : w(n, 0.0), mark(n, -1), touched(n, -1), upper(n + 1) {}
  std::vector<double> w;         // Row k of the partly eliminated matrix, scattered.
  std::vector<int32_t> mark;     // Row pattern walk.
  std::vector<int32_t> touched;  // == k iff column j of row k has been seen.
  std::vector<int32_t> lower;    // Row k's pattern in L.
  std::vector<int32_t> upper;    // Columns j > k seen in row k.
};

// Row k of FactorizeByRows: L's entries to emit_l(i, l) in increasing i, U's nonzeros to
// emit_u(j, v) in the order their columns were first met, the row's leak and pivot into
// `leak` and `diagonal` (not checked); row i of U is [u_begin_[i], u_end(i)), read once
// wait(i) has returned true. Returns false, x.w cleared, if wait(i) returned false.
template <typename UEnd, typename Wait, typename EmitL, typename EmitU>
bool MMatrixLu::EliminateByRows(int32_t k, const LeakySystem& a, const FactorPlan& plan,
                                const std::vector<double>& schur_leak, RowScratch& x, UEnd u_end,
                                Wait wait, EmitL emit_l, EmitU emit_u, double& leak,
                                double& diagonal) const {
  const int32_t row = order_[k];
  x.lower.clear();
  int64_t uppers = 0;
  RowSubtree(k, order_, plan.position, plan.pattern_begin, plan.pattern, plan.parent, x.mark,
             [&](int32_t r) { x.lower.push_back(r); });
  std::sort(x.lower.begin(), x.lower.end());
  // Columns j > k are collected without a branch on data (j > k and first sight vary
  // unpredictably along a row): each j is written, and kept by advancing the count.
  for (int64_t e = a.row_begin[row]; e < a.row_begin[row + 1]; ++e) {
    const int32_t j = plan.position[a.col[e]];
    x.w[j] = -a.weight[e];
    x.upper[uppers] = j;
    uppers += static_cast<int64_t>(j > k) & static_cast<int64_t>(x.touched[j] != k);
    x.touched[j] = k;
  }
  // Row-oriented elimination (the i-k-j form of Gaussian elimination), in increasing order
  // of the pivots used. Off-diagonal entries only ever receive l * u >= 0 subtracted from
  // values <= 0: no cancellation. The diagonal, where cancellation would be, is not
  // updated; it is recovered from the row sum below.
  leak = a.leak[row];
  for (const int32_t i : x.lower) {
    const double wi = x.w[i];
    if (wi == 0.0) continue;
    x.w[i] = 0.0;
    if (!wait(i)) {
      std::fill(x.w.begin(), x.w.end(), 0.0);
      return false;
    }
    const double l = wi / pivot_[i];
    emit_l(i, l);
    leak -= l * schur_leak[i];
    for (int64_t e = u_begin_[i], end = u_end(i); e < end; ++e) {
      const int32_t j = u_col_[e];
      x.w[j] -= l * u_value_[e];  // Into w[k] too, which is discarded.
      x.upper[uppers] = j;
      uppers += static_cast<int64_t>(j > k) & static_cast<int64_t>(x.touched[j] != k);
      x.touched[j] = k;
    }
  }
  x.w[k] = 0.0;
  diagonal = leak;
  for (int64_t q = 0; q < uppers; ++q) {
    const int32_t j = x.upper[q];
    const double v = x.w[j];
    x.w[j] = 0.0;
    if (v == 0.0) continue;
    emit_u(j, v);
    diagonal -= v;
  }
  return true;
}

Status MMatrixLu::FactorizeByRows(const LeakySystem& a, const FactorPlan& plan,
                                  const StopCheck& stop, int threads) {
  const int32_t n = a.size;
  // schur_leak[k]: the row sum of the Schur complement row that row k's U row is, which is
  // leak(k) plus the leak it inherits through L; every term is >= 0.
  std::vector<double> schur_leak(n, 0.0);
  if (Workers(n, threads) == 1 ||
      plan.multiply_adds < kBandRowWorkForThreads * static_cast<double>(n)) {
    // One thread: the rows are appended as they come.
    l_col_.reserve(plan.lower_entries);
    l_value_.reserve(plan.lower_entries);
    u_col_.reserve(plan.lower_entries);
    u_value_.reserve(plan.lower_entries);
    RowScratch x(n);
    for (int32_t k = 0; k < n; ++k) {
      if (k % kPollRows == 0) MDP_RETURN_IF_ERROR(stop.Poll());
      double leak = 0.0, diagonal = 0.0;
      EliminateByRows(
          k, a, plan, schur_leak, x, [&](int32_t i) { return u_begin_[i + 1]; },
          [](int32_t) { return true; },
          [&](int32_t i, double l) {
            l_col_.push_back(i);
            l_value_.push_back(l);
          },
          [&](int32_t j, double v) {
            u_col_.push_back(j);
            u_value_.push_back(v);
          },
          leak, diagonal);
      MDP_RETURN_IF_ERROR(SetPivot(k, leak, diagonal, schur_leak));
      l_begin_[k + 1] = static_cast<int64_t>(l_col_.size());
      u_begin_[k + 1] = static_cast<int64_t>(u_col_.size());
    }
    return Status::Ok();
  }
  // Several threads: each row is written into slots sized by the plan's counts (the pattern
  // of A + A^T, which holds A's fill), which are closed up at the end; the values, and so
  // the factors once closed up, are the one-thread kernel's bit for bit.
  for (int32_t k = 0; k < n; ++k) {
    l_begin_[k + 1] = l_begin_[k] + plan.row_count[k];
    u_begin_[k + 1] = u_begin_[k] + plan.column_count[k];
  }
  l_col_.resize(l_begin_[n]);
  l_value_.resize(l_begin_[n]);
  u_col_.resize(u_begin_[n]);
  u_value_.resize(u_begin_[n]);
  std::vector<int64_t> l_end(n), u_end(n);
  RowTurns turns(n, stop);
  const auto eliminate = [&](RowScratch& x) {
    for (int32_t k; (k = turns.Next()) >= 0;) {
      int64_t lf = l_begin_[k], uf = u_begin_[k];
      double leak = 0.0, diagonal = 0.0;
      if (!EliminateByRows(
              k, a, plan, schur_leak, x, [&](int32_t i) { return u_end[i]; },
              [&](int32_t i) { return turns.WaitFor(i, k); },
              [&](int32_t i, double l) {
                l_col_[lf] = i;
                l_value_[lf++] = l;
              },
              [&](int32_t j, double v) {
                u_col_[uf] = j;
                u_value_[uf++] = v;
              },
              leak, diagonal)) {
        return;
      }
      l_end[k] = lf;
      u_end[k] = uf;
      turns.Settle(k, leak, diagonal, schur_leak, pivot_);
    }
  };
  RunOnThreads(
      n, threads, [n] { return RowScratch(n); }, eliminate);
  if (turns.stopped()) return turns.stop_status();
  if (const int32_t k = turns.singular_row(); k < n) return Singular(k);
  Pack(l_begin_, l_end, false, l_col_, l_value_);
  Pack(u_begin_, u_end, false, u_col_, u_value_);
  return Status::Ok();
}

Status MMatrixLu::FactorizeByPattern(const LeakySystem& a, const FactorPlan& plan,
                                     const StopCheck& stop, int threads) {
  const int32_t n = a.size;
  const std::vector<int32_t>& position = plan.position;
  // The patterns first. Row k of L holds the columns RowSubtree(k) meets, in increasing
  // order; U has the transposed pattern (that of A + A^T is symmetric), so row i of U holds
  // the k whose L row holds i, met in increasing order as k runs up.
  l_col_.reserve(plan.lower_entries);
  {
    std::vector<int32_t> mark(n, -1);
    for (int32_t k = 0; k < n; ++k) {
      if (k % kPollRows == 0) MDP_RETURN_IF_ERROR(stop.Poll());
      const auto row_begin = static_cast<std::ptrdiff_t>(l_col_.size());
      RowSubtree(k, order_, position, plan.pattern_begin, plan.pattern, plan.parent, mark,
                 [&](int32_t r) {
                   l_col_.push_back(r);
                   ++u_begin_[r + 1];
                 });
      std::sort(l_col_.begin() + row_begin, l_col_.end());
      l_begin_[k + 1] = static_cast<int64_t>(l_col_.size());
    }
  }
  for (int32_t i = 0; i < n; ++i) u_begin_[i + 1] += u_begin_[i];
  u_col_.resize(l_col_.size());
  {
    std::vector<int64_t> fill(u_begin_.begin(), u_begin_.end() - 1);
    for (int32_t k = 0; k < n; ++k) {
      for (int64_t e = l_begin_[k]; e < l_begin_[k + 1]; ++e) u_col_[fill[l_col_[e]]++] = k;
    }
  }
  l_value_.assign(l_col_.size(), 0.0);
  u_value_.assign(u_col_.size(), 0.0);
  std::vector<double> schur_leak(n, 0.0);  // As in FactorizeByRows.
  std::vector<int64_t> u_end(n);  // Row k of U: its nonzeros are [u_begin_[k], u_end[k]).
  RowTurns turns(n, stop);
  const auto eliminate = [&](std::vector<double>& w) {
    for (int32_t k; (k = turns.Next()) >= 0;) {
      const int32_t row = order_[k];
      for (int64_t e = a.row_begin[row]; e < a.row_begin[row + 1]; ++e) {
        w[position[a.col[e]]] = -a.weight[e];
      }
      // The elimination of FactorizeByRows, over the known pattern.
      double leak = a.leak[row];
      for (int64_t f = l_begin_[k]; f < l_begin_[k + 1]; ++f) {
        const int32_t i = l_col_[f];
        const double wi = w[i];
        if (wi == 0.0) continue;
        w[i] = 0.0;
        if (!turns.WaitFor(i, k)) {
          std::fill(w.begin(), w.end(), 0.0);
          return;
        }
        const double l = wi / pivot_[i];
        l_value_[f] = l;
        leak -= l * schur_leak[i];
        for (int64_t e = u_begin_[i]; e < u_end[i]; ++e) {
          w[u_col_[e]] -= l * u_value_[e];  // Into w[k] too, which is discarded.
        }
      }
      w[k] = 0.0;
      // The row's nonzeros move to the front of its slots (the pattern of A + A^T overstates
      // A's fill where the chain moves one way only), so later rows skip the zeros.
      double diagonal = leak;
      int64_t kept = u_begin_[k];
      for (int64_t e = u_begin_[k]; e < u_begin_[k + 1]; ++e) {
        const int32_t j = u_col_[e];
        const double v = w[j];
        w[j] = 0.0;
        if (v == 0.0) continue;
        u_col_[kept] = j;
        u_value_[kept++] = v;
        diagonal -= v;
      }
      u_end[k] = kept;
      turns.Settle(k, leak, diagonal, schur_leak, pivot_);
    }
  };
  RunOnThreads(
      n, threads, [n] { return std::vector<double>(n, 0.0); }, eliminate);
  if (turns.stopped()) return turns.stop_status();
  if (const int32_t k = turns.singular_row(); k < n) return Singular(k);
  // The solves skip the entries that stayed 0 too.
  std::vector<int64_t> l_end(l_begin_.begin() + 1, l_begin_.end());
  Pack(l_begin_, l_end, true, l_col_, l_value_);
  Pack(u_begin_, u_end, true, u_col_, u_value_);
  return Status::Ok();
}

// With P the order (row k of the factors is unknown order[k]): P A P^T = L U.
void MMatrixLu::Solve(std::span<double> x) const {
  const int32_t n = size();
  std::vector<double> y(n);
  for (int32_t k = 0; k < n; ++k) y[k] = x[order_[k]];
  for (int32_t k = 0; k < n; ++k) {
    double s = y[k];
    for (int64_t e = l_begin_[k]; e < l_begin_[k + 1]; ++e) s -= l_value_[e] * y[l_col_[e]];
    y[k] = s;
  }
  for (int32_t k = n - 1; k >= 0; --k) {
    double s = y[k];
    for (int64_t e = u_begin_[k]; e < u_begin_[k + 1]; ++e) s -= u_value_[e] * y[u_col_[e]];
    y[k] = s / pivot_[k];
  }
  for (int32_t k = 0; k < n; ++k) x[order_[k]] = y[k];
}

void MMatrixLu::SolveTransposed(std::span<double> x) const {
  const int32_t n = size();
  std::vector<double> y(n);
  for (int32_t k = 0; k < n; ++k) y[k] = x[order_[k]];
  for (int32_t k = 0; k < n; ++k) {  // U^T z = y, column by column of U^T.
    const double z = y[k] / pivot_[k];
    y[k] = z;
    for (int64_t e = u_begin_[k]; e < u_begin_[k + 1]; ++e) y[u_col_[e]] -= u_value_[e] * z;
  }
  for (int32_t k = n - 1; k >= 0; --k) {  // L^T v = z.
    const double v = y[k];
    for (int64_t e = l_begin_[k]; e < l_begin_[k + 1]; ++e) y[l_col_[e]] -= l_value_[e] * v;
  }
  for (int32_t k = 0; k < n; ++k) x[order_[k]] = y[k];
}

}  // namespace mdp::internal
