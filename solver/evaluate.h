// Exact policy evaluation: solves (I - g P_pi) V = r_pi for a fixed policy, then measures
// the true residual and states the error bound it implies. Pure function; thread-safe;
// returns values the caller owns.
//
// Bound: for any x, sup|x - V^pi| <= sup|(I - g P_pi) x - r_pi| / (1 - g), because
// (I - g P_pi)^-1 = sum_k (g P_pi)^k has sup-norm at most 1 / (1 - g) (common practice;
// the Neumann series of a substochastic matrix).
#ifndef MDP_SOLVER_EVALUATE_H_
#define MDP_SOLVER_EVALUATE_H_

#include <span>
#include <vector>

#include "solver/model.h"
#include "solver/options.h"
#include "solver/policy.h"
#include "solver/progress.h"
#include "solver/status.h"

namespace mdp {

struct EvaluateOptions {
  LinearSolver solver = LinearSolver::kAuto;
  StateId direct_max_states = 3000;  // kAuto uses sparse LU up to this many states.
  double tolerance = 1e-10;          // Target bound on sup |V - V^pi|.
  int64_t max_iterations = 100000;   // Krylov iterations or sweeps.
  int threads = 1;                   // 0 = all cores.
};

struct PolicyValues {
  std::vector<double> values;  // V^pi per state.
  LinearSolver solver_used = LinearSolver::kDirect;  // kSweeps if BiCGSTAB had to fall back.
  double residual = 0.0;           // sup |(I - g P_pi) V - r_pi|.
  double value_error_bound = 0.0;  // residual / (1 - g).
  int64_t iterations = 0;          // Krylov iterations or sweeps spent.
};

// Evaluates `policy` on `m`. `warm_start` (may be empty) seeds the iterative solvers.
// Returns kInvalidArgument if the policy is malformed, kCancelled if `cancel` fired,
// kResourceExhausted if memory runs out.
Result<PolicyValues> EvaluatePolicy(const Model& m, const Policy& policy,
                                    const EvaluateOptions& options,
                                    const CancelToken* cancel = nullptr,
                                    std::span<const double> warm_start = {});

}  // namespace mdp

#endif  // MDP_SOLVER_EVALUATE_H_
