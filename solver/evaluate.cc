#include "solver/evaluate.h"

#include <Eigen/IterativeLinearSolvers>
#include <Eigen/SparseCore>
#include <Eigen/SparseLU>
#include <algorithm>
#include <cmath>
#include <new>

#include "solver/internal/bellman.h"

namespace mdp {
namespace {

using Vector = Eigen::VectorXd;

struct LinearSystem {
  Eigen::SparseMatrix<double, Eigen::RowMajor> a;  // I - g P_pi.
  Vector b;                                         // r_pi.
};

LinearSystem Assemble(const Model& m, const Policy& policy) {
  const double g = m.discount();
  std::vector<Eigen::Triplet<double, int64_t>> triplets;
  triplets.reserve(static_cast<size_t>(m.num_states()) * 2 + static_cast<size_t>(m.num_entries() /
                   std::max<RowId>(1, m.num_rows()) * m.num_states()));
  LinearSystem sys;
  sys.b = Vector::Zero(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) {
    triplets.emplace_back(s, s, 1.0);
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      const double w = policy.row_probability[r];
      if (w == 0.0) continue;
      sys.b[s] += w * m.row_reward(r);
      for (int64_t e = m.entry_begin(r); e < m.entry_end(r); ++e) {
        triplets.emplace_back(s, m.entry_next(e), -g * w * m.entry_probability(e));
      }
    }
  }
  sys.a.resize(m.num_states(), m.num_states());
  sys.a.setFromTriplets(triplets.begin(), triplets.end());
  sys.a.makeCompressed();
  return sys;
}

double SupResidual(const LinearSystem& sys, const Vector& x) {
  if (x.size() == 0) return 0.0;
  return (sys.a * x - sys.b).lpNorm<Eigen::Infinity>();
}

Status Direct(const LinearSystem& sys, PolicyValues& out, Vector& x) {
  Eigen::SparseMatrix<double> col_major = sys.a;
  Eigen::SparseLU<Eigen::SparseMatrix<double>> lu;
  lu.analyzePattern(col_major);
  lu.factorize(col_major);
  if (lu.info() != Eigen::Success) return InternalError("sparse LU factorisation failed");
  x = lu.solve(sys.b);
  x += lu.solve(Vector(sys.b - sys.a * x));  // One step of iterative refinement.
  out.iterations = 1;
  return Status::Ok();
}

Status Krylov(const LinearSystem& sys, const EvaluateOptions& options, double g,
              const CancelToken* cancel, PolicyValues& out, Vector& x) {
  Eigen::BiCGSTAB<Eigen::SparseMatrix<double, Eigen::RowMajor>, Eigen::DiagonalPreconditioner<double>>
      solver;
  solver.compute(sys.a);
  const double target_residual = options.tolerance * (1.0 - g);
  // Refinement rounds: solve for the correction against the true residual each time, so
  // that drift in BiCGSTAB's recursive residual cannot hide error.
  for (int round = 0; round < 6; ++round) {
    if (cancel != nullptr && cancel->cancelled()) {
      return Status(StatusCode::kCancelled, "cancelled during policy evaluation");
    }
    const Vector residual = sys.b - sys.a * x;
    const double sup = residual.lpNorm<Eigen::Infinity>();
    if (sup <= target_residual) break;
    const double norm2 = residual.norm();
    solver.setTolerance(std::max(1e-16, std::min(0.5, target_residual / norm2 * 0.5)));
    solver.setMaxIterations(std::max<int64_t>(1, options.max_iterations - out.iterations));
    const Vector correction = solver.solveWithGuess(residual, Vector::Zero(x.size()));
    out.iterations += solver.iterations();
    if (!correction.allFinite()) return InternalError("BiCGSTAB produced non-finite values");
    x += correction;
    if (out.iterations >= options.max_iterations) break;
  }
  return Status::Ok();
}

Status Sweeps(const Model& m, const Policy& policy, const EvaluateOptions& options,
              const CancelToken* cancel, PolicyValues& out, Vector& x) {
  // V <- r_pi + g P_pi V is a g-contraction; stop when g d / (1 - g) meets the tolerance.
  const double g = m.discount();
  Vector next(x.size());
  for (out.iterations = 0; out.iterations < options.max_iterations; ++out.iterations) {
    if (cancel != nullptr && cancel->cancelled()) {
      return Status(StatusCode::kCancelled, "cancelled during policy evaluation");
    }
    double diff = 0.0;
    for (StateId s = 0; s < m.num_states(); ++s) {
      double v = 0.0;
      for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
        const double w = policy.row_probability[r];
        if (w != 0.0) v += w * internal::RowQ(m, r, x.data());
      }
      diff = std::max(diff, std::fabs(v - x[s]));
      next[s] = v;
    }
    x.swap(next);
    if (g == 0.0 || g * diff / (1.0 - g) <= options.tolerance) {
      ++out.iterations;
      break;
    }
  }
  return Status::Ok();
}

}  // namespace

Result<PolicyValues> EvaluatePolicy(const Model& m, const Policy& policy,
                                    const EvaluateOptions& options, const CancelToken* cancel,
                                    std::span<const double> warm_start) {
  MDP_RETURN_IF_ERROR(CheckPolicy(m, policy));
  try {
    const double g = m.discount();
    PolicyValues out;
    out.solver_used = options.solver;
    if (out.solver_used == LinearSolver::kAuto) {
      out.solver_used = m.num_states() <= options.direct_max_states ? LinearSolver::kDirect
                                                                     : LinearSolver::kBiCgStab;
    }
    Vector x = Vector::Zero(m.num_states());
    if (warm_start.size() == static_cast<size_t>(m.num_states())) {
      for (StateId s = 0; s < m.num_states(); ++s) x[s] = warm_start[s];
    }
    Status status;
    if (out.solver_used == LinearSolver::kSweeps) {
      status = Sweeps(m, policy, options, cancel, out, x);
      if (!status.ok()) return status;
      out.residual = SupResidual(Assemble(m, policy), x);
    } else {
      const LinearSystem sys = Assemble(m, policy);
      const Vector start = x;
      status = out.solver_used == LinearSolver::kDirect
                   ? Direct(sys, out, x)
                   : Krylov(sys, options, g, cancel, out, x);
      if (status.code() == StatusCode::kCancelled) return status;
      if (status.ok() && x.allFinite()) out.residual = SupResidual(sys, x);
      // BiCGSTAB can break down (seen on chain-shaped policies) or stall above the target;
      // the policy's operator is a g-contraction, so sweeps always get there: fall back to
      // them, from the Krylov iterate when it is usable.
      const bool failed = !status.ok() || !x.allFinite();
      if (out.solver_used == LinearSolver::kBiCgStab &&
          (failed || out.residual / (1.0 - g) > 1e3 * options.tolerance)) {
        if (failed) x = start;
        out.solver_used = LinearSolver::kSweeps;
        status = Sweeps(m, policy, options, cancel, out, x);
        if (!status.ok()) return status;
        out.residual = SupResidual(sys, x);
      } else if (!status.ok()) {
        return status;
      }
    }
    out.value_error_bound = out.residual / (1.0 - g);
    out.values.assign(x.data(), x.data() + x.size());
    return out;
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory during policy evaluation");
  }
}

}  // namespace mdp
