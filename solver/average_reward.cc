#include "solver/average_reward.h"

#include <Eigen/IterativeLinearSolvers>
#include <Eigen/SparseCore>
#include <Eigen/SparseLU>
#include <algorithm>
#include <cmath>
#include <iterator>
#include <limits>
#include <new>
#include <optional>
#include <sstream>
#include <utility>

#include "solver/evaluate.h"
#include "solver/internal/bellman.h"
#include "solver/internal/run_control.h"

namespace mdp {
namespace {

constexpr double kInf = std::numeric_limits<double>::infinity();

// ---------------------------------------------------------------------------------------
// Messages.

std::string Number(double x) {
  std::ostringstream out;
  out.precision(10);
  out << x;
  return out.str();
}

// {"a", "b", "c"} with at most a few names, then "and N more".
std::string DescribeStates(const Model& m, std::span<const StateId> states) {
  constexpr size_t kShown = 5;
  std::string out = "{";
  for (size_t i = 0; i < states.size() && i < kShown; ++i) {
    if (i > 0) out += ", ";
    out += "\"" + m.state_name(states[i]) + "\"";
  }
  if (states.size() > kShown) out += " and " + std::to_string(states.size() - kShown) + " more";
  return out + "}";
}

std::string DescribeClasses(const Model& m, const std::vector<std::vector<StateId>>& classes) {
  constexpr size_t kShown = 5;
  std::string out;
  for (size_t k = 0; k < classes.size() && k < kShown; ++k) {
    if (k > 0) out += ", ";
    out += DescribeStates(m, classes[k]);
  }
  if (classes.size() > kShown) {
    out += " and " + std::to_string(classes.size() - kShown) + " more classes";
  }
  return out;
}

// ---------------------------------------------------------------------------------------
// Chain structure.

// Strongly connected components of the graph whose edges leave state s through the model
// entries [range(s).first, range(s).second). Tarjan's algorithm with an explicit stack of
// frames, so depth is bounded by memory, not the call stack. A component is numbered only
// after every component it reaches, so each edge goes to a component with the same or a
// smaller number.
struct Components {
  std::vector<int32_t> of;  // Per state.
  int32_t count = 0;
};

template <typename EdgeRange>
Components StronglyConnected(const Model& m, EdgeRange range) {
  const StateId n = m.num_states();
  const StateId* next = m.entry_next_data();
  Components c;
  c.of.assign(n, -1);
  std::vector<int32_t> index(n, -1);
  std::vector<int32_t> low(n, 0);
  std::vector<StateId> stack;  // Visited states not yet in a component.
  struct Frame {
    StateId s;
    int64_t edge;
    int64_t end;
  };
  std::vector<Frame> frames;
  int32_t counter = 0;
  auto open = [&](StateId s) {
    index[s] = low[s] = counter++;
    stack.push_back(s);
    const auto [begin, end] = range(s);
    frames.push_back(Frame{s, begin, end});
  };
  for (StateId root = 0; root < n; ++root) {
    if (index[root] >= 0) continue;
    open(root);
    while (!frames.empty()) {
      Frame& f = frames.back();
      if (f.edge < f.end) {
        const StateId t = next[f.edge++];
        if (index[t] < 0) {
          open(t);                 // Invalidates f.
        } else if (c.of[t] < 0) {  // On the stack.
          low[f.s] = std::min(low[f.s], index[t]);
        }
        continue;
      }
      const StateId s = f.s;
      frames.pop_back();
      if (!frames.empty()) low[frames.back().s] = std::min(low[frames.back().s], low[s]);
      if (low[s] == index[s]) {
        StateId t;
        do {
          t = stack.back();
          stack.pop_back();
          c.of[t] = c.count;
        } while (t != s);
        ++c.count;
      }
    }
  }
  return c;
}

// The entries of the row a deterministic policy takes at s (none at terminal states).
auto PolicyEdges(const Model& m, std::span<const RowId> rows) {
  return [&m, rows](StateId s) -> std::pair<int64_t, int64_t> {
    if (rows[s] < 0) return {0, 0};
    return {m.entry_begin(rows[s]), m.entry_end(rows[s])};
  };
}

// The entries of every row of s: the rows of a state, and so their entries, are contiguous.
auto AllActionEdges(const Model& m) {
  return [&m](StateId s) -> std::pair<int64_t, int64_t> {
    return {m.entry_begin(m.row_begin(s)), m.entry_begin(m.row_end(s))};
  };
}

struct ChainStructure {
  std::vector<std::vector<StateId>> classes;  // Recurrent classes, as RecurrentClasses().
  std::vector<int32_t> class_of;              // Per state: its class, or -1 if transient.
};

ChainStructure AnalyseChain(const Model& m, std::span<const RowId> rows) {
  const auto edges = PolicyEdges(m, rows);
  const Components c = StronglyConnected(m, edges);
  const StateId* next = m.entry_next_data();
  // A component is closed iff no edge leaves it; a finite chain's closed irreducible sets
  // are exactly its recurrent classes.
  std::vector<uint8_t> closed(c.count, 1);
  for (StateId s = 0; s < m.num_states(); ++s) {
    const auto [begin, end] = edges(s);
    for (int64_t e = begin; e < end; ++e) {
      if (c.of[next[e]] != c.of[s]) closed[c.of[s]] = 0;
    }
  }
  ChainStructure out;
  out.class_of.assign(m.num_states(), -1);
  std::vector<int32_t> class_of_component(c.count, -1);
  for (StateId s = 0; s < m.num_states(); ++s) {
    const int32_t comp = c.of[s];
    if (!closed[comp]) continue;
    if (class_of_component[comp] < 0) {
      class_of_component[comp] = static_cast<int32_t>(out.classes.size());
      out.classes.emplace_back();
    }
    out.class_of[s] = class_of_component[comp];
    out.classes[class_of_component[comp]].push_back(s);
  }
  return out;
}

// ---------------------------------------------------------------------------------------
// Sweeps.

// sum_s' p(s' | row r) x(s').
inline double RowExpectation(const Model& m, RowId r, const double* x) {
  const int64_t* begin = m.row_entry_begin_data();
  const StateId* next = m.entry_next_data();
  const double* prob = m.entry_probability_data();
  double acc = 0.0;
  for (int64_t e = begin[r], end = begin[r + 1]; e < end; ++e) acc += prob[e] * x[next[e]];
  return acc;
}

struct Bracket {
  double lower = 0.0;
  double upper = 0.0;
  double width() const { return upper - lower; }
};

// d(s) = best_a [r(s, a) + scale (sum p x - x(s))] (0 at terminal states) and, if `rows` is
// not null, its first best row. With scale = 1 - tau this is T'x - x for the transformed
// model; with scale = 1 it is the d of the gain bracket. Returns [min d, max d].
template <bool kMaximize>
Bracket Residuals(const Model& m, double scale, const double* x, double* d, RowId* rows,
                  int threads) {
  const StateId n = m.num_states();
  const RowId* row_begin = m.state_row_begin_data();
  const double* reward = m.row_reward_data();
  double lower = kInf;
  double upper = -kInf;
  // clang-format off
#pragma omp parallel for num_threads(threads) reduction(min : lower) reduction(max : upper) \
    schedule(static, 2048)
  // clang-format on
  for (StateId s = 0; s < n; ++s) {
    RowId best = -1;
    double best_value = 0.0;
    for (RowId r = row_begin[s], end = row_begin[s + 1]; r < end; ++r) {
      const double value = reward[r] + scale * (RowExpectation(m, r, x) - x[s]);
      if (best < 0 || internal::Better<kMaximize>(value, best_value)) {
        best = r;
        best_value = value;
      }
    }
    d[s] = best_value;
    if (rows != nullptr) rows[s] = best;
    lower = std::min(lower, best_value);
    upper = std::max(upper, best_value);
  }
  if (n == 0) return Bracket{};
  return Bracket{lower, upper};
}

// ---------------------------------------------------------------------------------------
// Evidence that the optimal gain is not constant.
//
// By the bracket argument of the header applied to the policies that start in s', any
// policy's gain from s' is at most U(s') = max of d over the states reachable from s' under
// any actions (its limiting distribution lives there); and every state of a recurrent class
// C of the greedy policy G has g* >= g^G >= min_C d. (kMinimize: mirror image.) So
// min_C d > U(s') proves g* differs between C and s'. When relative value iteration runs on
// a multichain model whose optimal gain differs, d tends to g* and this test fires.

class GainEvidence {
 public:
  explicit GainEvidence(const Model& m) : m_(m) {}

  // Returns the message of a kFailedPrecondition error if d proves the optimal gain
  // differs between states by more than `margin`, else nullopt. `rows` is v's greedy policy.
  std::optional<std::string> Check(const double* d, std::span<const RowId> rows, double margin) {
    const ChainStructure chain = AnalyseChain(m_, rows);
    if (chain.classes.size() < 2) return std::nullopt;  // Every state then reaches the class.
    const double sign = m_.objective() == Objective::kMaximize ? 1.0 : -1.0;
    size_t best_class = 0;
    double best_class_min = -kInf;
    for (size_t k = 0; k < chain.classes.size(); ++k) {
      double class_min = kInf;
      for (StateId s : chain.classes[k]) class_min = std::min(class_min, sign * d[s]);
      if (class_min > best_class_min) {
        best_class_min = class_min;
        best_class = k;
      }
    }
    const std::vector<double> reach = ReachableMax(d, sign);
    StateId worst = 0;
    for (StateId s = 1; s < m_.num_states(); ++s) {
      if (reach[s] < reach[worst]) worst = s;
    }
    if (!(best_class_min > reach[worst] + margin)) return std::nullopt;
    const bool maximize = sign > 0;
    std::string message = std::string("the optimal ") + (maximize ? "gain" : "cost per step");
    message += " differs between states, so no single value describes the model (it is ";
    message += "multichain): every state in " + DescribeStates(m_, chain.classes[best_class]);
    message += maximize ? " can earn at least " : " can keep the cost at or below ";
    message += Number(sign * best_class_min) + " per step, but from state \"";
    message += m_.state_name(worst) + "\" no policy ";
    message += maximize ? "earns more than " : "costs less than ";
    message += Number(sign * reach[worst]) + " per step. Recurrent classes of the current ";
    message += "greedy policy: " + DescribeClasses(m_, chain.classes) + ". Solve the classes ";
    message += "as separate models, or make every state reach one class.";
    return message;
  }

 private:
  // Per state: max of sign * d over the states reachable from it (itself included).
  std::vector<double> ReachableMax(const double* d, double sign) {
    if (components_.of.empty()) components_ = StronglyConnected(m_, AllActionEdges(m_));
    const StateId n = m_.num_states();
    // States grouped by component, in component order (counting sort).
    std::vector<StateId> start(components_.count + 1, 0);
    for (StateId s = 0; s < n; ++s) ++start[components_.of[s] + 1];
    for (int32_t k = 0; k < components_.count; ++k) start[k + 1] += start[k];
    std::vector<StateId> order(n);
    std::vector<StateId> fill(start.begin(), start.end() - 1);
    for (StateId s = 0; s < n; ++s) order[fill[components_.of[s]]++] = s;
    // Edges only reach components with smaller numbers, finished before this one.
    const auto edges = AllActionEdges(m_);
    std::vector<double> best(components_.count, -kInf);
    for (int32_t k = 0; k < components_.count; ++k) {
      for (StateId i = start[k]; i < start[k + 1]; ++i) {
        const StateId s = order[i];
        best[k] = std::max(best[k], sign * d[s]);
        const auto [begin, end] = edges(s);
        for (int64_t e = begin; e < end; ++e) {
          best[k] = std::max(best[k], best[components_.of[m_.entry_next(e)]]);
        }
      }
    }
    std::vector<double> out(n);
    for (StateId s = 0; s < n; ++s) out[s] = best[components_.of[s]];
    return out;
  }

  const Model& m_;
  Components components_;  // Of the all-actions graph; computed on first use.
};

// ---------------------------------------------------------------------------------------
// Completing a solution from a bias vector.

// Fills q, best_row, optimal_row, action_gap, tied_states, the bracket, gain, tie tolerance
// and loss bound from h (already 0 at the reference state), then the chain structure of
// best_row. The bracket is widened by a rounding allowance so that it holds in floating
// point too.
template <bool kMaximize>
void FinishSolution(const Model& m, std::vector<double> h, const AverageRewardOptions& options,
                    AverageRewardSolution& out) {
  const StateId n = m.num_states();
  const int threads = internal::ThreadCount(options.threads);
  out.q.assign(m.num_rows(), 0.0);
  out.best_row.assign(n, -1);
  out.optimal_row.assign(m.num_rows(), 0);
  out.action_gap.assign(n, std::numeric_limits<double>::quiet_NaN());
  std::vector<double> best(n, 0.0);
  double lower = kInf;
  double upper = -kInf;
  double scale = 1.0;
  // clang-format off
#pragma omp parallel for num_threads(threads) reduction(min : lower) \
    reduction(max : upper, scale) schedule(static, 2048)
  // clang-format on
  for (StateId s = 0; s < n; ++s) {
    double b = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      out.q[r] = m.row_reward(r) + RowExpectation(m, r, h.data());
      if (r == m.row_begin(s) || internal::Better<kMaximize>(out.q[r], b)) b = out.q[r];
      scale = std::max(scale, std::fabs(out.q[r]));
    }
    best[s] = b;
    const double d = m.row_begin(s) == m.row_end(s) ? 0.0 : b - h[s];
    lower = std::min(lower, d);
    upper = std::max(upper, d);
    scale = std::max(scale, std::fabs(h[s]));
  }
  if (n == 0) lower = upper = 0.0;
  const double rounding = 1e-15 * scale;  // A few units in the last place of q - h.
  out.gain_lower = lower - rounding;
  out.gain_upper = upper + rounding;
  out.gain = 0.5 * (out.gain_lower + out.gain_upper);
  const double width = out.gain_upper - out.gain_lower;
  const double pick = options.tie_tolerance;
  out.tie_tolerance = options.tie_tolerance + width;
  int64_t tied = 0;
  double pick_slack = 0.0;
#pragma omp parallel for num_threads(threads) reduction(+ : tied) reduction(max : pick_slack) \
    schedule(static, 2048)
  for (StateId s = 0; s < n; ++s) {
    const RowId begin = m.row_begin(s);
    const RowId end = m.row_end(s);
    if (begin == end) continue;
    const double state_rounding = 1e-12 * std::max(1.0, std::fabs(best[s]));
    int count = 0;
    bool have_second = false;
    bool skipped_best = false;
    double second = 0.0;
    for (RowId r = begin; r < end; ++r) {
      const double behind = std::fabs(out.q[r] - best[s]);
      out.optimal_row[r] = behind <= out.tie_tolerance + state_rounding ? 1 : 0;
      count += out.optimal_row[r];
      if (out.best_row[s] < 0 && behind <= pick + state_rounding) {
        out.best_row[s] = r;
        pick_slack = std::max(pick_slack, behind);
      }
      if (!skipped_best && out.q[r] == best[s]) {
        skipped_best = true;  // The best itself; the gap is to the best of the others.
      } else if (!have_second || internal::Better<kMaximize>(out.q[r], second)) {
        second = out.q[r];
        have_second = true;
      }
    }
    if (end - begin >= 2) out.action_gap[s] = std::fabs(best[s] - second);
    if (count >= 2) ++tied;
  }
  out.tied_states = tied;
  // The pick trails the best q by pick_slack: its gain is at least gain_lower - pick_slack
  // (header comment), while g* <= gain_upper.
  out.policy_loss_bound = width + pick_slack;
  out.reference_state = options.reference_state;
  out.bias = std::move(h);
  ++out.sweeps;

  ChainStructure chain = AnalyseChain(m, out.best_row);
  out.recurrent_classes = std::move(chain.classes);
  out.multichain_suspected = out.recurrent_classes.size() >= 2;
  out.chain_structure_note.clear();
  if (out.multichain_suspected) {
    out.chain_structure_note =
        "The chosen policy has " + std::to_string(out.recurrent_classes.size()) +
        " recurrent classes: " + DescribeClasses(m, out.recurrent_classes) + ". ";
    if (width <= options.tolerance) {
      out.chain_structure_note += "Their optimal gains agree within the gain bracket (width " +
                                  Number(width) + "), so the single gain holds for every state.";
    } else {
      out.chain_structure_note +=
          "The solve stopped with a gain bracket of width " + Number(width) +
          ", so the optimal gain may differ between these classes and the single gain may "
          "be wrong for some states.";
    }
  }
}

void Finish(const Model& m, std::vector<double> h, const AverageRewardOptions& options,
            AverageRewardSolution& out) {
  if (m.objective() == Objective::kMaximize) {
    FinishSolution<true>(m, std::move(h), options, out);
  } else {
    FinishSolution<false>(m, std::move(h), options, out);
  }
  out.outcome =
      out.gain_upper - out.gain_lower <= options.tolerance ? SolveOutcome::kConverged : out.outcome;
}

// The run limits in the form RunControl reads.
SolveOptions RunLimits(const AverageRewardOptions& options) {
  SolveOptions run;
  run.max_iterations = options.max_iterations;
  run.time_limit_seconds = options.time_limit_seconds;
  return run;
}

// ---------------------------------------------------------------------------------------
// Sparse linear solves (as solver/evaluate.cc: LU for small systems, BiCGSTAB beyond).

using Vector = Eigen::VectorXd;
using RowMajorMatrix = Eigen::SparseMatrix<double, Eigen::RowMajor>;
using Triplets = std::vector<Eigen::Triplet<double>>;

class SparseSolver {
 public:
  SparseSolver(Eigen::Index size, const Triplets& triplets) : a_(size, size) {
    a_.setFromTriplets(triplets.begin(), triplets.end());
    a_.makeCompressed();
    direct_ = size <= EvaluateOptions().direct_max_states;
  }
  SparseSolver(const SparseSolver&) = delete;
  SparseSolver& operator=(const SparseSolver&) = delete;

  Status Prepare() {
    if (direct_) return Factorize();
    krylov_.compute(a_);
    return Status::Ok();
  }

  // x = A^-1 b. The direct solver adds a step of iterative refinement; the iterative one
  // starts from x if it has the right size (a warm start) and aims at sup-norm residual
  // `target` (or the rounding floor of x, if larger).
  Status Solve(const Vector& b, double target, const CancelToken* cancel, Vector& x) {
    if (!direct_) {
      bool reached = false;
      MDP_RETURN_IF_ERROR(Krylov(b, target, cancel, x, reached));
      if (reached) return Status::Ok();
      // BiCGSTAB can break down or stall on strongly non-normal systems, e.g. a long chain
      // of states that each step one state on: fall back to LU for this and later solves.
      direct_ = true;
      MDP_RETURN_IF_ERROR(Factorize());
    }
    x = lu_.solve(b);
    x += lu_.solve(Vector(b - a_ * x));
    if (!x.allFinite()) return InternalError("sparse LU produced non-finite values");
    return Status::Ok();
  }

 private:
  Status Factorize() {
    const Eigen::SparseMatrix<double> col_major = a_;
    lu_.analyzePattern(col_major);
    lu_.factorize(col_major);
    if (lu_.info() != Eigen::Success) return InternalError("sparse LU factorisation failed");
    return Status::Ok();
  }

  // Refinement rounds: each solves for the correction against the true residual, so drift
  // in BiCGSTAB's recursive residual cannot hide error. Sets `reached`.
  Status Krylov(const Vector& b, double target, const CancelToken* cancel, Vector& x,
                bool& reached) {
    if (x.size() != b.size() || !x.allFinite()) x = Vector::Zero(b.size());
    constexpr int64_t kMaxIterations = 100000;
    int64_t spent = 0;
    for (int round = 0;; ++round) {
      if (cancel != nullptr && cancel->cancelled()) {
        return Status(StatusCode::kCancelled, "cancelled during policy evaluation");
      }
      const Vector residual = b - a_ * x;
      const double aim = std::max(target, 1e-13 * x.lpNorm<Eigen::Infinity>());
      reached = residual.allFinite() && residual.lpNorm<Eigen::Infinity>() <= aim;
      if (reached || round == 6 || spent >= kMaxIterations || !residual.allFinite()) break;
      krylov_.setTolerance(std::max(1e-16, std::min(0.5, 0.5 * aim / residual.norm())));
      krylov_.setMaxIterations(kMaxIterations - spent);
      const Vector correction = krylov_.solveWithGuess(residual, Vector::Zero(b.size()));
      spent += krylov_.iterations();
      if (!correction.allFinite()) break;
      x += correction;
    }
    return Status::Ok();
  }

  RowMajorMatrix a_;
  bool direct_ = true;
  Eigen::SparseLU<Eigen::SparseMatrix<double>> lu_;
  Eigen::BiCGSTAB<RowMajorMatrix, Eigen::DiagonalPreconditioner<double>> krylov_;
};

// ---------------------------------------------------------------------------------------
// Policy evaluation, one recurrent class at a time.

struct AverageEvaluation {
  ChainStructure chain;
  std::vector<double> class_gain;  // Per recurrent class.
  std::vector<double> gain;        // Per state.
  std::vector<double> bias;        // Per state; 0 at the smallest state of each class.
};

// On a recurrent class C with smallest state c0: g + h(s) - sum_{s' in C} p h(s') = r(s) for
// s in C and h(c0) = 0. Unknown 0 is g (h(c0) is known), unknown i > 0 is h(C[i]); the
// matrix is nonsingular because the class is irreducible.
// `previous` (may be empty) is the last policy's evaluation, a warm start.
Status EvaluateClass(const Model& m, std::span<const RowId> rows, std::span<const StateId> cls,
                     double target, const CancelToken* cancel, const AverageEvaluation& previous,
                     std::vector<int32_t>& local, AverageEvaluation& out, double& class_gain) {
  if (cls.size() == 1) {  // An absorbing state: it earns its own reward for ever.
    const StateId s = cls[0];
    class_gain = rows[s] < 0 ? 0.0 : m.row_reward(rows[s]);
    out.bias[s] = 0.0;
    return Status::Ok();
  }
  const Eigen::Index size = static_cast<Eigen::Index>(cls.size());
  for (Eigen::Index i = 0; i < size; ++i) local[cls[i]] = static_cast<int32_t>(i);
  Triplets triplets;
  Vector b(size);
  for (Eigen::Index i = 0; i < size; ++i) {
    const RowId r = rows[cls[i]];
    triplets.emplace_back(i, 0, 1.0);
    if (i > 0) triplets.emplace_back(i, i, 1.0);
    for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
      const int32_t j = local[m.entry_next(e)];
      if (j > 0) triplets.emplace_back(i, j, -m.entry_probability(e));
    }
    b[i] = m.row_reward(r);
  }
  SparseSolver solver(size, triplets);
  MDP_RETURN_IF_ERROR(solver.Prepare());
  Vector y;
  if (!previous.bias.empty()) {
    y.resize(size);
    y[0] = previous.gain[cls[0]];
    for (Eigen::Index i = 1; i < size; ++i) y[i] = previous.bias[cls[i]] - previous.bias[cls[0]];
  }
  MDP_RETURN_IF_ERROR(solver.Solve(b, target, cancel, y));
  class_gain = y[0];
  out.bias[cls[0]] = 0.0;
  for (Eigen::Index i = 1; i < size; ++i) out.bias[cls[i]] = y[i];
  return Status::Ok();
}

// Transient states T: (I - P_TT) g_T = P_TR g_R, then
// (I - P_TT) h_T = r_T - g_T + P_TR h_R; I - P_TT is nonsingular because the chain leaves T.
Status EvaluateTransient(const Model& m, std::span<const RowId> rows, double target,
                         const CancelToken* cancel, const AverageEvaluation& previous,
                         std::vector<int32_t>& local, AverageEvaluation& out) {
  std::vector<StateId> transient;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (out.chain.class_of[s] < 0) {
      local[s] = static_cast<int32_t>(transient.size());
      transient.push_back(s);
    }
  }
  if (transient.empty()) return Status::Ok();
  const Eigen::Index size = static_cast<Eigen::Index>(transient.size());
  Triplets triplets;
  Vector to_classes_gain = Vector::Zero(size);
  Vector to_classes_bias = Vector::Zero(size);
  for (Eigen::Index i = 0; i < size; ++i) {
    const RowId r = rows[transient[i]];  // Terminal states are classes, so r >= 0.
    triplets.emplace_back(i, i, 1.0);
    for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
      const StateId t = m.entry_next(e);
      const double p = m.entry_probability(e);
      if (out.chain.class_of[t] < 0) {
        triplets.emplace_back(i, local[t], -p);
      } else {
        to_classes_gain[i] += p * out.gain[t];
        to_classes_bias[i] += p * out.bias[t];
      }
    }
  }
  SparseSolver solver(size, triplets);
  MDP_RETURN_IF_ERROR(solver.Prepare());
  Vector g_t;
  Vector h_t;
  if (!previous.bias.empty()) {
    g_t.resize(size);
    h_t.resize(size);
    for (Eigen::Index i = 0; i < size; ++i) {
      g_t[i] = previous.gain[transient[i]];
      h_t[i] = previous.bias[transient[i]];
    }
  }
  if (out.chain.classes.size() == 1) {
    g_t = Vector::Constant(size, out.class_gain[0]);  // Absorbed into the one class surely.
  } else {
    MDP_RETURN_IF_ERROR(solver.Solve(to_classes_gain, target, cancel, g_t));
  }
  Vector b(size);
  for (Eigen::Index i = 0; i < size; ++i) {
    b[i] = m.row_reward(rows[transient[i]]) - g_t[i] + to_classes_bias[i];
  }
  MDP_RETURN_IF_ERROR(solver.Solve(b, target, cancel, h_t));
  for (Eigen::Index i = 0; i < size; ++i) {
    out.gain[transient[i]] = g_t[i];
    out.bias[transient[i]] = h_t[i];
  }
  return Status::Ok();
}

// Solves (I - P) g = 0, g + (I - P) h = r for the policy `rows`, with h = 0 at the smallest
// state of each recurrent class (which fixes the solution; Puterman 1994, sec. 8.2 and 9.2,
// from memory).
Status EvaluateAverage(const Model& m, std::span<const RowId> rows, double target,
                       const CancelToken* cancel, const AverageEvaluation& previous,
                       AverageEvaluation& out) {
  const StateId n = m.num_states();
  out.chain = AnalyseChain(m, rows);
  out.class_gain.assign(out.chain.classes.size(), 0.0);
  out.gain.assign(n, 0.0);
  out.bias.assign(n, 0.0);
  std::vector<int32_t> local(n, -1);
  for (size_t k = 0; k < out.chain.classes.size(); ++k) {
    MDP_RETURN_IF_ERROR(EvaluateClass(m, rows, out.chain.classes[k], target, cancel, previous,
                                      local, out, out.class_gain[k]));
    for (StateId s : out.chain.classes[k]) out.gain[s] = out.class_gain[k];
  }
  return EvaluateTransient(m, rows, target, cancel, previous, local, out);
}

// ---------------------------------------------------------------------------------------
// Policy improvement (Puterman 1994, sec. 9.2, from memory): first on the gain, then, where
// the gain cannot improve, on q among the rows that keep it. A state keeps its row unless
// another is better by more than the slack, so rounding noise cannot make the method cycle.

template <bool kMaximize>
int64_t ImproveGain(const Model& m, const double* g, double slack, RowId* rows, int threads) {
  int64_t changed = 0;
#pragma omp parallel for num_threads(threads) reduction(+ : changed) schedule(static, 2048)
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (rows[s] < 0) continue;
    RowId best = -1;
    double best_value = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      const double value = RowExpectation(m, r, g);
      if (best < 0 || internal::Better<kMaximize>(value, best_value)) {
        best = r;
        best_value = value;
      }
    }
    const double current = RowExpectation(m, rows[s], g);
    if (internal::Better<kMaximize>(best_value, kMaximize ? current + slack : current - slack)) {
      rows[s] = best;
      ++changed;
    }
  }
  return changed;
}

template <bool kMaximize>
int64_t ImproveBias(const Model& m, const double* g, const double* h, double gain_slack,
                    double slack, RowId* rows, int threads) {
  int64_t changed = 0;
#pragma omp parallel for num_threads(threads) reduction(+ : changed) schedule(static, 2048)
  for (StateId s = 0; s < m.num_states(); ++s) {
    const RowId begin = m.row_begin(s);
    const RowId end = m.row_end(s);
    if (begin == end) continue;
    double best_gain = 0.0;
    for (RowId r = begin; r < end; ++r) {
      const double value = RowExpectation(m, r, g);
      if (r == begin || internal::Better<kMaximize>(value, best_gain)) best_gain = value;
    }
    RowId best = -1;
    double best_q = 0.0;
    double current_q = 0.0;
    bool current_eligible = false;
    for (RowId r = begin; r < end; ++r) {
      if (std::fabs(RowExpectation(m, r, g) - best_gain) > gain_slack) continue;
      const double q = m.row_reward(r) + RowExpectation(m, r, h);
      if (r == rows[s]) {
        current_q = q;
        current_eligible = true;
      }
      if (best < 0 || internal::Better<kMaximize>(q, best_q)) {
        best = r;
        best_q = q;
      }
    }
    if (current_eligible &&
        !internal::Better<kMaximize>(best_q, kMaximize ? current_q + slack : current_q - slack)) {
      continue;
    }
    if (best != rows[s]) {
      rows[s] = best;
      ++changed;
    }
  }
  return changed;
}

double SupAbs(const std::vector<double>& x) {
  double out = 0.0;
  for (double v : x) out = std::max(out, std::fabs(v));
  return out;
}

template <bool kMaximize>
Result<AverageRewardSolution> PolicyIterationT(const Model& m, const AverageRewardOptions& options,
                                               const ProgressFn* progress,
                                               const CancelToken* cancel) {
  const SolveOptions limits = RunLimits(options);
  internal::RunControl control(limits, progress, cancel);
  const int threads = internal::ThreadCount(options.threads);
  const StateId n = m.num_states();
  AverageRewardSolution out;
  out.method = AverageRewardMethod::kPolicyIteration;
  out.options = options;
  double reward_scale = 1.0;
  for (RowId r = 0; r < m.num_rows(); ++r) {
    reward_scale = std::max(reward_scale, std::fabs(m.row_reward(r)));
  }
  const double target = std::max(1e-14 * reward_scale, 0.01 * options.tolerance);
  std::vector<RowId> rows(n, -1);
  std::vector<double> zeros(n, 0.0);
  std::vector<double> d(n, 0.0);
  ImproveBias<kMaximize>(m, zeros.data(), zeros.data(), 0.0, 0.0, rows.data(), threads);
  ++out.sweeps;
  AverageEvaluation eval;  // Empty until the first evaluation.
  std::optional<SolveOutcome> stop;
  bool stable = false;
  for (;;) {
    AverageEvaluation next;
    const Status status = EvaluateAverage(m, rows, target, cancel, eval, next);
    if (!status.ok()) {
      if (status.code() != StatusCode::kCancelled) return status;
      stop = SolveOutcome::kCancelled;
      break;
    }
    eval = std::move(next);
    ++out.sweeps;
    const double gain_slack = 1e-11 * std::max(1.0, SupAbs(eval.gain));
    const double slack = 1e-11 * std::max(reward_scale, SupAbs(eval.bias));
    int64_t changed = ImproveGain<kMaximize>(m, eval.gain.data(), gain_slack, rows.data(), threads);
    if (changed == 0) {
      changed = ImproveBias<kMaximize>(m, eval.gain.data(), eval.bias.data(), gain_slack, slack,
                                       rows.data(), threads);
    }
    ++out.iterations;
    const Bracket bracket =
        Residuals<kMaximize>(m, 1.0, eval.bias.data(), d.data(), nullptr, threads);
    out.sweeps += 2;
    if (changed == 0) {
      stable = true;
      break;
    }
    stop = control.After(out.iterations, out.sweeps, bracket.width(), 0.5 * bracket.width(),
                         "improve");
    if (stop) break;
  }
  // A stable policy is optimal (Puterman 1994, sec. 9.2, from memory), so recurrent classes
  // with different gains mean the optimal gain differs between states.
  if (stable && eval.class_gain.size() >= 2) {
    const auto [low, high] = std::minmax_element(eval.class_gain.begin(), eval.class_gain.end());
    if (*high - *low > options.tolerance) {
      std::string message =
          "the optimal policy found is multichain and its recurrent classes have different "
          "gains per step, so no single gain describes the model:";
      for (size_t k = 0; k < eval.chain.classes.size() && k < 5; ++k) {
        message += (k == 0 ? " " : "; ") + DescribeStates(m, eval.chain.classes[k]) + " has gain " +
                   Number(eval.class_gain[k]);
      }
      if (eval.chain.classes.size() > 5) {
        message += "; and " + std::to_string(eval.chain.classes.size() - 5) + " more classes";
      }
      return FailedPreconditionError(
          message +
          ". Solve the classes as separate models, or make every state reach one "
          "class.");
    }
  }
  std::vector<double> h = eval.bias.empty() ? zeros : std::move(eval.bias);
  if (n > 0) {
    const double shift = h[options.reference_state];
    for (double& x : h) x -= shift;
  }
  out.outcome = stop.value_or(SolveOutcome::kStalled);
  Finish(m, std::move(h), options, out);
  out.solve_seconds = control.elapsed_seconds();
  return out;
}

template <bool kMaximize>
Result<AverageRewardSolution> RelativeValueIterationT(const Model& m,
                                                      const AverageRewardOptions& options,
                                                      const ProgressFn* progress,
                                                      const CancelToken* cancel) {
  const SolveOptions limits = RunLimits(options);
  internal::RunControl control(limits, progress, cancel);
  const int threads = internal::ThreadCount(options.threads);
  const StateId n = m.num_states();
  const StateId ref = options.reference_state;
  const double tau = options.aperiodicity;
  // How often to look for evidence of differing gains (a cost of about one sweep).
  constexpr int64_t kEvidenceInterval = 32;
  AverageRewardSolution out;
  out.method = AverageRewardMethod::kRelativeValueIteration;
  out.options = options;
  GainEvidence evidence(m);
  std::vector<double> v(n, 0.0);
  std::vector<double> d(n, 0.0);
  std::vector<RowId> rows(n, -1);
  std::optional<SolveOutcome> stop;
  bool converged = false;
  auto check_evidence = [&]() -> std::optional<std::string> {
    const double margin =
        std::max(options.tolerance, 1e-9 * std::max(1.0, SupAbs(d))) + 1e-13 * SupAbs(v);
    return evidence.Check(d.data(), rows, margin);
  };
  for (;;) {
    // d = T'v - v; the bracket of the transformed model at v is that of the original model
    // at (1 - tau) v, and both contain g* (header comment).
    const bool look = (out.iterations + 1) % kEvidenceInterval == 0;
    const Bracket bracket = Residuals<kMaximize>(m, 1.0 - tau, v.data(), d.data(),
                                                 look ? rows.data() : nullptr, threads);
    ++out.iterations;
    ++out.sweeps;
    // Aim at half the tolerance: the final bracket is recomputed from h and widened by a
    // rounding allowance (FinishSolution).
    if (bracket.width() <= 0.5 * options.tolerance) {
      converged = true;
      break;
    }
    if (look) {
      if (std::optional<std::string> message = check_evidence()) {
        return FailedPreconditionError(*message);
      }
    }
    stop =
        control.After(out.iterations, out.sweeps, bracket.width(), 0.5 * bracket.width(), "sweep");
    if (stop) break;
    // v <- T'v - (T'v)(ref): subtracting a constant leaves every later d unchanged and keeps
    // v bounded (relative value iteration; Puterman 1994, sec. 8.5.5, from memory).
    const double shift = v[ref] + d[ref];
#pragma omp parallel for num_threads(threads) schedule(static, 2048)
    for (StateId s = 0; s < n; ++s) v[s] += d[s] - shift;
  }
  if (!converged) {
    Residuals<kMaximize>(m, 1.0 - tau, v.data(), d.data(), rows.data(), threads);
    ++out.sweeps;
    if (std::optional<std::string> message = check_evidence()) {
      return FailedPreconditionError(*message);
    }
  }
  // The transformed model's bias is h / (1 - tau) (options header), so h = (1 - tau) v;
  // v(ref) = 0 already.
  for (double& x : v) x *= 1.0 - tau;
  out.outcome = stop.value_or(SolveOutcome::kStalled);
  Finish(m, std::move(v), options, out);
  out.solve_seconds = control.elapsed_seconds();
  return out;
}

}  // namespace

std::string_view AverageRewardMethodName(AverageRewardMethod method) {
  switch (method) {
    case AverageRewardMethod::kRelativeValueIteration:
      return "relative_value_iteration";
    case AverageRewardMethod::kPolicyIteration:
      return "policy_iteration";
  }
  return "unknown";
}

Status CheckAverageRewardOptions(const Model& m, const AverageRewardOptions& options) {
  const double values[] = {options.tolerance,
                           static_cast<double>(options.max_iterations),
                           options.time_limit_seconds,
                           options.aperiodicity,
                           options.tie_tolerance,
                           static_cast<double>(options.threads),
                           static_cast<double>(options.reference_state)};
  static_assert(std::size(values) == kAverageRewardOptionBounds.size());
  for (size_t i = 0; i < kAverageRewardOptionBounds.size(); ++i) {
    const OptionBound& bound = kAverageRewardOptionBounds[i];
    if (!(values[i] >= bound.min && values[i] <= bound.max)) {
      return InvalidArgumentError(std::string(bound.name) + " must be in [" + Number(bound.min) +
                                  ", " + Number(bound.max) + "], got " + Number(values[i]));
    }
  }
  if (options.reference_state >= m.num_states()) {
    return InvalidArgumentError("reference_state " + std::to_string(options.reference_state) +
                                " is not a state of the model (it has " +
                                std::to_string(m.num_states()) + ")");
  }
  return Status::Ok();
}

std::vector<std::vector<StateId>> RecurrentClasses(const Model& m, std::span<const RowId> rows) {
  return AnalyseChain(m, rows).classes;
}

Result<AverageRewardSolution> RelativeValueIteration(const Model& m,
                                                     const AverageRewardOptions& options,
                                                     const ProgressFn* progress,
                                                     const CancelToken* cancel) {
  MDP_RETURN_IF_ERROR(CheckAverageRewardOptions(m, options));
  try {
    return m.objective() == Objective::kMaximize
               ? RelativeValueIterationT<true>(m, options, progress, cancel)
               : RelativeValueIterationT<false>(m, options, progress, cancel);
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory during relative value iteration");
  }
}

Result<AverageRewardSolution> AverageRewardPolicyIteration(const Model& m,
                                                           const AverageRewardOptions& options,
                                                           const ProgressFn* progress,
                                                           const CancelToken* cancel) {
  MDP_RETURN_IF_ERROR(CheckAverageRewardOptions(m, options));
  try {
    return m.objective() == Objective::kMaximize
               ? PolicyIterationT<true>(m, options, progress, cancel)
               : PolicyIterationT<false>(m, options, progress, cancel);
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory during average-reward policy iteration");
  }
}

}  // namespace mdp
