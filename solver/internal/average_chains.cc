#include "solver/internal/average_chains.h"

#include <Eigen/IterativeLinearSolvers>
#include <Eigen/SparseCore>
#include <Eigen/SparseLU>
#include <algorithm>
#include <cmath>
#include <limits>
#include <utility>

#include "solver/evaluate.h"

namespace mdp::internal {
namespace {

constexpr double kInf = std::numeric_limits<double>::infinity();

// ---------------------------------------------------------------------------------------
// Chain structure.

// Strongly connected components of the graph whose edges leave state s through the model
// entries [range(s).first, range(s).second). Tarjan's algorithm with an explicit stack of
// frames, so depth is bounded by memory, not the call stack. A component is numbered only
// after every component it reaches, so each edge goes to a component with the same or a
// smaller number.
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

  Vector Apply(const Vector& x) const { return a_ * x; }  // A x.

  Status Prepare() {
    if (direct_) return Factorize();
    krylov_.compute(a_);
    return Status::Ok();
  }

  // Switches this and later solves to LU (no-op if already there).
  Status UseDirect() {
    if (direct_) return Status::Ok();
    direct_ = true;
    return Factorize();
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
  // in BiCGSTAB's recursive residual cannot hide error. A round runs at most kChunk
  // iterations, so that cancellation is seen within about kChunk products (a 100,000-state
  // slowly mixing ring once ran minutes inside one round); rounds go on while the true
  // residual keeps shrinking. Sets `reached`.
  Status Krylov(const Vector& b, double target, const CancelToken* cancel, Vector& x,
                bool& reached) {
    if (x.size() != b.size() || !x.allFinite()) x = Vector::Zero(b.size());
    constexpr int64_t kMaxIterations = 100000;
    constexpr int64_t kChunk = 500;
    int64_t spent = 0;
    int stalls = 0;
    double last = std::numeric_limits<double>::infinity();
    for (;;) {
      if (cancel != nullptr && cancel->cancelled()) {
        return Status(StatusCode::kCancelled, "cancelled during policy evaluation");
      }
      const Vector residual = b - a_ * x;
      const double aim = std::max(target, 1e-13 * x.lpNorm<Eigen::Infinity>());
      const double sup = residual.lpNorm<Eigen::Infinity>();
      reached = residual.allFinite() && sup <= aim;
      if (reached || spent >= kMaxIterations || !residual.allFinite()) break;
      // Six rounds without halving the residual: BiCGSTAB is not getting there.
      stalls = sup < 0.5 * last ? 0 : stalls + 1;
      if (stalls >= 6) break;
      last = std::min(last, sup);
      krylov_.setTolerance(std::max(1e-16, std::min(0.5, 0.5 * aim / residual.norm())));
      krylov_.setMaxIterations(std::min(kChunk, kMaxIterations - spent));
      const Vector correction = krylov_.solveWithGuess(residual, Vector::Zero(b.size()));
      spent += std::max<int64_t>(1, krylov_.iterations());
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
  // The class's true gain is pi_C d, d = r + P h - h, for its stationary distribution pi_C,
  // so it is within max |d - g| of the computed g.
  for (const StateId s : cls) {
    const double d =
        m.row_reward(rows[s]) + RowExpectation(m, rows[s], out.bias.data()) - out.bias[s];
    out.gain_error = std::max(out.gain_error, std::fabs(d - class_gain));
  }
  return Status::Ok();
}

// g_T = (I - P_TT)^-1 b, b = P_TR g_R, and its share of the error bound. The true gains are
// x = (I - P_TT)^-1 P_TR gamma for the true class gains gamma, |g_R - gamma| <= e (the bound
// so far); with rho = (I - P_TT) g_T - b, |g_T - x| <= (I - P_TT)^-1 (|rho| + P_TR e 1)
// <= |rho| tau + e, where tau = (I - P_TT)^-1 1 is the expected time to absorption
// ((I - P_TT)^-1 = sum_k P_TT^k is nonnegative, and its rows times P_TR sum to at most 1).
// tau can be large (a fair random walk between two classes takes ~N^2 / 4 steps), so it is
// found first, and g_T aimed at a residual of target / max tau; below the iterative
// solver's rounding floor that takes LU. Any tau' with (I - P_TT) tau' >= sigma > 0 gives
// tau <= tau' / sigma, so a rough tau' suffices.
Status SolveTransientGain(SparseSolver& solver, const Vector& b, double target,
                          const CancelToken* cancel, Vector& g_t, double& gain_error) {
  const Eigen::Index size = b.size();
  Vector tau;
  MDP_RETURN_IF_ERROR(solver.Solve(Vector::Ones(size), 0.25, cancel, tau));
  const double sigma = solver.Apply(tau).minCoeff();
  const double max_time = sigma > 0.0 ? tau.maxCoeff() / sigma : kInf;
  const double wanted = target / std::max(1.0, max_time);
  if (wanted < 1e-13 * std::max(1.0, b.lpNorm<Eigen::Infinity>())) {
    MDP_RETURN_IF_ERROR(solver.UseDirect());
  }
  MDP_RETURN_IF_ERROR(solver.Solve(b, wanted, cancel, g_t));
  const double residual = (solver.Apply(g_t) - b).lpNorm<Eigen::Infinity>();
  gain_error = max_time == kInf ? kInf : gain_error + residual * max_time;
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
    MDP_RETURN_IF_ERROR(
        SolveTransientGain(solver, to_classes_gain, target, cancel, g_t, out.gain_error));
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

}  // namespace

Components AllActionComponents(const Model& m) { return StronglyConnected(m, AllActionEdges(m)); }

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

// Each class first (its gain and bias do not depend on the rest of the chain), then the
// transient states, which see the classes only through the entries that lead into them.
Status EvaluateAverage(const Model& m, std::span<const RowId> rows, double target,
                       const CancelToken* cancel, const AverageEvaluation& previous,
                       AverageEvaluation& out) {
  const StateId n = m.num_states();
  out.chain = AnalyseChain(m, rows);
  out.class_gain.assign(out.chain.classes.size(), 0.0);
  out.gain.assign(n, 0.0);
  out.bias.assign(n, 0.0);
  out.gain_error = 0.0;
  std::vector<int32_t> local(n, -1);
  for (size_t k = 0; k < out.chain.classes.size(); ++k) {
    MDP_RETURN_IF_ERROR(EvaluateClass(m, rows, out.chain.classes[k], target, cancel, previous,
                                      local, out, out.class_gain[k]));
    for (StateId s : out.chain.classes[k]) out.gain[s] = out.class_gain[k];
  }
  return EvaluateTransient(m, rows, target, cancel, previous, local, out);
}

}  // namespace mdp::internal
