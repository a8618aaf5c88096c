#include "solver/internal/average_chains.h"

#include <Eigen/IterativeLinearSolvers>
#include <Eigen/SparseCore>
#include <Eigen/SparseLU>
#include <algorithm>
#include <cmath>
#include <limits>
#include <utility>

#include "solver/evaluate.h"
#include "solver/internal/mmatrix_lu.h"

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
// Sparse linear solves: Eigen's LU for small systems; beyond that, factors of the chain's
// M-matrix (internal/mmatrix_lu.h) when they fit the budget, else BiCGSTAB.
//
// Why factors: on a slowly mixing chain (a 100,000-state ring whose policy drifts) the
// systems below are so badly conditioned that BiCGSTAB ran for minutes, yet a ring or band
// structure keeps the factors within a few dozen entries per row. On an expander (next
// states anywhere) the factors would fill in to n^2 / 2 entries while BiCGSTAB converges in
// a few dozen products; PlanFactors predicts the fill before a byte is spent on it.

using Vector = Eigen::VectorXd;
using RowMajorMatrix = Eigen::SparseMatrix<double, Eigen::RowMajor>;
using Triplets = std::vector<Eigen::Triplet<double>>;

// What the solves of one evaluation share.
struct SolveContext {
  StopCheck stop;
  double budget_bytes = 0.0;
  int threads = 1;  // For factorisations (MMatrixLu::Factorize).
  // Systems of at least this many unknowns go straight to BiCGSTAB: the previous evaluation
  // declined factors for one so large (an expander stays one from policy to policy, and
  // planning costs a few passes over the system).
  int32_t declined_before = std::numeric_limits<int32_t>::max();
  int32_t declined = std::numeric_limits<int32_t>::max();  // Smallest declined here.
  // Systems of at least this many unknowns are factored whenever the factors fit the memory
  // budget, whatever their work, without trying BiCGSTAB first: BiCGSTAB missed its target
  // on one so large in an earlier evaluation, and factors had to take over (on a 250,000-cell
  // grid each BiCGSTAB attempt took 20-45 s before it gave up; its factors take 3.3 s).
  int32_t missed_before = std::numeric_limits<int32_t>::max();
  int32_t missed = std::numeric_limits<int32_t>::max();  // Smallest missed here.
  AverageSolveCounts counts;

  bool FactorFirst(int64_t size) const { return size >= missed_before; }
  bool SkipPlan(int64_t size) const { return size >= declined_before && !FactorFirst(size); }
  // BiCGSTAB missed on a system of `size` unknowns and its factors took over.
  void Missed(int64_t size) { missed = std::min(missed, static_cast<int32_t>(size)); }
};

// Whether to factor `system` by `plan` rather than iterate; records a refusal.
bool PreferFactors(const LeakySystem& system, const FactorPlan& plan, SolveContext& context) {
  const bool mind_work = !context.FactorFirst(system.size);
  if (FactorsFit(plan, system.entries(), context.budget_bytes, mind_work)) return true;
  context.declined = std::min(context.declined, system.size);
  return false;
}

class SparseSolver {
 public:
  // A = I - P_TT as triplets; `leaky` (may be null) is the same matrix as a LeakySystem,
  // which makes the factored solver available. Both must outlive the solver.
  SparseSolver(Eigen::Index size, const Triplets& triplets, const LeakySystem* leaky,
               SolveContext& context)
      : a_(size, size), leaky_(leaky), context_(context) {
    a_.setFromTriplets(triplets.begin(), triplets.end());
    a_.makeCompressed();
  }
  SparseSolver(const SparseSolver&) = delete;
  SparseSolver& operator=(const SparseSolver&) = delete;

  Vector Apply(const Vector& x) const { return a_ * x; }  // A x.
  bool reached() const { return reached_; }  // Whether the last Solve reached its target.

  // Chooses the solver (AverageSolver) and factorises if it is direct.
  Status Prepare() {
    if (a_.rows() <= EvaluateOptions().direct_max_states) {
      ++context_.counts.small_lu;
      return UseSmallLu();
    }
    if (leaky_ != nullptr && !context_.SkipPlan(leaky_->size)) {
      plan_ = PlanWithin(*leaky_, context_.budget_bytes);
      planned_ = true;
      if (PreferFactors(*leaky_, plan_, context_)) return UseFactors();
    }
    ++context_.counts.iterative;
    kind_ = AverageSolver::kIterative;
    krylov_.compute(a_);
    return Status::Ok();
  }

  // Switches this and later solves to factors if they fit the memory budget (else stays
  // iterative), planning them first if Prepare did not. No-op if already direct.
  Status UseDirect() {
    if (kind_ != AverageSolver::kIterative || leaky_ == nullptr) return Status::Ok();
    if (!planned_) {
      plan_ = PlanWithin(*leaky_, context_.budget_bytes);
      planned_ = true;
    }
    if (FactorsFit(plan_, leaky_->entries(), context_.budget_bytes, false)) return UseFactors();
    return Status::Ok();
  }

  // x = A^-1 b. The direct solvers add iterative refinement; the iterative one starts from x
  // if it has the right size (a warm start) and aims at sup-norm residual `target` (or the
  // rounding floor of x, if larger), switching to factors if it misses and they fit.
  Status Solve(const Vector& b, double target, Vector& x) {
    reached_ = true;
    if (kind_ == AverageSolver::kIterative) {
      MDP_RETURN_IF_ERROR(Krylov(b, target, x));
      if (reached_) return Status::Ok();
      // BiCGSTAB can break down or stall on strongly non-normal systems, e.g. a long chain
      // of states that each step one state on.
      MDP_RETURN_IF_ERROR(UseDirect());
      if (kind_ == AverageSolver::kIterative) return Status::Ok();  // x: its best, reported.
      context_.Missed(leaky_->size);
    }
    if (kind_ == AverageSolver::kSmallLu) {
      x = lu_.solve(b);
      x += lu_.solve(Vector(b - a_ * x));
    } else {
      x = b;
      factors_.Solve(std::span<double>(x.data(), x.size()));
      Refine(b, x);
    }
    if (!x.allFinite()) return InternalError("sparse LU produced non-finite values");
    reached_ = true;
    return Status::Ok();
  }

 private:
  Status UseSmallLu() {
    kind_ = AverageSolver::kSmallLu;
    const Eigen::SparseMatrix<double> col_major = a_;
    lu_.analyzePattern(col_major);
    lu_.factorize(col_major);
    if (lu_.info() != Eigen::Success) return InternalError("sparse LU factorisation failed");
    return Status::Ok();
  }

  Status UseFactors() {
    ++context_.counts.factored;
    const Status status =
        factors_.Factorize(*leaky_, std::move(plan_), context_.stop, context_.threads);
    if (status.code() == StatusCode::kFailedPrecondition) {
      // Transient states the chain leaves only after more steps than a double can count.
      return InternalError(status.message());
    }
    MDP_RETURN_IF_ERROR(status);
    kind_ = AverageSolver::kFactored;
    return Status::Ok();
  }

  // Iterative refinement against A's own entries (the model's probabilities), a few rounds
  // while the residual halves.
  void Refine(const Vector& b, Vector& x) const {
    double last = std::numeric_limits<double>::infinity();
    for (int round = 0; round < 4; ++round) {
      Vector residual = b - a_ * x;
      const double sup = residual.lpNorm<Eigen::Infinity>();
      if (!(sup < 0.5 * last) || sup == 0.0) return;
      last = sup;
      factors_.Solve(std::span<double>(residual.data(), residual.size()));
      x += residual;
    }
  }

  // Refinement rounds: each solves for the correction against the true residual, so drift
  // in BiCGSTAB's recursive residual cannot hide error. A round runs at most about
  // kRoundWork multiply-adds (some 0.1 s; 500 iterations at most), so that the stop check,
  // polled between rounds, is seen soon even at a million states (a 100,000-state slowly
  // mixing ring once ran minutes inside one round); rounds go on while the true residual
  // keeps shrinking. The round length depends on the system's size only, so results do not
  // depend on the machine's speed. Sets reached_.
  Status Krylov(const Vector& b, double target, Vector& x) {
    if (x.size() != b.size() || !x.allFinite()) x = Vector::Zero(b.size());
    constexpr int64_t kMaxIterations = 100000;
    constexpr double kRoundWork = 1e9;
    // Without the residual halving for this many iterations, BiCGSTAB is not getting there.
    constexpr int64_t kStallIterations = 3000;
    const double per_iteration =
        4.0 * static_cast<double>(a_.nonZeros()) + 10.0 * static_cast<double>(a_.rows());
    const int64_t chunk =
        std::clamp<int64_t>(static_cast<int64_t>(kRoundWork / per_iteration), 10, 500);
    int64_t spent = 0;
    int64_t since_halving = 0;
    double last = std::numeric_limits<double>::infinity();
    for (;;) {
      MDP_RETURN_IF_ERROR(context_.stop.Poll());
      const Vector residual = b - a_ * x;
      const double aim = std::max(target, 1e-13 * x.lpNorm<Eigen::Infinity>());
      const double sup = residual.lpNorm<Eigen::Infinity>();
      reached_ = residual.allFinite() && sup <= aim;
      if (reached_ || spent >= kMaxIterations || !residual.allFinite()) break;
      if (sup < 0.5 * last) {
        since_halving = 0;
        last = sup;
      } else if (since_halving >= kStallIterations) {
        break;
      }
      krylov_.setTolerance(std::max(1e-16, std::min(0.5, 0.5 * aim / residual.norm())));
      krylov_.setMaxIterations(std::min(chunk, kMaxIterations - spent));
      const Vector correction = krylov_.solveWithGuess(residual, Vector::Zero(b.size()));
      const int64_t done = std::max<int64_t>(1, krylov_.iterations());
      spent += done;
      since_halving += done;
      if (!correction.allFinite()) break;
      x += correction;
    }
    return Status::Ok();
  }

  RowMajorMatrix a_;
  const LeakySystem* leaky_;
  SolveContext& context_;
  AverageSolver kind_ = AverageSolver::kSmallLu;
  bool reached_ = true;
  FactorPlan plan_;
  bool planned_ = false;  // plan_ was made for leaky_.
  MMatrixLu factors_;
  Eigen::SparseLU<Eigen::SparseMatrix<double>> lu_;
  Eigen::BiCGSTAB<RowMajorMatrix, Eigen::DiagonalPreconditioner<double>> krylov_;
};

// ---------------------------------------------------------------------------------------
// Policy evaluation, one recurrent class at a time.

// Where to pin h in a class (see EvaluateClassFactored): the state most visited under the
// previous policy, by its stationary distribution where a factored solve found one; else -1.
StateId PreviousAnchor(std::span<const StateId> cls, const AverageEvaluation& previous) {
  StateId anchor = -1;
  if (previous.stationary.empty()) return anchor;
  double best = 0.0;
  for (const StateId s : cls) {
    if (previous.stationary[s] > best) {
      best = previous.stationary[s];
      anchor = s;
    }
  }
  return anchor;
}

// Failing that, for a factored solve: the state holding the most probability after
// kAnchorSteps steps of the chain from the uniform distribution, a cheap look at where the
// chain collects (a drifting chain piles up at the end it drifts to, within as many states
// as steps). Uses `local`.
constexpr int kAnchorSteps = 64;

StateId CollectingState(const Model& m, std::span<const RowId> rows, std::span<const StateId> cls,
                        std::vector<int32_t>& local) {
  for (size_t i = 0; i < cls.size(); ++i) local[cls[i]] = static_cast<int32_t>(i);
  std::vector<double> x(cls.size(), 1.0 / static_cast<double>(cls.size()));
  std::vector<double> y(cls.size());
  for (int step = 0; step < kAnchorSteps; ++step) {
    std::fill(y.begin(), y.end(), 0.0);
    for (size_t i = 0; i < cls.size(); ++i) {
      const RowId r = rows[cls[i]];
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        y[local[m.entry_next(e)]] += x[i] * m.entry_probability(e);  // A class is closed.
      }
    }
    std::swap(x, y);
  }
  return cls[std::max_element(x.begin(), x.end()) - x.begin()];
}

// Lists the states of `cls` other than `anchor` in `states`, in class order, and sets
// local[s] to each one's index there, local[anchor] = -1.
void IndexClassWithout(std::span<const StateId> cls, StateId anchor, std::vector<int32_t>& local,
                       std::vector<StateId>& states) {
  states.clear();
  for (const StateId s : cls) {
    if (s == anchor) continue;
    local[s] = static_cast<int32_t>(states.size());
    states.push_back(s);
  }
  local[anchor] = -1;
}

// I - P on the class without `anchor`: the chain's leak from a state is its probability of
// stepping to the anchor (a class is closed). Sets local[s] for the class's other states to
// their index in the system, local[anchor] = -1; `states` lists them by index.
LeakySystem ClassSystem(const Model& m, std::span<const RowId> rows, std::span<const StateId> cls,
                        StateId anchor, std::vector<int32_t>& local, std::vector<StateId>& states) {
  IndexClassWithout(cls, anchor, local, states);
  LeakySystem system;
  system.size = static_cast<int32_t>(states.size());
  system.row_begin.reserve(states.size() + 1);
  system.leak.reserve(states.size());
  for (const StateId s : states) {
    const RowId r = rows[s];
    double leak = 0.0;
    for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
      const StateId t = m.entry_next(e);
      if (t == anchor) {
        leak += m.entry_probability(e);
      } else if (t != s) {
        system.col.push_back(local[t]);
        system.weight.push_back(m.entry_probability(e));
      }
    }
    system.leak.push_back(leak);
    system.row_begin.push_back(static_cast<int64_t>(system.col.size()));
  }
  return system;
}

// The class's d(s) = r(s) + sum p h - h(s) from out.bias, into `d` (by position in cls).
void ClassResiduals(const Model& m, std::span<const RowId> rows, std::span<const StateId> cls,
                    const AverageEvaluation& out, std::vector<double>& d) {
  d.resize(cls.size());
  for (size_t i = 0; i < cls.size(); ++i) {
    const StateId s = cls[i];
    d[i] = m.row_reward(rows[s]) + RowSum(m, rows[s], out.bias.data()) - out.bias[s];
  }
}

// A class beyond the small solver's size, with factors. Pinning h at the anchor a leaves
// B = I - P without a's row and column, an M-matrix whose rows leak into a; then
//   pi_a = 1 / (1 + sum w), pi_-a = w pi_a for w = B^-T p(a, .)  (the stationary
//   distribution: pi_-a B = pi_a p(a, .) is pi (I - P) = 0 off column a),
//   g = pi r,   B h_-a = r_-a - g.
// w >= 0 comes out accurate entry by entry (internal/mmatrix_lu.h), and so does g, a sum of
// bounded terms with accurate weights. Refinement rounds re-solve for the residual
// d - g, d = r + P h - h. h differs from the true bias by about the rounding times the
// expected time to reach a (the norm of B^-1), so a is best placed where the chain spends
// its time: a class whose rounds miss the target is solved once more at its most visited
// state.
// A chain may also stay in a part of the class for so long that the leak out of it
// underflows (a drifting walk on a ring of a million states did, at 1e-308 per step); the
// factorisation then stops at a state of that part, which becomes the anchor. `system` and
// `plan` were made by ClassSystem and PlanWithin at system_anchor, and are made again when
// `anchor` differs. Fills the class's bias (a at 0), stationary and class_gain.
Status EvaluateClassFactored(const Model& m, std::span<const RowId> rows,
                             std::span<const StateId> cls, StateId system_anchor, StateId anchor,
                             LeakySystem system, FactorPlan plan, double target,
                             SolveContext& context, std::vector<int32_t>& local,
                             AverageEvaluation& out, double& class_gain) {
  constexpr int kMaxAttempts = 4;
  std::vector<StateId> states;
  std::vector<double> d;
  bool solved = false;  // A solution is in `out` (at an earlier anchor).
  bool moved_for_accuracy = false;
  struct {
    double error = kInf;
    double gain = 0.0;
    std::vector<double> bias;
    std::vector<double> stationary;
  } first;  // The solution at the first anchor, while trying a better-visited one.
  for (int attempt = 0;; ++attempt) {
    if (attempt > 0 || anchor != system_anchor) {
      system = ClassSystem(m, rows, cls, anchor, local, states);
      plan = PlanWithin(system, context.budget_bytes);
      if (!FactorsFit(plan, system.entries(), context.budget_bytes, false)) {
        return solved ? Status::Ok()
                      : InternalError("policy evaluation: sparse factors do not fit the budget");
      }
      if (attempt > 0) ++context.counts.reanchored;
    } else {  // `system` was built by ClassSystem in class order; `local` may since differ.
      IndexClassWithout(cls, anchor, local, states);
    }
    MMatrixLu factors;
    ++context.counts.factored;
    const Status factored =
        factors.Factorize(system, std::move(plan), context.stop, context.threads);
    if (factored.code() == StatusCode::kFailedPrecondition) {
      if (solved) return Status::Ok();
      if (attempt + 1 >= kMaxAttempts) return InternalError(factored.message());
      anchor = states[factors.singular_at()];
      continue;
    }
    MDP_RETURN_IF_ERROR(factored);
    const size_t size = states.size();
    std::vector<double> x(size, 0.0);
    const RowId anchor_row = rows[anchor];
    for (int64_t e = m.entry_begin(anchor_row); e < m.entry_end(anchor_row); ++e) {
      if (m.entry_next(e) != anchor) x[local[m.entry_next(e)]] += m.entry_probability(e);
    }
    factors.SolveTransposed(x);
    double total = 1.0;
    for (const double w : x) total += w;
    if (!std::isfinite(total)) {
      // The same underflow seen from the other side: states visited over 1e308 times as
      // often as the anchor. Move the anchor to the first of them.
      if (solved) return Status::Ok();
      if (attempt + 1 >= kMaxAttempts) {
        return InternalError("policy evaluation: a stationary distribution overflowed");
      }
      size_t heavy = 0;
      while (heavy + 1 < size && std::isfinite(x[heavy])) ++heavy;
      anchor = states[heavy];
      continue;
    }
    out.stationary[anchor] = 1.0 / total;
    for (size_t i = 0; i < size; ++i) out.stationary[states[i]] = x[i] / total;
    // g = pi r: a sum of bounded terms with accurate weights, whatever the size of h.
    double gain = out.stationary[anchor] * m.row_reward(anchor_row);
    for (const StateId s : states) gain += out.stationary[s] * m.row_reward(rows[s]);
    for (size_t i = 0; i < size; ++i) x[i] = m.row_reward(rows[states[i]]) - gain;
    factors.Solve(x);
    out.bias[anchor] = 0.0;
    for (size_t i = 0; i < size; ++i) out.bias[states[i]] = x[i];
    // Refinement of h for the residual d - g, keeping the best h seen (a round that makes
    // things worse is undone). With exact solves one round gives d = g everywhere: off the
    // anchor by construction, and at the anchor because pi (d - g) = pi (P - I) h = 0.
    double error = kInf;
    std::vector<double> kept(size);
    for (int round = 0; round < 6; ++round) {
      ClassResiduals(m, rows, cls, out, d);
      double next_error = 0.0;
      for (const double v : d) next_error = std::max(next_error, std::fabs(v - gain));
      if (!(next_error < error)) {
        if (round > 0) {
          for (size_t i = 0; i < size; ++i) out.bias[states[i]] = kept[i];
        }
        break;
      }
      const bool enough = next_error <= target || next_error > 0.5 * error;
      error = next_error;
      if (enough) break;
      for (size_t i = 0; i < size; ++i) kept[i] = out.bias[states[i]];
      for (size_t i = 0; i < cls.size(); ++i) {
        if (cls[i] != anchor) x[local[cls[i]]] = d[i] - gain;
      }
      factors.Solve(x);
      for (size_t i = 0; i < size; ++i) out.bias[states[i]] += x[i];
    }
    if (moved_for_accuracy && !(error < first.error)) {  // The first anchor did better.
      for (size_t i = 0; i < cls.size(); ++i) {
        out.bias[cls[i]] = first.bias[i];
        out.stationary[cls[i]] = first.stationary[i];
      }
      class_gain = first.gain;
      return Status::Ok();
    }
    solved = true;
    class_gain = gain;
    if (error <= target || moved_for_accuracy || attempt + 1 >= kMaxAttempts) {
      return Status::Ok();
    }
    StateId most = anchor;
    for (const StateId s : cls) {
      if (out.stationary[s] > out.stationary[most]) most = s;
    }
    if (most == anchor || out.stationary[anchor] >= 0.5 * out.stationary[most]) {
      return Status::Ok();
    }
    first.error = error;
    first.gain = gain;
    first.bias.resize(cls.size());
    first.stationary.resize(cls.size());
    for (size_t i = 0; i < cls.size(); ++i) {
      first.bias[i] = out.bias[cls[i]];
      first.stationary[i] = out.stationary[cls[i]];
    }
    anchor = most;
    moved_for_accuracy = true;
  }
}

// On a recurrent class C with anchor a (ChooseAnchor): g + h(s) - sum_{s' in C} p h(s') =
// r(s) for s in C and h(a) = 0. Unknown 0 is g (h(a) is known), unknown i > 0 is
// h(members[i]); the matrix is nonsingular because the class is irreducible. Solved by
// Eigen's LU when small, else by EvaluateClassFactored when its factors fit the budget,
// else by BiCGSTAB (then by factors if it misses and they fit the memory budget). The bias
// is then shifted to 0 at the class's smallest state. `previous` (may be empty) is the last
// policy's evaluation: a warm start and the anchor.
Status EvaluateClass(const Model& m, std::span<const RowId> rows, std::span<const StateId> cls,
                     double target, const AverageEvaluation& previous, SolveContext& context,
                     std::vector<int32_t>& local, AverageEvaluation& out, double& class_gain) {
  if (cls.size() == 1) {  // An absorbing state: it earns its own reward for ever.
    const StateId s = cls[0];
    class_gain = rows[s] < 0 ? 0.0 : m.row_reward(rows[s]);
    out.bias[s] = 0.0;
    return Status::Ok();
  }
  const Eigen::Index size = static_cast<Eigen::Index>(cls.size());
  const bool small = size <= EvaluateOptions().direct_max_states;
  const StateId previous_anchor = small ? -1 : PreviousAnchor(cls, previous);
  const StateId anchor = previous_anchor >= 0 ? previous_anchor : cls[0];
  bool solved = false;
  LeakySystem system;
  FactorPlan plan;
  bool planned = false;
  if (!small && !context.SkipPlan(size - 1)) {
    std::vector<StateId> states;
    system = ClassSystem(m, rows, cls, anchor, local, states);
    plan = PlanWithin(system, context.budget_bytes);  // The fill hardly depends on the anchor.
    planned = true;
    if (PreferFactors(system, plan, context)) {
      const StateId start =
          previous_anchor >= 0 ? previous_anchor : CollectingState(m, rows, cls, local);
      MDP_RETURN_IF_ERROR(EvaluateClassFactored(m, rows, cls, anchor, start, std::move(system),
                                                std::move(plan), target, context, local, out,
                                                class_gain));
      solved = true;
    }
  }
  if (!solved) {
    std::vector<StateId> members(cls.begin(), cls.end());
    std::swap(members[0], *std::find(members.begin(), members.end(), anchor));
    for (Eigen::Index i = 0; i < size; ++i) local[members[i]] = static_cast<int32_t>(i);
    Triplets triplets;
    Vector b(size);
    for (Eigen::Index i = 0; i < size; ++i) {
      const RowId r = rows[members[i]];
      triplets.emplace_back(i, 0, 1.0);
      if (i > 0) triplets.emplace_back(i, i, 1.0);
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        const int32_t j = local[m.entry_next(e)];
        if (j > 0) triplets.emplace_back(i, j, -m.entry_probability(e));
      }
      b[i] = m.row_reward(r);
    }
    SparseSolver solver(size, triplets, nullptr, context);
    MDP_RETURN_IF_ERROR(solver.Prepare());
    Vector y;
    if (!previous.bias.empty()) {
      y.resize(size);
      y[0] = previous.gain[anchor];
      for (Eigen::Index i = 1; i < size; ++i) {
        y[i] = previous.bias[members[i]] - previous.bias[anchor];
      }
    }
    MDP_RETURN_IF_ERROR(solver.Solve(b, target, y));
    const bool missed = !solver.reached() && !small;
    if (missed && !planned) {  // Planning was skipped (SolveContext::SkipPlan): plan now.
      std::vector<StateId> states;
      system = ClassSystem(m, rows, cls, anchor, local, states);
      plan = PlanWithin(system, context.budget_bytes);
    }
    if (missed && FactorsFit(plan, system.entries(), context.budget_bytes, false)) {
      context.Missed(size - 1);
      MDP_RETURN_IF_ERROR(EvaluateClassFactored(m, rows, cls, anchor, anchor, std::move(system),
                                                std::move(plan), target, context, local, out,
                                                class_gain));
    } else {
      class_gain = y[0];
      out.bias[anchor] = 0.0;
      for (Eigen::Index i = 1; i < size; ++i) out.bias[members[i]] = y[i];
    }
  }
  const double shift = out.bias[cls[0]];
  for (const StateId s : cls) out.bias[s] -= shift;
  // The class's true gain is pi_C d, d = r + P h - h, for its stationary distribution pi_C,
  // so it is within max |d - g| of the computed g.
  for (const StateId s : cls) {
    const double d =
        m.row_reward(rows[s]) + RowSum(m, rows[s], out.bias.data()) - out.bias[s];
    const double error = std::fabs(d - class_gain);
    if (!(error <= out.gain_error)) out.gain_error = error;  // NaN propagates.
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
Status SolveTransientGain(SparseSolver& solver, const Vector& b, double target, Vector& g_t,
                          double& gain_error) {
  const Eigen::Index size = b.size();
  Vector tau;
  MDP_RETURN_IF_ERROR(solver.Solve(Vector::Ones(size), 0.25, tau));
  const double sigma = solver.Apply(tau).minCoeff();
  const double max_time = sigma > 0.0 ? tau.maxCoeff() / sigma : kInf;
  const double wanted = target / std::max(1.0, max_time);
  if (wanted < 1e-13 * std::max(1.0, b.lpNorm<Eigen::Infinity>())) {
    MDP_RETURN_IF_ERROR(solver.UseDirect());
  }
  MDP_RETURN_IF_ERROR(solver.Solve(b, wanted, g_t));
  const double residual = (solver.Apply(g_t) - b).lpNorm<Eigen::Infinity>();
  gain_error = max_time == kInf ? kInf : gain_error + residual * max_time;
  return Status::Ok();
}

// Transient states T: (I - P_TT) g_T = P_TR g_R, then
// (I - P_TT) h_T = r_T - g_T + P_TR h_R; I - P_TT is nonsingular because the chain leaves T.
// It is an M-matrix whose rows leak into the classes, so it may be factored (SparseSolver).
Status EvaluateTransient(const Model& m, std::span<const RowId> rows, double target,
                         const AverageEvaluation& previous, SolveContext& context,
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
  LeakySystem leaky;
  leaky.size = static_cast<int32_t>(size);
  Vector to_classes_gain = Vector::Zero(size);
  Vector to_classes_bias = Vector::Zero(size);
  for (Eigen::Index i = 0; i < size; ++i) {
    const RowId r = rows[transient[i]];  // Terminal states are classes, so r >= 0.
    triplets.emplace_back(i, i, 1.0);
    double leak = 0.0;
    for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
      const StateId t = m.entry_next(e);
      const double p = m.entry_probability(e);
      if (out.chain.class_of[t] < 0) {
        triplets.emplace_back(i, local[t], -p);
        if (local[t] != i) {
          leaky.col.push_back(local[t]);
          leaky.weight.push_back(p);
        }
      } else {
        to_classes_gain[i] += p * out.gain[t];
        to_classes_bias[i] += p * out.bias[t];
        leak += p;
      }
    }
    leaky.leak.push_back(leak);
    leaky.row_begin.push_back(static_cast<int64_t>(leaky.col.size()));
  }
  SparseSolver solver(size, triplets, &leaky, context);
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
    MDP_RETURN_IF_ERROR(SolveTransientGain(solver, to_classes_gain, target, g_t, out.gain_error));
  }
  Vector b(size);
  for (Eigen::Index i = 0; i < size; ++i) {
    b[i] = m.row_reward(rows[transient[i]]) - g_t[i] + to_classes_bias[i];
  }
  MDP_RETURN_IF_ERROR(solver.Solve(b, target, h_t));
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

bool FactorsFit(const FactorPlan& plan, int64_t entries, double budget_bytes, bool mind_work) {
  if (!plan.complete || plan.bytes() > budget_bytes) return false;
  return !mind_work || plan.multiply_adds <=
                           kFactorWorkFloor + kFactorWorkPerEntry * static_cast<double>(entries);
}

double FactorBudgetBytes(const Model& m) {
  constexpr double kFloor = 512.0 * 1024 * 1024;
  const double transitions =
      static_cast<double>(m.num_entries()) * (sizeof(StateId) + sizeof(double));
  return std::max(kFloor, 4.0 * transitions);
}

// Each class first (its gain and bias do not depend on the rest of the chain), then the
// transient states, which see the classes only through the entries that lead into them.
Status EvaluateAverage(const Model& m, std::span<const RowId> rows, double target,
                       const StopCheck& stop, const AverageEvaluation& previous,
                       AverageEvaluation& out, AverageSolveCounts* counts, int threads) {
  const StateId n = m.num_states();
  MDP_RETURN_IF_ERROR(stop.Poll());
  SolveContext context;
  context.stop = stop;
  context.budget_bytes = FactorBudgetBytes(m);
  context.threads = std::max(1, threads);
  if (!previous.gain.empty()) {
    context.declined_before = previous.declined_factor_size;
    context.missed_before = previous.missed_iterative_size;
  }
  out.chain = AnalyseChain(m, rows);
  out.class_gain.assign(out.chain.classes.size(), 0.0);
  out.gain.assign(n, 0.0);
  out.bias.assign(n, 0.0);
  out.stationary.assign(n, 0.0);
  out.gain_error = 0.0;
  std::vector<int32_t> local(n, -1);
  Status status = Status::Ok();
  for (size_t k = 0; k < out.chain.classes.size() && status.ok(); ++k) {
    status = EvaluateClass(m, rows, out.chain.classes[k], target, previous, context, local, out,
                           out.class_gain[k]);
    for (StateId s : out.chain.classes[k]) out.gain[s] = out.class_gain[k];
  }
  if (status.ok()) status = EvaluateTransient(m, rows, target, previous, context, local, out);
  if (counts != nullptr) *counts = context.counts;
  out.declined_factor_size = std::min(context.declined, context.declined_before);
  out.missed_iterative_size = std::min(context.missed, context.missed_before);
  MDP_RETURN_IF_ERROR(status);
  // Every bound built on this evaluation takes minima and maxima over its values, which a
  // NaN would silently drop out of.
  for (StateId s = 0; s < n; ++s) {
    if (!std::isfinite(out.gain[s]) || !std::isfinite(out.bias[s])) {
      return InternalError("policy evaluation produced non-finite values");
    }
  }
  return Status::Ok();
}

}  // namespace mdp::internal
