#include "solver/criterion_eval.h"

#include <Eigen/IterativeLinearSolvers>
#include <Eigen/SparseCore>
#include <Eigen/SparseLU>
#include <algorithm>
#include <cmath>
#include <limits>
#include <memory>
#include <new>
#include <span>
#include <utility>

namespace mdp {
namespace {

using Vector = Eigen::VectorXd;
using SparseRows = Eigen::SparseMatrix<double, Eigen::RowMajor>;
using Sparse = Eigen::SparseMatrix<double>;
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
constexpr double kInf = std::numeric_limits<double>::infinity();

double SupNorm(const Vector& x) { return x.size() == 0 ? 0.0 : x.lpNorm<Eigen::Infinity>(); }

// The policy's chain: P_pi with only positive entries (so its pattern is the support graph)
// and r_pi. A terminal state gets a self-loop iff `terminal_loops` (the average criterion's
// absorbing reward-0 state), an empty row otherwise (a goal).
struct Chain {
  SparseRows p;
  Vector r;
};

Chain BuildChain(const Model& m, const Policy& policy, bool terminal_loops) {
  std::vector<Eigen::Triplet<double>> triplets;
  Chain c;
  c.r = Vector::Zero(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (m.terminal(s) && terminal_loops) triplets.emplace_back(s, s, 1.0);
    for (RowId row = m.row_begin(s); row < m.row_end(s); ++row) {
      const double w = policy.row_probability[row];
      if (w <= 0.0) continue;
      c.r[s] += w * m.row_reward(row);
      for (int64_t e = m.entry_begin(row); e < m.entry_end(row); ++e) {
        const double x = w * m.entry_probability(e);
        if (x > 0.0) triplets.emplace_back(s, m.entry_next(e), x);
      }
    }
  }
  c.p.resize(m.num_states(), m.num_states());
  c.p.setFromTriplets(triplets.begin(), triplets.end());
  c.p.makeCompressed();
  return c;
}

// Strongly connected components of the pattern of `p` (Tarjan's algorithm with an explicit
// call stack, so deep chains cannot overflow the thread's stack).
std::vector<int32_t> StrongComponents(const SparseRows& p) {
  const int n = static_cast<int>(p.rows());
  const int* outer = p.outerIndexPtr();
  const int* inner = p.innerIndexPtr();
  std::vector<int32_t> index(n, -1), low(n, 0), comp(n, -1), stack;
  std::vector<std::pair<int, int>> calls;  // (state, next edge to follow).
  int32_t next_index = 0, count = 0;
  for (int root = 0; root < n; ++root) {
    if (index[root] >= 0) continue;
    index[root] = low[root] = next_index++;
    stack.push_back(root);
    calls.emplace_back(root, outer[root]);
    while (!calls.empty()) {
      const int v = calls.back().first;
      if (calls.back().second < outer[v + 1]) {
        const int w = inner[calls.back().second++];
        if (index[w] < 0) {
          index[w] = low[w] = next_index++;
          stack.push_back(w);
          calls.emplace_back(w, outer[w]);
        } else if (comp[w] < 0) {
          low[v] = std::min(low[v], index[w]);
        }
        continue;
      }
      calls.pop_back();
      if (!calls.empty()) low[calls.back().first] = std::min(low[calls.back().first], low[v]);
      if (low[v] != index[v]) continue;
      int w;
      do {
        w = stack.back();
        stack.pop_back();
        comp[w] = count;
      } while (w != v);
      ++count;
    }
  }
  return comp;
}

// The closed components of `p`: each sorted, ordered by their first state.
std::vector<std::vector<StateId>> ClosedClasses(const SparseRows& p) {
  const std::vector<int32_t> comp = StrongComponents(p);
  const int32_t count = comp.empty() ? 0 : *std::max_element(comp.begin(), comp.end()) + 1;
  std::vector<uint8_t> leaks(count, 0);
  for (int s = 0; s < p.rows(); ++s) {
    for (SparseRows::InnerIterator it(p, s); it; ++it) {
      if (comp[it.col()] != comp[s]) leaks[comp[s]] = 1;
    }
  }
  std::vector<int32_t> slot(count, -1);
  std::vector<std::vector<StateId>> classes;
  for (StateId s = 0; s < p.rows(); ++s) {  // In state order: sorted, ordered by first state.
    if (leaks[comp[s]]) continue;
    if (slot[comp[s]] < 0) {
      slot[comp[s]] = static_cast<int32_t>(classes.size());
      classes.emplace_back();
    }
    classes[slot[comp[s]]].push_back(s);
  }
  return classes;
}

// Per state: 1 iff some path in the pattern of `p` leads from it to a state with target 1.
std::vector<uint8_t> CanReach(const SparseRows& p, std::vector<uint8_t> target) {
  const Sparse by_column = p;  // Column j lists the predecessors of j.
  std::vector<StateId> queue;
  for (StateId s = 0; s < p.rows(); ++s) {
    if (target[s]) queue.push_back(s);
  }
  for (size_t i = 0; i < queue.size(); ++i) {
    for (Sparse::InnerIterator it(by_column, queue[i]); it; ++it) {
      if (!target[it.row()]) {
        target[it.row()] = 1;
        queue.push_back(static_cast<StateId>(it.row()));
      }
    }
  }
  return target;
}

// Local numbering of a subset of the states; -1 outside. One array of size states, reused.
class Subset {
 public:
  explicit Subset(StateId states) : local_(states, -1) {}
  void Set(std::span<const StateId> members) {
    for (StateId s : members_) local_[s] = -1;
    members_.assign(members.begin(), members.end());
    for (size_t i = 0; i < members_.size(); ++i) local_[members_[i]] = static_cast<int32_t>(i);
  }
  int32_t local(StateId s) const { return local_[s]; }
  const std::vector<StateId>& members() const { return members_; }
  int size() const { return static_cast<int>(members_.size()); }

 private:
  std::vector<int32_t> local_;
  std::vector<StateId> members_;
};

// A = I - P_SS for the subset S, or its transpose.
Sparse SubsetMatrix(const SparseRows& p, const Subset& subset, bool transpose) {
  std::vector<Eigen::Triplet<double>> triplets;
  for (int i = 0; i < subset.size(); ++i) {
    triplets.emplace_back(i, i, 1.0);
    for (SparseRows::InnerIterator it(p, subset.members()[i]); it; ++it) {
      const int j = subset.local(static_cast<StateId>(it.col()));
      if (j < 0) continue;
      if (transpose) {
        triplets.emplace_back(j, i, -it.value());
      } else {
        triplets.emplace_back(i, j, -it.value());
      }
    }
  }
  Sparse a(subset.size(), subset.size());
  a.setFromTriplets(triplets.begin(), triplets.end());
  a.makeCompressed();
  return a;
}

// Solves A x = b for several right-hand sides: sparse LU for small systems (or when asked),
// else BiCGSTAB in refinement rounds against the true residual (as in evaluate.cc), falling
// back to LU when it misses its target.
class SystemSolver {
 public:
  SystemSolver(Sparse a, const EvaluateOptions& options, const CancelToken* cancel)
      : a_(std::move(a)), options_(options), cancel_(cancel) {
    direct_ = options.solver == LinearSolver::kDirect ||
              (options.solver != LinearSolver::kBiCgStab && a_.rows() <= options.direct_max_states);
  }

  // Aims at sup|A x - b| <= target; `residual` is the one reached.
  Status Solve(const Vector& b, double target, Vector& x, double& residual) {
    x = Vector::Zero(b.size());
    if (!direct_) {
      MDP_RETURN_IF_ERROR(Krylov(b, target, x));
      residual = SupNorm(a_ * x - b);
      if (x.allFinite() && residual <= std::max(target, RoundingFloor(b, x))) {
        used_krylov_ = true;
        return Status::Ok();
      }
      x.setZero();
    }
    MDP_RETURN_IF_ERROR(FactorOnce());
    x = lu_->solve(b);
    x += lu_->solve(Vector(b - a_ * x));  // One step of iterative refinement.
    residual = SupNorm(a_ * x - b);
    return x.allFinite() ? Status::Ok() : InternalError("sparse LU produced non-finite values");
  }

  bool used_krylov() const { return used_krylov_; }

 private:
  Status FactorOnce() {
    if (lu_ != nullptr) return Status::Ok();
    lu_ = std::make_unique<Eigen::SparseLU<Sparse>>();
    lu_->analyzePattern(a_);
    lu_->factorize(a_);
    if (lu_->info() != Eigen::Success) return InternalError("sparse LU factorisation failed");
    return Status::Ok();
  }

  // What rounding allows: sup|A x - b| cannot be expected below a small multiple of
  // u (|A| |x| + |b|), u = 2^-53, with |A| <= 3 in the sup-norm for I - P_SS and ClassMatrix
  // (a transpose may exceed it, which only makes this floor stricter).
  static double RoundingFloor(const Vector& b, const Vector& x) {
    return 1e3 * std::numeric_limits<double>::epsilon() * (3.0 * SupNorm(x) + SupNorm(b));
  }

  // Refinement rounds with a shared iteration budget; stops early when a round no longer
  // halves the residual. Chain-like systems can need as many iterations as unknowns, which
  // LU solves cheaply instead, so the budget is kept small.
  Status Krylov(const Vector& b, double target, Vector& x) {
    if (krylov_ == nullptr) {
      krylov_ = std::make_unique<Eigen::BiCGSTAB<Sparse, Eigen::DiagonalPreconditioner<double>>>();
      krylov_->compute(a_);
    }
    int64_t budget = std::min<int64_t>(options_.max_iterations, kKrylovBudget);
    double previous = kInf;
    for (int round = 0; round < 6 && budget > 0; ++round) {
      if (cancel_ != nullptr && cancel_->cancelled()) {
        return Status(StatusCode::kCancelled, "cancelled during policy evaluation");
      }
      const Vector residual = b - a_ * x;
      const double sup = SupNorm(residual);
      if (sup <= std::max(target, RoundingFloor(b, x)) || sup > 0.5 * previous) break;
      previous = sup;
      krylov_->setTolerance(std::max(1e-16, std::min(0.5, 0.5 * target / residual.norm())));
      krylov_->setMaxIterations(budget);
      const Vector correction = krylov_->solve(residual);
      budget -= std::max<int64_t>(1, krylov_->iterations());
      if (!correction.allFinite()) break;
      x += correction;
    }
    return Status::Ok();
  }

  static constexpr int64_t kKrylovBudget = 300;

  Sparse a_;
  EvaluateOptions options_;
  const CancelToken* cancel_;
  bool direct_ = true;
  bool used_krylov_ = false;
  std::unique_ptr<Eigen::SparseLU<Sparse>> lu_;
  std::unique_ptr<Eigen::BiCGSTAB<Sparse, Eigen::DiagonalPreconditioner<double>>> krylov_;
};

// Nbar = max N / (1 - rho_N), the bound on the expected steps (header comment).
double StepsBound(const Vector& n, double rho_n) {
  if (n.size() == 0) return 0.0;
  return rho_n < 1.0 ? n.maxCoeff() / (1.0 - rho_n) : kInf;
}

// rho * Nbar, with 0 * inf read as 0 (an exact solve needs no bound on the steps).
double Propagated(double rho, double steps_bound) { return rho == 0.0 ? 0.0 : rho * steps_bound; }

// Evaluation state shared by the average-criterion steps below.
struct AverageWork {
  const Chain& chain;
  const EvaluateOptions& options;
  const CancelToken* cancel;
  Subset subset;
  Vector g, h;
  double class_error = 0.0;  // max over classes of e_C.
  bool krylov = false;
};

// The gain system of a class C with first state f, R = C \ {f} numbered by `subset`: unknowns
// h_R and g (last), one equation g + h(s) - sum_{s' in R} P(s, s') h(s') = r(s) per s in C
// (f's last), i.e. g + h = r + P h with h(f) = 0, which has a unique solution on a recurrent
// class (Puterman 1994, sec. 8.2, from memory).
Sparse ClassMatrix(const SparseRows& p, StateId first, const Subset& subset) {
  const int k = subset.size() + 1;
  std::vector<Eigen::Triplet<double>> triplets;
  for (int i = 0; i < k; ++i) {
    const StateId s = i < k - 1 ? subset.members()[i] : first;
    if (i < k - 1) triplets.emplace_back(i, i, 1.0);
    triplets.emplace_back(i, k - 1, 1.0);
    for (SparseRows::InnerIterator it(p, s); it; ++it) {
      const int j = subset.local(static_cast<StateId>(it.col()));
      if (j >= 0) triplets.emplace_back(i, j, -it.value());
    }
  }
  Sparse a(k, k);
  a.setFromTriplets(triplets.begin(), triplets.end());
  a.makeCompressed();
  return a;
}

// Gain and normalised bias on one recurrent class C with first state f: (g_C, h) from the
// class's gain system (ClassMatrix), whose residual is e_C; then the stationary distribution,
// mu(f) = 1 and (I - P_R)^T mu_R = P(f, R)^T (mu P = mu on C), only to shift h so that mu h = 0.
Status SolveClass(std::span<const StateId> cls, AverageWork& w) {
  const SparseRows& p = w.chain.p;
  const StateId first = cls[0];
  if (cls.size() == 1) {
    w.g[first] = w.chain.r[first];
    w.h[first] = 0.0;
  } else {
    w.subset.Set(cls.subspan(1));
    const int k = w.subset.size();
    const double target = 1e-2 * w.options.tolerance;
    Vector rhs(k + 1), x;
    for (int i = 0; i < k; ++i) rhs[i] = w.chain.r[w.subset.members()[i]];
    rhs[k] = w.chain.r[first];
    double rho = 0.0;
    SystemSolver gain(ClassMatrix(p, first, w.subset), w.options, w.cancel);
    MDP_RETURN_IF_ERROR(gain.Solve(rhs, target, x, rho));
    Vector b = Vector::Zero(k), mu;
    for (SparseRows::InnerIterator it(p, first); it; ++it) {
      const int j = w.subset.local(static_cast<StateId>(it.col()));
      if (j >= 0) b[j] += it.value();
    }
    SystemSolver stationary(SubsetMatrix(p, w.subset, true), w.options, w.cancel);
    MDP_RETURN_IF_ERROR(stationary.Solve(b, target, mu, rho));
    w.krylov = w.krylov || gain.used_krylov() || stationary.used_krylov();
    const double shift = mu.dot(x.head(k)) / (1.0 + mu.sum());
    w.g[first] = x[k];
    w.h[first] = -shift;
    for (int i = 0; i < k; ++i) {
      w.g[w.subset.members()[i]] = x[k];
      w.h[w.subset.members()[i]] = x[i] - shift;
    }
  }
  for (StateId s : cls) {  // e_C = max_C |r + P h - h - g_C| (header comment).
    const double d = w.chain.r[s] + p.row(s).dot(w.h) - w.h[s] - w.g[s];
    w.class_error = std::max(w.class_error, std::fabs(d));
  }
  return Status::Ok();
}

// Transient states T: N = A^-1 1, g_T = A^-1 P_TC g_C, h_T = A^-1 (r_T - g_T + P_TC h_C) with
// A = I - P_TT. Returns the gain error bound of the transient states in `bound`.
Status SolveTransient(std::span<const StateId> transient, AverageWork& w, double& bound) {
  bound = 0.0;
  if (transient.empty()) return Status::Ok();
  const SparseRows& p = w.chain.p;
  w.subset.Set(transient);
  const int k = w.subset.size();
  SystemSolver solver(SubsetMatrix(p, w.subset, false), w.options, w.cancel);
  // Sum of P(s, s') x(s') over the states s' outside T, per s in T.
  auto outside = [&](const Vector& x) {
    Vector out = Vector::Zero(k);
    for (int i = 0; i < k; ++i) {
      for (SparseRows::InnerIterator it(p, w.subset.members()[i]); it; ++it) {
        if (w.subset.local(static_cast<StateId>(it.col())) < 0) out[i] += it.value() * x[it.col()];
      }
    }
    return out;
  };
  Vector steps, g_t, h_t;
  double rho_n = 0.0, rho_g = 0.0, rho_h = 0.0;
  MDP_RETURN_IF_ERROR(solver.Solve(Vector::Ones(k), 1e-9, steps, rho_n));
  const double steps_bound = StepsBound(steps, rho_n);
  const double target = 0.5 * w.options.tolerance / std::max(1.0, steps_bound);
  MDP_RETURN_IF_ERROR(solver.Solve(outside(w.g), target, g_t, rho_g));
  Vector rhs = outside(w.h);
  for (int i = 0; i < k; ++i) rhs[i] += w.chain.r[w.subset.members()[i]] - g_t[i];
  MDP_RETURN_IF_ERROR(solver.Solve(rhs, target, h_t, rho_h));
  w.krylov = w.krylov || solver.used_krylov();
  for (int i = 0; i < k; ++i) {
    w.g[w.subset.members()[i]] = g_t[i];
    w.h[w.subset.members()[i]] = h_t[i];
  }
  bound = Propagated(rho_g, steps_bound);
  return Status::Ok();
}

Status EvaluateAverage(const Model& m, const Policy& policy, const EvaluateOptions& options,
                       const CancelToken* cancel, CriterionValues& out) {
  const Chain chain = BuildChain(m, policy, true);
  AverageWork w{chain, options, cancel, Subset(m.num_states()), Vector::Zero(m.num_states()),
                Vector::Zero(m.num_states())};
  out.recurrent_classes = ClosedClasses(chain.p);
  std::vector<uint8_t> recurrent(m.num_states(), 0);
  for (const std::vector<StateId>& cls : out.recurrent_classes) {
    MDP_RETURN_IF_ERROR(SolveClass(cls, w));
    for (StateId s : cls) recurrent[s] = 1;
  }
  std::vector<StateId> transient;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (!recurrent[s]) transient.push_back(s);
  }
  double transient_bound = 0.0;
  MDP_RETURN_IF_ERROR(SolveTransient(transient, w, transient_bound));
  out.gains.assign(w.g.data(), w.g.data() + w.g.size());
  out.values.assign(w.h.data(), w.h.data() + w.h.size());
  out.solver_used = w.krylov ? LinearSolver::kBiCgStab : LinearSolver::kDirect;
  const Vector gain_residual = chain.p * w.g - w.g;
  const Vector bias_residual = chain.r + chain.p * w.h - w.h - w.g;
  out.residual = std::max(SupNorm(gain_residual), SupNorm(bias_residual));
  out.gain_error_bound = w.class_error + transient_bound;
  out.value_error_bound = kNaN;
  return Status::Ok();
}

Status EvaluateTotal(const Model& m, const Policy& policy, const EvaluateOptions& options,
                     const CancelToken* cancel, CriterionValues& out) {
  const StateId n = m.num_states();
  const Chain chain = BuildChain(m, policy, false);
  std::vector<uint8_t> goal(n, 0);
  for (StateId s = 0; s < n; ++s) goal[s] = m.terminal(s) ? 1 : 0;
  // Improper iff some reachable state cannot reach a goal (header comment).
  std::vector<uint8_t> stuck = CanReach(chain.p, goal);
  for (uint8_t& x : stuck) x = !x;
  const std::vector<uint8_t> improper = CanReach(chain.p, std::move(stuck));
  out.proper.assign(n, 0);
  std::vector<StateId> solve_on;
  for (StateId s = 0; s < n; ++s) {
    out.proper[s] = !improper[s];
    if (improper[s]) out.improper_states.push_back(s);
    if (!improper[s] && !goal[s]) solve_on.push_back(s);
  }
  out.values.assign(n, kNaN);
  out.expected_steps.assign(n, kNaN);
  for (StateId s = 0; s < n; ++s) {
    if (goal[s]) out.values[s] = out.expected_steps[s] = 0.0;
  }
  if (solve_on.empty()) return Status::Ok();
  Subset subset(n);
  subset.Set(solve_on);
  const int k = subset.size();
  // No transition leaves S except to goals (value 0), so b = r_S.
  Vector r(k), steps, v;
  for (int i = 0; i < k; ++i) r[i] = chain.r[solve_on[i]];
  SystemSolver solver(SubsetMatrix(chain.p, subset, false), options, cancel);
  double rho_n = 0.0, rho_v = 0.0;
  MDP_RETURN_IF_ERROR(solver.Solve(Vector::Ones(k), 1e-9, steps, rho_n));
  const double steps_bound = StepsBound(steps, rho_n);
  MDP_RETURN_IF_ERROR(
      solver.Solve(r, options.tolerance / std::max(1.0, steps_bound), v, rho_v));
  for (int i = 0; i < k; ++i) {
    out.values[solve_on[i]] = v[i];
    out.expected_steps[solve_on[i]] = steps[i];
  }
  out.solver_used = solver.used_krylov() ? LinearSolver::kBiCgStab : LinearSolver::kDirect;
  out.residual = rho_v;
  out.value_error_bound = Propagated(rho_v, steps_bound);
  return Status::Ok();
}

Status EvaluateFiniteHorizon(const Model& m, const Policy& policy, const CancelToken* cancel,
                             CriterionValues& out) {
  const Criterion& c = m.criterion();
  const Chain chain = BuildChain(m, policy, false);  // Terminal rows empty: value 0.
  Vector v = Vector::Zero(m.num_states());
  if (c.terminal_values.size() == static_cast<size_t>(m.num_states())) {
    for (StateId s = 0; s < m.num_states(); ++s) v[s] = c.terminal_values[s];
  }
  for (int64_t t = c.horizon - 1; t >= 0; --t) {
    if (cancel != nullptr && cancel->cancelled()) {
      return Status(StatusCode::kCancelled, "cancelled during policy evaluation");
    }
    v = chain.r + c.discount * (chain.p * v);
  }
  out.values.assign(v.data(), v.data() + v.size());
  out.solver_used = LinearSolver::kSweeps;
  return Status::Ok();
}

}  // namespace

Result<CriterionValues> EvaluateUnderCriterion(const Model& m, const Policy& policy,
                                               const EvaluateOptions& options,
                                               const CancelToken* cancel) {
  MDP_RETURN_IF_ERROR(CheckPolicy(m, policy));
  CriterionValues out;
  out.criterion = m.criterion().kind;
  if (out.criterion == CriterionKind::kDiscounted) {
    Result<PolicyValues> v = EvaluatePolicy(m, policy, options, cancel);
    if (!v.ok()) return v.status();
    out.values = std::move(v->values);
    out.solver_used = v->solver_used;
    out.residual = v->residual;
    out.value_error_bound = v->value_error_bound;
    return out;
  }
  // The one place where allocation failure in these evaluations becomes a Status.
  try {
    switch (out.criterion) {
      case CriterionKind::kFiniteHorizon:
        MDP_RETURN_IF_ERROR(EvaluateFiniteHorizon(m, policy, cancel, out));
        break;
      case CriterionKind::kAverage:
        MDP_RETURN_IF_ERROR(EvaluateAverage(m, policy, options, cancel, out));
        break;
      case CriterionKind::kTotal:
        MDP_RETURN_IF_ERROR(EvaluateTotal(m, policy, options, cancel, out));
        break;
      case CriterionKind::kDiscounted: break;
    }
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory during policy evaluation");
  }
  return out;
}

}  // namespace mdp
