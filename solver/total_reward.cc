#include "solver/total_reward.h"

#include <Eigen/IterativeLinearSolvers>
#include <Eigen/SparseCore>
#include <Eigen/SparseLU>
#include <algorithm>
#include <cmath>
#include <functional>
#include <iterator>
#include <limits>
#include <new>
#include <optional>
#include <span>
#include <sstream>
#include <string>
#include <utility>

#include "solver/average_reward.h"
#include "solver/internal/average_chains.h"
#include "solver/internal/bellman.h"
#include "solver/internal/run_control.h"
#include "solver/internal/total_policy.h"

namespace mdp {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
constexpr double kInf = std::numeric_limits<double>::infinity();
constexpr int64_t kDirectMaxStates = 3000;  // kAuto: sparse LU up to here (as evaluate.h).
constexpr double kUnitRoundoff = 1.2e-16;   // 2^-53, rounded up.

std::string Number(double x) {
  std::ostringstream out;
  out.precision(10);
  out << x;
  return out.str();
}

// Worst-case rounding error of a sum of `terms` products of magnitude at most `magnitude`
// (the gamma_k bound: Higham 2002, Accuracy and Stability of Numerical Algorithms, ch. 3,
// from memory), so computed residuals can be turned into bounds on the exact ones.
double RoundingAllowance(int64_t terms, double magnitude) {
  return static_cast<double>(terms + 2) * kUnitRoundoff * magnitude;
}

// r(s, a) + sum_s' p(s' | s, a) v(s'), undiscounted.
inline double RowValue(const Model& m, RowId r, const double* v) {
  return m.row_reward(r) + internal::RowSum(m, r, v);
}

// ---------------------------------------------------------------------------------------
// The model read backwards: for each state the rows with an entry into it (BuildModel
// merges duplicate next states, so each row appears once per state), and each row's state.

struct Graph {
  explicit Graph(const Model& m) {
    const StateId n = m.num_states();
    pred_begin.assign(static_cast<size_t>(n) + 1, 0);
    for (int64_t e = 0; e < m.num_entries(); ++e) ++pred_begin[m.entry_next(e) + 1];
    for (StateId s = 0; s < n; ++s) pred_begin[s + 1] += pred_begin[s];
    pred_rows.resize(m.num_entries());
    row_state.resize(m.num_rows());
    std::vector<int64_t> fill(pred_begin.begin(), pred_begin.end() - 1);
    for (StateId s = 0; s < n; ++s) {
      for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
        row_state[r] = s;
        for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
          pred_rows[fill[m.entry_next(e)]++] = r;
        }
      }
    }
  }
  std::vector<int64_t> pred_begin;  // Size states + 1.
  std::vector<RowId> pred_rows;
  std::vector<StateId> row_state;
};

// Marks the goals and queues them: the start of every backward search.
void StartAtGoals(const Model& m, std::vector<StateId>& queue, std::vector<uint8_t>& marked) {
  marked.assign(m.num_states(), 0);
  queue.clear();
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (m.terminal(s)) {
      marked[s] = 1;
      queue.push_back(s);
    }
  }
}

// Breadth-first search backwards from the marked states in `queue`: an unmarked state u is
// added when one of its rows r with admit(r) has an entry into a marked state; on_add(u, r)
// runs just before u is marked. Iterative; O(entries).
template <typename Admit, typename OnAdd>
void SearchBackwards(const Graph& g, std::vector<StateId>& queue, std::vector<uint8_t>& marked,
                     Admit admit, OnAdd on_add) {
  for (size_t head = 0; head < queue.size(); ++head) {
    const StateId t = queue[head];
    for (int64_t k = g.pred_begin[t]; k < g.pred_begin[t + 1]; ++k) {
      const RowId r = g.pred_rows[k];
      const StateId u = g.row_state[r];
      if (marked[u] || !admit(r)) continue;
      on_add(u, r);
      marked[u] = 1;
      queue.push_back(u);
    }
  }
}

// ---------------------------------------------------------------------------------------
// Step 1: the goal-reaching set A, the safe rows and the attractor policy. Each round is
// O(entries); a round that changes nothing ends the loop, and its search is the attractor.

struct Reach {
  std::vector<uint8_t> in_a;     // Per state.
  std::vector<uint8_t> safe;     // Per row.
  std::vector<RowId> attractor;  // Per state: a safe row stepping closer to a goal, or -1.
};

Reach AlmostSureReach(const Model& m, const Graph& g) {
  const StateId n = m.num_states();
  Reach out;
  out.in_a.assign(n, 1);
  out.safe.assign(m.num_rows(), 1);
  std::vector<uint8_t> marked;
  std::vector<StateId> queue;
  for (;;) {
    out.attractor.assign(n, -1);
    StartAtGoals(m, queue, marked);
    // Among the safe rows entering settled states, take the one most likely to do so (the
    // first on ties): any of them is proper, this one tends to need fewer steps, and so
    // gives a better-conditioned first evaluation.
    SearchBackwards(
        g, queue, marked, [&](RowId r) { return out.safe[r] != 0; },
        [&](StateId u, RowId) {
          double most = 0.0;
          for (RowId r = m.row_begin(u); r < m.row_end(u); ++r) {
            if (!out.safe[r]) continue;
            double mass = 0.0;
            for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
              if (marked[m.entry_next(e)]) mass += m.entry_probability(e);
            }
            if (mass > most) {
              most = mass;
              out.attractor[u] = r;
            }
          }
        });
    bool shrunk = false;
    for (StateId s = 0; s < n; ++s) {
      if (!out.in_a[s] || marked[s]) continue;
      shrunk = true;
      out.in_a[s] = 0;
      for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) out.safe[r] = 0;
      for (int64_t k = g.pred_begin[s]; k < g.pred_begin[s + 1]; ++k) out.safe[g.pred_rows[k]] = 0;
    }
    if (!shrunk) return out;
  }
}

// ---------------------------------------------------------------------------------------
// Step 2: maximal end components of A minus the goals under the safe rows that stay there.

// Tarjan's algorithm with an explicit stack over `roots` and the entries of their kept rows,
// which must lead only to states in `roots`. Numbers components from `next`; returns the
// next free number.
int32_t StronglyConnected(const Model& m, std::span<const StateId> roots,
                          const std::vector<uint8_t>& kept, std::vector<int32_t>& index,
                          std::vector<int32_t>& low, std::vector<int32_t>& comp, int32_t next) {
  struct Frame {
    StateId s;
    RowId r;
    int64_t e;
  };
  for (StateId s : roots) index[s] = comp[s] = -1;
  std::vector<Frame> frames;
  std::vector<StateId> stack;
  int32_t counter = 0;
  auto open = [&](StateId s) {
    index[s] = low[s] = counter++;
    stack.push_back(s);
    frames.push_back(Frame{s, m.row_begin(s), m.entry_begin(m.row_begin(s))});
  };
  for (StateId root : roots) {
    if (index[root] >= 0) continue;
    open(root);
    while (!frames.empty()) {
      Frame& f = frames.back();
      while (f.r < m.row_end(f.s) && (!kept[f.r] || f.e >= m.entry_end(f.r))) {
        ++f.r;
        f.e = m.entry_begin(f.r);  // Valid for r == num_rows too.
      }
      if (f.r < m.row_end(f.s)) {
        const StateId t = m.entry_next(f.e++);
        if (index[t] < 0) {
          open(t);  // Invalidates f.
        } else if (comp[t] < 0) {
          low[f.s] = std::min(low[f.s], index[t]);
        }
        continue;
      }
      const StateId s = f.s;
      frames.pop_back();
      if (!frames.empty()) low[frames.back().s] = std::min(low[frames.back().s], low[s]);
      if (low[s] != index[s]) continue;
      StateId t;
      do {
        t = stack.back();
        stack.pop_back();
        comp[t] = next;
      } while (t != s);
      ++next;
    }
  }
  return next;
}

struct EndComponents {
  std::vector<uint8_t> kept;       // Per row: the row stays inside its state's component.
  std::vector<int32_t> component;  // Per state: 0..count-1, or -1 if in none.
  int32_t count = 0;
};

// Refinement: split into strongly connected components, drop rows that leave their
// component, drop states left without rows (and rows into them), and split again only the
// components that changed, until nothing changes. What remains are the maximal end
// components (common practice).
EndComponents FindEndComponents(const Model& m, const Graph& g, const Reach& reach) {
  const StateId n = m.num_states();
  EndComponents out;
  std::vector<uint8_t> active(n);
  for (StateId s = 0; s < n; ++s) active[s] = reach.in_a[s] && !m.terminal(s);
  out.kept.assign(m.num_rows(), 0);
  std::vector<int32_t> kept_count(n, 0);
  std::vector<StateId> removal;
  for (StateId s = 0; s < n; ++s) {
    if (!active[s]) continue;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      bool stays = reach.safe[r] != 0;
      for (int64_t e = m.entry_begin(r); stays && e < m.entry_end(r); ++e) {
        stays = active[m.entry_next(e)] != 0;
      }
      out.kept[r] = stays;
      kept_count[s] += stays;
    }
    if (kept_count[s] == 0) removal.push_back(s);
  }
  auto remove = [&](auto&& touch) {  // Removes the queued states, cascading.
    while (!removal.empty()) {
      const StateId s = removal.back();
      removal.pop_back();
      active[s] = 0;
      touch(s);
      for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) out.kept[r] = 0;
      for (int64_t k = g.pred_begin[s]; k < g.pred_begin[s + 1]; ++k) {
        const RowId r = g.pred_rows[k];
        if (!out.kept[r]) continue;
        out.kept[r] = 0;
        const StateId u = g.row_state[r];
        touch(u);
        if (--kept_count[u] == 0) removal.push_back(u);
      }
    }
  };
  remove([](StateId) {});
  std::vector<StateId> work;
  for (StateId s = 0; s < n; ++s) {
    if (active[s]) work.push_back(s);
  }
  std::vector<int32_t> index(n, -1), low(n, 0), comp(n, -1);
  std::vector<uint8_t> dirty;
  int32_t next = 0;
  while (!work.empty()) {
    const int32_t first = next;
    next = StronglyConnected(m, work, out.kept, index, low, comp, next);
    dirty.assign(next - first, 0);
    for (StateId s : work) {
      for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
        if (!out.kept[r]) continue;
        for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
          if (comp[m.entry_next(e)] == comp[s]) continue;
          out.kept[r] = 0;
          dirty[comp[s] - first] = 1;
          if (--kept_count[s] == 0) removal.push_back(s);
          break;
        }
      }
    }
    remove([&](StateId u) { dirty[comp[u] - first] = 1; });
    std::vector<StateId> again;
    for (StateId s : work) {
      if (active[s] && dirty[comp[s] - first]) again.push_back(s);
    }
    work.swap(again);
  }
  out.component.assign(n, -1);
  std::vector<int32_t> renumber(next, -1);
  for (StateId s = 0; s < n; ++s) {
    if (!active[s]) continue;
    if (renumber[comp[s]] < 0) renumber[comp[s]] = out.count++;
    out.component[s] = renumber[comp[s]];
  }
  return out;
}

// The end component `states` as a model of its own: its states with only the kept rows.
Result<Model> ComponentModel(const Model& m, const EndComponents& ec,
                             std::span<const StateId> states, std::vector<int32_t>& local) {
  ModelSpec spec;
  spec.name = "end component";
  spec.objective = m.objective();
  for (ActionId a = 0; a < m.num_actions(); ++a) spec.action_names.push_back(m.action_name(a));
  for (size_t i = 0; i < states.size(); ++i) local[states[i]] = static_cast<int32_t>(i);
  for (StateId s : states) {
    spec.AddState(m.state_name(s));
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      if (!ec.kept[r]) continue;
      spec.AddStateAction(m.row_action(r), m.row_reward(r));
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        spec.AddOutcome(local[m.entry_next(e)], m.entry_probability(e), 0.0);
      }
    }
  }
  return BuildModel(spec);
}

std::string LoopMessage(const Model& sub, const AverageRewardSolution& avg) {
  const bool maximize = sub.objective() == Objective::kMaximize;
  std::vector<StateId> loop;
  if (!avg.recurrent_classes.empty()) loop = avg.recurrent_classes.front();
  for (StateId s = 0; loop.empty() && s < sub.num_states(); ++s) loop.push_back(s);
  constexpr size_t kShown = 10;
  std::string states = "{";
  for (size_t i = 0; i < loop.size() && i < kShown; ++i) {
    if (i > 0) states += ", ";
    states += "\"" + sub.state_name(loop[i]) + "\": \"" +
              sub.row_action_name(avg.best_row[loop[i]]) + "\"";
  }
  if (loop.size() > kShown) states += " and " + std::to_string(loop.size() - kShown) + " more";
  states += "}";
  const std::string gain = Number(avg.gain);
  const std::string size = Number(std::fabs(avg.gain));
  if (maximize) {
    return "the total reward is unbounded above: in the loop " + states +
           " (state: action) a policy can stay for ever, earning " + gain +
           " per step, so going round k more times before heading for a goal earns about " + size +
           " k more, without limit. Give the steps of this loop a negative reward (a "
           "cost), or use the discounted criterion, to make the problem well posed.";
  }
  return "the total cost is unbounded below: in the loop " + states +
         " (state: action) a policy can stay for ever at a cost of " + gain +
         " per step, so going round k more times before heading for a goal costs about " + size +
         " k less, without limit. Give the steps of this loop a positive cost, or use the "
         "discounted criterion, to make the problem well posed.";
}

// Returns OK iff no end component lets a policy earn better than eps per step (header,
// step 2). Only components with a row better than eps need the average-reward solve: the
// gain of any policy staying inside is an average of its rows' rewards.
Status CheckEndComponents(const Model& m, const EndComponents& ec, double eps,
                          const TotalRewardOptions& options, internal::RunControl& control,
                          const CancelToken* cancel) {
  const double sign = m.objective() == Objective::kMaximize ? 1.0 : -1.0;
  std::vector<int32_t> slot(ec.count, -1);
  std::vector<std::vector<StateId>> suspects;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (ec.component[s] < 0) continue;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      if (ec.kept[r] && sign * m.row_reward(r) > eps && slot[ec.component[s]] < 0) {
        slot[ec.component[s]] = static_cast<int32_t>(suspects.size());
        suspects.emplace_back();
      }
    }
  }
  if (suspects.empty()) return Status::Ok();
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (ec.component[s] >= 0 && slot[ec.component[s]] >= 0) {
      suspects[slot[ec.component[s]]].push_back(s);
    }
  }
  std::vector<int32_t> local(m.num_states(), -1);
  for (const std::vector<StateId>& states : suspects) {
    Result<Model> sub = ComponentModel(m, ec, states, local);
    if (!sub.ok()) return InternalError("end component check: " + sub.status().message());
    AverageRewardOptions ao;
    ao.tolerance = std::clamp(0.1 * eps, 1e-14, 1e6);
    ao.max_iterations = options.max_iterations;
    if (options.time_limit_seconds > 0) {
      ao.time_limit_seconds =
          std::max(1e-6, options.time_limit_seconds - control.elapsed_seconds());
    }
    ao.threads = options.threads;
    Result<AverageRewardSolution> avg = AverageRewardPolicyIteration(*sub, ao, nullptr, cancel);
    if (!avg.ok()) return InternalError("end component check: " + avg.status().message());
    // [gain_lower, gain_upper] holds the component's optimal gain (average_reward.h); once
    // converged its width is at most eps / 10 and the midpoint decides.
    const bool converged = avg->outcome == SolveOutcome::kConverged;
    const double surely = sign > 0 ? avg->gain_lower : -avg->gain_upper;
    const double at_most = sign > 0 ? avg->gain_upper : -avg->gain_lower;
    if (surely > eps || (converged && sign * avg->gain > eps)) {
      return FailedPreconditionError(LoopMessage(*sub, *avg));
    }
    if (at_most <= eps || converged) continue;
    const std::string what = "the sign of the gain of a loop was still undecided";
    if (avg->outcome == SolveOutcome::kCancelled) {
      return Status(StatusCode::kCancelled, "cancelled while " + what);
    }
    if (avg->outcome == SolveOutcome::kTimeLimit) {
      return Status(StatusCode::kDeadlineExceeded, "time limit passed while " + what);
    }
    return InternalError("end component check: " + what + " when its solve stopped");
  }
  return Status::Ok();
}

// ---------------------------------------------------------------------------------------
// Step 4: exact evaluation of proper policies.

using Vector = Eigen::VectorXd;
using RowMajorMatrix = Eigen::SparseMatrix<double, Eigen::RowMajor>;

// The non-goal states of A, numbered 0..size-1 in state order.
struct Index {
  std::vector<StateId> states;
  std::vector<int32_t> local;  // Per state; -1 for goals and states outside A.
};

// A = I - P_mu on the non-goal states of A, for a proper policy mu (so A is a nonsingular
// M-matrix), with the solves policy iteration needs.
class PolicySystem {
 public:
  PolicySystem(const Model& m, const Index& index, const std::vector<RowId>& rows,
               LinearSolver kind)
      : a_(static_cast<Eigen::Index>(index.states.size()),
           static_cast<Eigen::Index>(index.states.size())),
        rewards_(static_cast<Eigen::Index>(index.states.size())) {
    const Eigen::Index size = a_.rows();
    std::vector<Eigen::Triplet<double>> triplets;
    for (Eigen::Index i = 0; i < size; ++i) {
      const RowId r = rows[index.states[i]];
      triplets.emplace_back(i, i, 1.0);
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        const int32_t j = index.local[m.entry_next(e)];
        if (j >= 0) triplets.emplace_back(i, j, -m.entry_probability(e));  // Goals: V = 0.
      }
      rewards_[i] = m.row_reward(r);
      terms_ = std::max<int64_t>(terms_, m.entry_end(r) - m.entry_begin(r) + 1);
    }
    a_.setFromTriplets(triplets.begin(), triplets.end());
    a_.makeCompressed();
    kind_ = kind != LinearSolver::kAuto ? kind
            : size <= kDirectMaxStates  ? LinearSolver::kDirect
                                        : LinearSolver::kBiCgStab;
  }
  PolicySystem(const PolicySystem&) = delete;
  PolicySystem& operator=(const PolicySystem&) = delete;

  const Vector& rewards() const { return rewards_; }

  // Solves A x = b from x (a warm start if it has the right size), aiming at a residual of
  // `target` or the rounding floor. Returns a bound on the exact sup|A x - b|.
  Result<double> Solve(const Vector& b, double target, const CancelToken* cancel, Vector& x) {
    if (x.size() != b.size() || !x.allFinite()) x = Vector::Zero(b.size());
    if (b.size() == 0) return 0.0;
    if (kind_ == LinearSolver::kSweeps) {
      MDP_RETURN_IF_ERROR(GaussSeidel(b, target, cancel, x));
      return Residual(b, x);
    }
    if (kind_ == LinearSolver::kBiCgStab) {
      bool reached = false;
      MDP_RETURN_IF_ERROR(Krylov(b, target, cancel, x, reached));
      if (reached) return Residual(b, x);
      // BiCGSTAB can break down or stall on strongly non-normal systems (long chains):
      // fall back to LU for this and later solves, unless it stalled near the rounding
      // floor (the residual, reported honestly, then costs little in the bound).
      const double residual = (a_ * x - b).lpNorm<Eigen::Infinity>();
      if (std::isfinite(residual) && residual <= 100.0 * Aim(b, x, target)) {
        return residual + Rounding(b, x);
      }
      kind_ = LinearSolver::kDirect;
    }
    if (!factorized_) {
      const Eigen::SparseMatrix<double> col_major = a_;
      lu_.analyzePattern(col_major);
      lu_.factorize(col_major);
      if (lu_.info() != Eigen::Success) return InternalError("sparse LU factorisation failed");
      factorized_ = true;
    }
    x = lu_.solve(b);
    x += lu_.solve(Vector(b - a_ * x));  // One step of iterative refinement.
    if (!x.allFinite()) return InternalError("sparse LU produced non-finite values");
    return Residual(b, x);
  }

 private:
  // The target, or a few times the rounding floor of a computed residual if larger.
  double Aim(const Vector& b, const Vector& x, double target) const {
    return std::max(target, 4.0 * Rounding(b, x));
  }
  double Rounding(const Vector& b, const Vector& x) const {
    return RoundingAllowance(terms_,
                             2.0 * x.lpNorm<Eigen::Infinity>() + b.lpNorm<Eigen::Infinity>());
  }

  // The computed sup residual plus the rounding it may hide.
  double Residual(const Vector& b, const Vector& x) const {
    if (b.size() == 0) return 0.0;
    return (a_ * x - b).lpNorm<Eigen::Infinity>() + Rounding(b, x);
  }

  // Refinement rounds: each solves for the correction against the true residual, so drift
  // in BiCGSTAB's recursive residual cannot hide error, and a round that broke down (seen on
  // the first solve of a 40k-state grid, from a zero start) restarts from the current iterate
  // with a fresh shadow residual. Eigen's tolerance is relative (2-norm); below ~1e-10 per
  // round it can stall in rounding, so deeper accuracy comes from later rounds.
  Status Krylov(const Vector& b, double target, const CancelToken* cancel, Vector& x,
                bool& reached) {
    if (!krylov_ready_) {
      krylov_.compute(a_);
      krylov_ready_ = true;
    }
    constexpr int kRounds = 8;
    constexpr int64_t kRoundIterations = 2000;
    for (int round = 0;; ++round) {
      if (cancel != nullptr && cancel->cancelled()) {
        return Status(StatusCode::kCancelled, "cancelled during policy evaluation");
      }
      const Vector residual = b - a_ * x;
      const double aim = Aim(b, x, target);
      reached = residual.allFinite() && residual.lpNorm<Eigen::Infinity>() <= aim;
      if (reached || round == kRounds || !residual.allFinite()) break;
      krylov_.setTolerance(std::max(1e-10, std::min(0.5, 0.5 * aim / residual.norm())));
      krylov_.setMaxIterations(kRoundIterations);
      const Vector correction = krylov_.solveWithGuess(residual, Vector::Zero(b.size()));
      if (!correction.allFinite()) break;
      x += correction;
    }
    if (!x.allFinite()) x = Vector::Zero(b.size());
    return Status::Ok();
  }

  // Gauss-Seidel converges for a nonsingular M-matrix (Varga 1962, Matrix Iterative Analysis,
  // from memory); stops at the aim or after kMaxSweeps, the residual reported either way.
  Status GaussSeidel(const Vector& b, double target, const CancelToken* cancel, Vector& x) {
    constexpr int kMaxSweeps = 100000;
    constexpr int kCheckEvery = 8;
    for (int sweep = 0; sweep < kMaxSweeps; ++sweep) {
      if (sweep % kCheckEvery == 0) {
        if (cancel != nullptr && cancel->cancelled()) {
          return Status(StatusCode::kCancelled, "cancelled during policy evaluation");
        }
        if ((a_ * x - b).lpNorm<Eigen::Infinity>() <= Aim(b, x, target)) break;
      }
      for (Eigen::Index i = 0; i < a_.rows(); ++i) {
        double diagonal = 0.0;
        double rest = b[i];
        for (RowMajorMatrix::InnerIterator it(a_, i); it; ++it) {
          if (it.col() == i) {
            diagonal = it.value();
          } else {
            rest -= it.value() * x[it.col()];
          }
        }
        x[i] = rest / diagonal;  // diagonal = 1 - p(s | s) > 0 for a proper policy.
      }
    }
    return Status::Ok();
  }

  RowMajorMatrix a_;
  Vector rewards_;
  int64_t terms_ = 1;  // Most terms in one row of A x - b, for RoundingAllowance.
  LinearSolver kind_ = LinearSolver::kDirect;
  bool factorized_ = false;
  bool krylov_ready_ = false;
  Eigen::SparseLU<Eigen::SparseMatrix<double>> lu_;
  Eigen::BiCGSTAB<RowMajorMatrix, Eigen::DiagonalPreconditioner<double>> krylov_;
};

struct Evaluation {
  Vector values;               // V on the local states.
  Vector steps;                // N.
  double residual = kInf;      // rho, bound on sup|(I - P) V - r|.
  double steps_bound = kInf;   // Nbar >= max N^mu.
  double error_bound = kInf;   // rho * Nbar >= sup|V - V^mu|.
  bool steps_reported = true;  // N met kStepsResidual, the accuracy expected_steps states.
};

// Target residual of the expected steps N, in steps (they are reported, so solved tightly).
constexpr double kStepsResidual = 1e-9;

// Solves for N, then for V aiming at rho * Nbar <= tolerance / 1000 (header, Bounds).
Status Evaluate(PolicySystem& system, double tolerance, const CancelToken* cancel, Evaluation& e) {
  const Vector ones = Vector::Ones(system.rewards().size());
  if (ones.size() == 0) {
    e.residual = e.steps_bound = e.error_bound = 0.0;
    return Status::Ok();
  }
  Result<double> rho_n = system.Solve(ones, kStepsResidual, cancel, e.steps);
  if (!rho_n.ok()) return rho_n.status();
  e.steps_bound = kInf;
  if (*rho_n < 0.5) e.steps_bound = std::max(0.0, e.steps.maxCoeff()) / (1.0 - *rho_n);
  Result<double> rho =
      system.Solve(system.rewards(), 1e-3 * tolerance / e.steps_bound, cancel, e.values);
  if (!rho.ok()) return rho.status();
  e.residual = *rho;
  e.error_bound = std::isfinite(e.steps_bound) ? e.residual * e.steps_bound : kInf;
  return Status::Ok();
}

// V on every state: the local values, 0 at goals, NaN outside A (and on the local states
// too when v is null: unknown).
std::vector<double> FullValues(const Model& m, const Index& index, const double* v) {
  std::vector<double> out(m.num_states(), kNaN);
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (m.terminal(s)) out[s] = 0.0;
  }
  if (v == nullptr) return out;
  for (size_t i = 0; i < index.states.size(); ++i) out[index.states[i]] = v[i];
  return out;
}
std::vector<double> FullValues(const Model& m, const Index& index, const Vector& v) {
  return FullValues(m, index, v.data());
}

// ---------------------------------------------------------------------------------------
// Policy improvement (header comment) and the properness guard.

struct Improvement {
  int64_t changed = 0;
  double residual = 0.0;  // sup |T V - V|.
  double slack = 0.0;     // Largest sigma(s), or larger improvement given up by the guard.
};

template <bool kMaximize>
Improvement Improve(const Model& m, const Index& index, const std::vector<uint8_t>& safe,
                    const double* v, double v_max, double error_bound, int threads,
                    std::vector<RowId>& rows) {
  const int64_t size = static_cast<int64_t>(index.states.size());
  int64_t changed = 0;
  double residual = 0.0;
  double slack_max = 0.0;
#pragma omp parallel for num_threads(threads) reduction(+ : changed) \
    reduction(max : residual, slack_max) schedule(dynamic, 8192)
  for (int64_t i = 0; i < size; ++i) {
    const StateId s = index.states[i];
    const RowId current = rows[s];
    const double current_q = RowValue(m, current, v);
    RowId best = current;
    double best_q = current_q;
    int64_t terms = 1;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      terms = std::max<int64_t>(terms, m.entry_end(r) - m.entry_begin(r) + 1);
      if (!safe[r] || r == current) continue;
      const double q = RowValue(m, r, v);
      if (internal::Better<kMaximize>(q, best_q)) {
        best = r;
        best_q = q;
      }
    }
    residual = std::max(residual, std::fabs(best_q - v[s]));
    // Twice the evaluation error, plus 8x the rounding of the two q values compared
    // (|r| + sum p |v| <= |q| + 2 max|v|).
    const double slack =
        2.0 * error_bound +
        8.0 * RoundingAllowance(terms, std::max(1.0, std::fabs(best_q) + 2 * v_max));
    slack_max = std::max(slack_max, slack);
    if (best != current &&
        internal::Better<kMaximize>(best_q, kMaximize ? current_q + slack : current_q - slack)) {
      rows[s] = best;
      ++changed;
    }
  }
  return Improvement{changed, residual, slack_max};
}

// For each state t, the states u in `states` with a row r, admit(u, r), entering t (CSR).
// Touches only the rows of `states`, so it is cheap when they are few.
struct Reverse {
  std::vector<int64_t> begin;  // Size states + 1.
  std::vector<StateId> from;
};

template <typename Admit>
Reverse ReverseOf(const Model& m, const std::vector<StateId>& states, Admit admit) {
  Reverse out;
  out.begin.assign(static_cast<size_t>(m.num_states()) + 1, 0);
  auto each = [&](auto&& edge) {
    for (StateId u : states) {
      for (RowId r = m.row_begin(u); r < m.row_end(u); ++r) {
        if (!admit(u, r)) continue;
        for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) edge(u, m.entry_next(e));
      }
    }
  };
  each([&](StateId, StateId t) { ++out.begin[t + 1]; });
  for (StateId t = 0; t < m.num_states(); ++t) out.begin[t + 1] += out.begin[t];
  out.from.resize(out.begin.back());
  std::vector<int64_t> fill(out.begin.begin(), out.begin.end() - 1);
  each([&](StateId u, StateId t) { out.from[fill[t]++] = u; });
  return out;
}

// Keeps a policy proper while changing as few of its rows as possible: marks the states
// that reach a goal under `rows`, then settles the others breadth first backwards (the
// first layer in state order). An unmarked state u is reached through any row r with
// admit(u, r) entering a marked state, and choose(u, settles) then sets rows[u] to a row
// for which settles(row) holds (r qualifies). Each settled state has positive probability
// of stepping to an earlier settled state, and marked states keep their paths to a goal,
// so the result is proper if every unmarked state admits the row of some proper policy.
template <typename Admit, typename Choose>
void Settle(const Model& m, const Index& index, std::vector<RowId>& rows, Admit admit,
            Choose choose) {
  std::vector<uint8_t> marked;
  std::vector<StateId> queue;
  StartAtGoals(m, queue, marked);
  auto search = [&](const Reverse& reverse, auto&& on_add) {
    for (size_t head = 0; head < queue.size(); ++head) {
      const StateId t = queue[head];
      for (int64_t k = reverse.begin[t]; k < reverse.begin[t + 1]; ++k) {
        const StateId u = reverse.from[k];
        if (marked[u]) continue;
        on_add(u);
        marked[u] = 1;
        queue.push_back(u);
      }
    }
  };
  search(ReverseOf(m, index.states, [&](StateId u, RowId r) { return rows[u] == r; }),
         [](StateId) {});
  std::vector<StateId> rest;
  for (StateId s : index.states) {
    if (!marked[s]) rest.push_back(s);
  }
  if (rest.empty()) return;
  auto settles = [&](RowId r) {
    for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
      if (marked[m.entry_next(e)]) return true;
    }
    return false;
  };
  const Reverse reverse = ReverseOf(m, rest, admit);
  queue.clear();
  for (StateId u : rest) {
    bool admitted_and_settles = false;
    for (RowId r = m.row_begin(u); r < m.row_end(u) && !admitted_and_settles; ++r) {
      admitted_and_settles = admit(u, r) && settles(r);
    }
    if (!admitted_and_settles) continue;
    choose(u, settles);
    marked[u] = 1;
    queue.push_back(u);
  }
  search(reverse, [&](StateId u) { choose(u, settles); });
}

// The properness guard (header comment): a state that switched keeps its new row if that
// row settles, else reverts to its row in `before` (a proper policy). Updates step.changed
// and raises step.slack to the largest improvement given up.
void KeepProper(const Model& m, const Index& index, const std::vector<RowId>& before,
                const double* v, std::vector<RowId>& rows, Improvement& step) {
  auto admit = [&](StateId u, RowId r) { return rows[u] == r || before[u] == r; };
  Settle(m, index, rows, admit, [&](StateId u, auto& settles) {
    if (rows[u] == before[u] || settles(rows[u])) return;
    step.slack =
        std::max(step.slack, std::fabs(RowValue(m, rows[u], v) - RowValue(m, before[u], v)));
    rows[u] = before[u];
    --step.changed;
  });
}

// ---------------------------------------------------------------------------------------
// Step 5: the report.

// Fills values, q, optimal_row, action_gap, tied_states, tie_tolerance and residual from V;
// returns the naive picks (first row within the pick tolerance) and marks `candidate` rows.
template <bool kMaximize>
std::vector<RowId> Report(const Model& m, const Index& index, const Reach& reach,
                          const std::vector<double>& v, int threads,
                          std::vector<uint8_t>& candidate, TotalRewardSolution& out) {
  const int64_t size = static_cast<int64_t>(index.states.size());
  out.q.assign(m.num_rows(), kNaN);
  out.values = v;  // 0 at goals, NaN outside A; overwritten on the local states.
  out.optimal_row.assign(m.num_rows(), 0);
  out.action_gap.assign(m.num_states(), kNaN);
  out.tie_tolerance = out.options.tie_tolerance + 2.0 * out.evaluation_error_bound;
  candidate.assign(m.num_rows(), 0);
  std::vector<RowId> pick(m.num_states(), -1);
  int64_t tied = 0;
  double residual = 0.0;
#pragma omp parallel for num_threads(threads) reduction(+ : tied) reduction(max : residual) \
    schedule(dynamic, 8192)
  for (int64_t i = 0; i < size; ++i) {
    const StateId s = index.states[i];
    RowId best = -1;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      if (!reach.safe[r]) continue;
      out.q[r] = RowValue(m, r, v.data());
      if (best < 0 || internal::Better<kMaximize>(out.q[r], out.q[best])) best = r;
    }
    const double b = out.q[best];  // Every local state has a safe row (its policy row).
    out.values[s] = b;
    residual = std::max(residual, std::fabs(b - v[s]));
    const double rounding = 1e-12 * std::max(1.0, std::fabs(b));
    int count = 0;
    bool have_second = false;
    double second = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      if (!reach.safe[r]) continue;
      const double behind = std::fabs(out.q[r] - b);
      out.optimal_row[r] = behind <= out.tie_tolerance + rounding;
      count += out.optimal_row[r];
      candidate[r] = behind <= out.options.tie_tolerance + rounding;
      if (pick[s] < 0 && candidate[r]) pick[s] = r;
      if (r == best) continue;
      if (!have_second || internal::Better<kMaximize>(out.q[r], second)) second = out.q[r];
      have_second = true;
    }
    if (have_second) out.action_gap[s] = std::fabs(b - second);
    if (count >= 2) ++tied;
  }
  out.tied_states = tied;
  out.residual = residual;
  return pick;
}

// Makes the picks proper (TotalRewardSolution::best_row): unsettled states take the first
// candidate row that settles, else the row of `mu` (proper, so every state settles).
void MakePicksProper(const Model& m, const Index& index, const std::vector<uint8_t>& candidate,
                     const std::vector<RowId>& mu, std::vector<RowId>& pick) {
  auto admit = [&](StateId u, RowId r) { return candidate[r] || mu[u] == r; };
  Settle(m, index, pick, admit, [&](StateId u, auto& settles) {
    pick[u] = mu[u];
    for (RowId r = m.row_begin(u); r < m.row_end(u); ++r) {
      if (candidate[r] && settles(r)) {
        pick[u] = r;
        return;
      }
    }
  });
}

// ---------------------------------------------------------------------------------------
// Step 4 at scale: inexact evaluation (header comment, "Large models").

// Share of the last Bellman residual that an evaluation's error bound may reach while the
// policy still changes; tenfold tighter whenever an improvement fails to halve the residual
// (the rule of discounted policy iteration, policy_iteration.cc).
constexpr double kEvaluationShare = 0.002;
// Residual of N while the policy still changes: Nbar = max N / (1 - rho_N) then overstates
// max N^mu by at most 11 %, which is all the slack of an improvement needs.
constexpr double kLooseStepsResidual = 0.1;
// Work (products with P_mu) one solve may spend; only a cap against pathological cases, as
// the time limit and cancel are polled inside.
constexpr double kSolveWork = 1e5;
// After a stop, the work the report may still spend on expected steps, unpolled: bounds how
// far a time limit is overrun.
constexpr double kGraceWork = 20.0;
// Work the report may spend on the expected steps of picks other than the final policy.
constexpr double kReportWork = 2000.0;
// Final-accuracy rounds on one policy that halve neither residual before the iteration
// settles for the bound it has (the outcome says stalled if that misses the tolerance).
constexpr int kStalledRounds = 3;

// kAuto solves exactly up to kDirectMaxStates local states (as evaluate.h); kBiCgStab and
// kSweeps always take the inexact path (kSweeps with Gauss-Seidel only).
bool InexactEvaluation(LinearSolver kind, int64_t size) {
  return kind == LinearSolver::kBiCgStab || kind == LinearSolver::kSweeps ||
         (kind == LinearSolver::kAuto && size > kDirectMaxStates);
}

// Factors of a policy's system (kAuto only) must fit the average criterion's memory budget
// (internal::FactorBudgetBytes: four times the bytes of the model's transitions, and at least
// 512 MiB), and cost at most kFactorWorkFloor + kFactorWorkPerEntry multiply-adds per entry
// of the system: about what a few hundred products cost. They pay where iterations are slowest:
// next states near the state (chains, rings, bands), where the fill stays small however slowly the
// policy reaches a goal (a 1,000,000-state ring with a goal every 10,000 states and 8
// outcomes within 16 states: 267 s with exact Krylov and LU evaluations, 158 s inexact, 19 s
// factored). On an expander the fill is refused before any is spent.
constexpr double kFactorWorkFloor = 1e9;
constexpr double kFactorWorkPerEntry = 500.0;

// What the inexact iteration and the report share.
struct InexactRun {
  InexactRun(const Model& m, const TotalRewardOptions& options, const CancelToken* cancel,
             const internal::RunControl& control)
      : threads(internal::ThreadCount(options.threads)),
        factor(options.linear_solver == LinearSolver::kAuto),
        budget_bytes(internal::FactorBudgetBytes(m)),
        interrupted([&control, limit = options.time_limit_seconds] {
          return control.cancelled() || (limit > 0 && control.elapsed_seconds() >= limit);
        }) {
    plan.sweeps_only = options.linear_solver == LinearSolver::kSweeps;
    stop.cancel = cancel;
    if (options.time_limit_seconds > 0) {
      stop.deadline = internal::StopCheck::DeadlineIn(
          std::max(0.0, options.time_limit_seconds - control.elapsed_seconds()));
      if (stop.deadline == internal::StopCheck::Clock::time_point::max()) {
        stop.deadline = internal::StopCheck::Clock::now();  // The limit has passed.
      }
    }
  }

  // Assigns `rows` to `policy` and, unless declined before or after a stop, factors it.
  // A stop while factoring is seen by the next solve, which polls `interrupted` at once.
  void Assign(const Model& m, const Index& index, const std::vector<RowId>& rows, bool stopped) {
    policy.Assign(m, index.states, index.local, rows, threads);
    if (!factor || declined || stopped) return;
    const double max_work = kFactorWorkFloor + kFactorWorkPerEntry *
                                                   static_cast<double>(policy.size()) *
                                                   static_cast<double>(policy.terms());
    const Status status = policy.Factor(budget_bytes, max_work, stop, threads);
    // Policies of one model share their structure: one refusal stands for the run.
    declined = status.ok() && !policy.factored();
  }

  const int threads;
  const bool factor;  // kAuto: factor each policy when it pays.
  const double budget_bytes;
  const std::function<bool()> interrupted;  // Cancel or time limit.
  internal::StopCheck stop;                 // The same, for factorisations.
  bool declined = false;
  internal::TotalSolvePlan plan;
  internal::TotalPolicyMatrix policy;
};

// Nbar = max N / (1 - rho_N) >= max N^mu when rho_N < 1 (header, Bounds); kept only for
// rho_N < 0.5, as Evaluate does. At least 1: every local state needs a step.
double StepsBound(double rho, const double* steps, int64_t size) {
  if (!(rho < 0.5)) return kInf;
  double most = 1.0;
  for (int64_t i = 0; i < size; ++i) most = std::max(most, steps[i]);
  return most / (1.0 - rho);
}

// Solves (I - P_rows) N = 1 for the report from the warm start `steps`. Returns whether
// kStepsResidual was met (else the steps are unknown) and sets `bound` to Nbar.
Result<bool> SolveReportSteps(const Model& m, const Index& index, const std::vector<RowId>& rows,
                              LinearSolver kind, InexactRun* run, bool stopped, int64_t& sweeps,
                              Vector& steps, double& bound) {
  const int64_t size = static_cast<int64_t>(index.states.size());
  if (run == nullptr) {
    PolicySystem system(m, index, rows, kind);
    Result<double> rho = system.Solve(Vector::Ones(size), kStepsResidual, nullptr, steps);
    if (!rho.ok()) return rho.status();
    bound = *rho < 0.5 ? std::max(0.0, steps.maxCoeff()) / (1.0 - *rho) : kInf;
    return true;
  }
  const std::function<bool()> never = [] { return false; };
  std::vector<double> x(steps.data(), steps.data() + size);
  run->Assign(m, index, rows, stopped);
  const internal::TotalSolveResult r =
      internal::SolveTotalSystem(run->policy, std::vector<double>(size, 1.0), kStepsResidual,
                                 stopped ? kGraceWork : kReportWork, run->threads,
                                 stopped ? never : run->interrupted, run->plan, x);
  sweeps += static_cast<int64_t>(std::ceil(r.work));
  steps = Eigen::Map<const Vector>(x.data(), size);
  bound = StepsBound(r.residual, x.data(), size);
  return r.reached;
}

// Expected steps under the picks, and the policy loss bound (header comment). `run` is null
// on the exact path.
template <bool kMaximize>
Status FinishPicks(const Model& m, const Index& index, const std::vector<double>& v,
                   const std::vector<RowId>& mu, const Evaluation& eval, bool stable,
                   InexactRun* run, TotalRewardSolution& out) {
  Vector steps = eval.steps;
  double steps_bound = eval.steps_bound;
  bool reported = eval.steps_reported;
  if (out.best_row != mu || !reported) {
    Result<bool> met = SolveReportSteps(m, index, out.best_row, out.options.linear_solver, run,
                                        !stable, out.sweeps, steps, steps_bound);
    if (!met.ok()) return met.status();
    reported = *met;
  }
  out.expected_steps = FullValues(m, index, reported ? steps.data() : nullptr);
  out.max_expected_steps = !reported ? kNaN : steps.size() > 0 ? steps.maxCoeff() : 0.0;
  double behind = 0.0;  // max_s w(s), header comment.
  double scale = 0.0;
  int64_t terms = 1;
  for (StateId s : index.states) {
    const RowId r = out.best_row[s];
    const double w = kMaximize ? v[s] - out.q[r] : out.q[r] - v[s];
    behind = std::max(behind, w);
    scale = std::max({scale, std::fabs(v[s]), std::fabs(m.row_reward(r))});
    terms = std::max<int64_t>(terms, m.entry_end(r) - m.entry_begin(r) + 1);
  }
  behind += RoundingAllowance(terms, 2.0 * scale);
  out.value_error_bound = stable ? out.evaluation_error_bound : kNaN;
  const double tail = behind > 0.0 ? behind * steps_bound : 0.0;  // No 0 * inf.
  out.policy_loss_bound = stable ? out.value_error_bound + tail : kNaN;
  return Status::Ok();
}

// ---------------------------------------------------------------------------------------
// The solve.

SolveOptions RunLimits(const TotalRewardOptions& options) {
  SolveOptions run;
  run.max_iterations = options.max_iterations;
  run.time_limit_seconds = options.time_limit_seconds;
  return run;
}

std::string SomeStates(const Model& m, const std::vector<uint8_t>& in_a) {
  std::string out;
  int shown = 0;
  for (StateId s = 0; s < m.num_states() && shown < 5; ++s) {
    if (in_a[s]) continue;
    out += (shown++ == 0 ? "\"" : ", \"") + m.state_name(s) + "\"";
  }
  return out;
}

// Steps 1 and 2 in the form the rest needs.
struct Analysis {
  Reach reach;
  Index index;
  double reward_scale = 1.0;  // max(1, max |r|) over the safe rows.
};

Status Analyse(const Model& m, const TotalRewardOptions& options, internal::RunControl& control,
               const CancelToken* cancel, Analysis& a, TotalRewardSolution& out) {
  const StateId n = m.num_states();
  // The backward graph holds a row id per entry (a quarter of a million-state model's bytes);
  // only steps 1 and 2 read it, so it is dropped before the end components are solved.
  std::optional<Graph> graph(std::in_place, m);
  a.reach = AlmostSureReach(m, *graph);
  bool any_goal = false;
  for (StateId s = 0; s < n && !any_goal; ++s) any_goal = m.terminal(s);
  if (!any_goal) {
    return FailedPreconditionError(
        "the total-reward criterion needs a goal: mark at least one state terminal");
  }
  a.index.local.assign(n, -1);
  for (StateId s = 0; s < n; ++s) {
    if (!a.reach.in_a[s]) ++out.states_not_reaching_goal;
    if (!a.reach.in_a[s] || m.terminal(s)) continue;
    a.index.local[s] = static_cast<int32_t>(a.index.states.size());
    a.index.states.push_back(s);
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      if (a.reach.safe[r]) a.reward_scale = std::max(a.reward_scale, std::fabs(m.row_reward(r)));
    }
  }
  if (a.index.states.empty() && out.states_not_reaching_goal > 0) {
    return FailedPreconditionError(
        "no state can reach a goal (terminal state) with probability 1 under any policy, e.g. " +
        SomeStates(m, a.reach.in_a));
  }
  const EndComponents ec = FindEndComponents(m, *graph, a.reach);
  graph.reset();
  out.end_components = ec.count;
  return CheckEndComponents(m, ec, 1e-9 * a.reward_scale, options, control, cancel);
}

// Where policy iteration stopped: the last fully evaluated policy mu and its values.
struct Iteration {
  std::vector<RowId> rows;  // mu.
  Evaluation eval;
  std::vector<double> v;  // V on every state (FullValues).
  bool stable = false;    // No row improved on mu.
  std::optional<SolveOutcome> stop;
};

// Step 4, from the attractor. The first evaluation ignores `cancel`, so every answer
// describes a fully evaluated policy.
template <bool kMaximize>
Status Iterate(const Model& m, const Analysis& a, const TotalRewardOptions& options,
               internal::RunControl& control, const CancelToken* cancel, Iteration& it,
               TotalRewardSolution& out) {
  const int threads = internal::ThreadCount(options.threads);
  it.rows = a.reach.attractor;
  PolicySystem first(m, a.index, it.rows, options.linear_solver);
  MDP_RETURN_IF_ERROR(Evaluate(first, options.tolerance, nullptr, it.eval));
  ++out.sweeps;
  it.v = FullValues(m, a.index, it.eval.values);
  for (;;) {
    std::vector<RowId> next = it.rows;
    const double v_max = it.eval.values.size() > 0 ? it.eval.values.lpNorm<Eigen::Infinity>() : 0;
    Improvement step = Improve<kMaximize>(m, a.index, a.reach.safe, it.v.data(), v_max,
                                          it.eval.error_bound, threads, next);
    if (step.changed > 0) KeepProper(m, a.index, it.rows, it.v.data(), next, step);
    ++out.iterations;
    ++out.sweeps;
    out.improvement_slack = step.slack;
    if (step.changed == 0) {
      it.stable = true;
      return Status::Ok();
    }
    it.stop = control.After(out.iterations, out.sweeps, step.residual,
                            step.residual * it.eval.steps_bound, "improve");
    if (it.stop) return Status::Ok();
    PolicySystem system(m, a.index, next, options.linear_solver);
    Evaluation eval = it.eval;  // Warm start.
    const Status status = Evaluate(system, options.tolerance, cancel, eval);
    if (status.code() == StatusCode::kCancelled) {
      it.stop = SolveOutcome::kCancelled;
      return Status::Ok();
    }
    MDP_RETURN_IF_ERROR(status);
    ++out.sweeps;
    it.rows.swap(next);
    it.eval = std::move(eval);
    it.v = FullValues(m, a.index, it.eval.values);
  }
}

// Step 4 with inexact evaluations, from the attractor (header comment, "Large models").
// Returns with `it` holding the last policy whose evaluation completed (or, if the first one
// was interrupted, that partial one): its bounds are computed from its residuals either way.
template <bool kMaximize>
Status IterateInexact(const Model& m, const Analysis& a, const TotalRewardOptions& options,
                      internal::RunControl& control, InexactRun& run, Iteration& it,
                      TotalRewardSolution& out) {
  const int64_t size = static_cast<int64_t>(a.index.states.size());
  const std::vector<double> ones(size, 1.0);
  std::vector<double> v(size, 0.0), steps(size, 0.0), scratch(size);
  std::vector<RowId> rows = a.reach.attractor;  // The policy being evaluated.
  run.Assign(m, a.index, rows, false);
  double e = a.reward_scale;  // The Bellman residual of V = 0 is at most max |r|.
  double share = kEvaluationShare;
  bool final_round = false;  // Evaluating `rows` to the report's accuracy.
  bool evaluated = false;    // `it` holds an evaluation.
  bool same_policy = false;  // rows == it.rows.
  double last_residual = kInf, last_steps_residual = kInf;
  int stalled_rounds = 0;
  for (;;) {
    // N first: its bound Nbar turns every residual target into an error bound.
    const internal::TotalSolveResult n = internal::SolveTotalSystem(
        run.policy, ones, final_round ? kStepsResidual : kLooseStepsResidual, kSolveWork,
        run.threads, run.interrupted, run.plan, steps);
    out.sweeps += static_cast<int64_t>(std::ceil(n.work));
    const double nbar = StepsBound(n.residual, steps.data(), size);
    internal::TotalSolveResult r;  // Without Nbar, V has no target: left for a later round.
    r.residual = kInf;
    r.interrupted = n.interrupted;
    if (!n.interrupted && std::isfinite(nbar)) {
      // As Evaluate at the end; meanwhile a share of the Bellman residual (inexact Newton).
      const double final_target = 1e-3 * options.tolerance / nbar;
      const double target = final_round ? final_target : std::max(final_target, share * e / nbar);
      r = internal::SolveTotalSystem(run.policy, run.policy.reward(), target, kSolveWork,
                                     run.threads, run.interrupted, run.plan, v);
      out.sweeps += static_cast<int64_t>(std::ceil(r.work));
    }
    const double eps = std::isfinite(nbar) ? r.residual * nbar : kInf;
    // A completed evaluation always replaces the last; an interrupted one only if there is
    // none, or if it is of the same policy with a smaller bound.
    const bool interrupted = n.interrupted || r.interrupted;
    if (!interrupted || !evaluated || (same_policy && eps < it.eval.error_bound)) {
      if (!same_policy) it.rows = rows;
      it.eval.values = Eigen::Map<const Vector>(v.data(), size);
      it.eval.steps = Eigen::Map<const Vector>(steps.data(), size);
      it.eval.residual = r.residual;
      it.eval.steps_bound = nbar;
      it.eval.error_bound = eps;
      it.eval.steps_reported = final_round && n.reached;
      it.v = FullValues(m, a.index, v.data());
      evaluated = same_policy = true;
    }
    if (interrupted) {
      it.stop = control.cancelled() ? SolveOutcome::kCancelled : SolveOutcome::kTimeLimit;
      return Status::Ok();
    }
    double v_max = 0.0;
    for (double x : v) v_max = std::max(v_max, std::fabs(x));
    std::vector<RowId> next = rows;
    Improvement step =
        Improve<kMaximize>(m, a.index, a.reach.safe, it.v.data(), v_max, eps, run.threads, next);
    if (step.changed > 0) KeepProper(m, a.index, rows, it.v.data(), next, step);
    ++out.iterations;
    ++out.sweeps;
    out.improvement_slack = step.slack;
    if (step.changed == 0) {
      // mu may be optimal: evaluate it to the report's accuracy before saying so.
      if (final_round && n.reached && r.reached) {
        it.stable = true;
        return Status::Ok();
      }
      if (final_round) {
        const bool progress =
            r.residual < 0.5 * last_residual || n.residual < 0.5 * last_steps_residual;
        stalled_rounds = progress ? 0 : stalled_rounds + 1;
        if (stalled_rounds >= kStalledRounds) {
          it.stable = true;  // Outcome stalled unless the bound meets the tolerance.
          return Status::Ok();
        }
      }
      last_residual = r.residual;
      last_steps_residual = n.residual;
      final_round = true;
    }
    it.stop =
        control.After(out.iterations, out.sweeps, step.residual, step.residual * nbar, "improve");
    if (it.stop) return Status::Ok();
    if (step.changed == 0) continue;
    if (step.residual > 0.5 * e) share *= 0.1;
    e = step.residual;
    final_round = same_policy = false;
    stalled_rounds = 0;
    last_residual = last_steps_residual = kInf;
    rows.swap(next);
    run.Assign(m, a.index, rows, false);
    // Warm start: T_mu' V, one backup of the new policy ahead of V (N keeps mu's).
    run.policy.Residual(run.policy.reward().data(), v.data(), scratch.data(), run.threads);
    for (int64_t i = 0; i < size; ++i) v[i] += scratch[i];
    ++out.sweeps;
  }
}

template <bool kMaximize>
Result<TotalRewardSolution> SolveT(const Model& m, const TotalRewardOptions& options,
                                   const ProgressFn* progress, const CancelToken* cancel) {
  const SolveOptions limits = RunLimits(options);
  internal::RunControl control(limits, progress, cancel);
  TotalRewardSolution out;
  out.options = options;
  Analysis a;
  MDP_RETURN_IF_ERROR(Analyse(m, options, control, cancel, a, out));
  Iteration it;
  std::optional<InexactRun> run;
  if (InexactEvaluation(options.linear_solver, static_cast<int64_t>(a.index.states.size()))) {
    run.emplace(m, options, cancel, control);
    MDP_RETURN_IF_ERROR(IterateInexact<kMaximize>(m, a, options, control, *run, it, out));
  } else {
    MDP_RETURN_IF_ERROR(Iterate<kMaximize>(m, a, options, control, cancel, it, out));
  }

  // Step 5.
  out.evaluation_residual = it.eval.residual;
  out.evaluation_error_bound = it.eval.error_bound;
  if (it.stable) {
    out.outcome = it.eval.error_bound <= options.tolerance ? SolveOutcome::kConverged
                                                           : SolveOutcome::kStalled;
  } else {
    out.outcome = *it.stop;
  }
  std::vector<uint8_t> candidate;
  const int threads = internal::ThreadCount(options.threads);
  out.best_row = Report<kMaximize>(m, a.index, a.reach, it.v, threads, candidate, out);
  MakePicksProper(m, a.index, candidate, it.rows, out.best_row);
  ++out.sweeps;
  MDP_RETURN_IF_ERROR(FinishPicks<kMaximize>(m, a.index, it.v, it.rows, it.eval, it.stable,
                                             run ? &*run : nullptr, out));
  out.reaches_goal = std::move(a.reach.in_a);
  out.safe_row = std::move(a.reach.safe);
  out.solve_seconds = control.elapsed_seconds();
  return out;
}

}  // namespace

Status CheckTotalRewardOptions(const TotalRewardOptions& options) {
  const double values[] = {options.tolerance, static_cast<double>(options.max_iterations),
                           options.time_limit_seconds, options.tie_tolerance,
                           static_cast<double>(options.threads)};
  static_assert(std::size(values) == kTotalRewardOptionBounds.size());
  for (size_t i = 0; i < kTotalRewardOptionBounds.size(); ++i) {
    const OptionBound& bound = kTotalRewardOptionBounds[i];
    if (!(values[i] >= bound.min && values[i] <= bound.max)) {
      return InvalidArgumentError(std::string(bound.name) + " must be in [" + Number(bound.min) +
                                  ", " + Number(bound.max) + "], got " + Number(values[i]));
    }
  }
  return Status::Ok();
}

Result<TotalRewardSolution> TotalRewardPolicyIteration(const Model& m,
                                                       const TotalRewardOptions& options,
                                                       const ProgressFn* progress,
                                                       const CancelToken* cancel) {
  MDP_RETURN_IF_ERROR(CheckTotalRewardOptions(options));
  try {
    return m.objective() == Objective::kMaximize ? SolveT<true>(m, options, progress, cancel)
                                                 : SolveT<false>(m, options, progress, cancel);
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory during total-reward policy iteration");
  }
}

}  // namespace mdp
