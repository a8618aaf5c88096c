// SolveOptions: how to solve a model. One plain struct with documented defaults, and a
// table of the numeric fields' bounds (kSolveOptionBounds) used to check requests and to
// describe the options in api-schema/. Values only; thread-safe to copy.
#ifndef MDP_SOLVER_OPTIONS_H_
#define MDP_SOLVER_OPTIONS_H_

#include <array>
#include <optional>
#include <string_view>

#include "solver/status.h"

namespace mdp {

// Which methods apply depends on the model's criterion (Solve() says so when one does not):
//   discounted:      value_iteration, gauss_seidel, policy_iteration, modified_policy_iteration
//   average:         relative_value_iteration, policy_iteration
//   finite_horizon:  backward_induction
//   total:           policy_iteration
// kAuto picks policy_iteration, or backward_induction for finite_horizon; for average, above
// 3,000 states, relative value iteration first while it converges fast, then policy iteration
// (AverageRewardAutomatic in average_reward.h; the solution says which method answered).
enum class Method {
  kAuto,                     // The criterion's default (above).
  kValueIteration,           // Synchronous (Jacobi) value iteration.
  kGaussSeidel,              // In-place value iteration, states in index order.
  kPolicyIteration,          // Exact evaluation + greedy improvement until stable.
  kModifiedPolicyIteration,  // `evaluation_sweeps` partial evaluation sweeps per improvement.
  kRelativeValueIteration,   // Average criterion: value iteration normalised at a state.
  kBackwardInduction,        // Finite horizon: one exact backup per stage, last stage first.
};

// How a policy's values are computed exactly: (I - g P_pi) V = r_pi.
enum class LinearSolver {
  kAuto,      // kDirect up to EvaluateOptions::direct_max_states states, else kBiCgStab.
  kDirect,    // Sparse LU (Eigen SparseLU).
  kBiCgStab,  // Krylov iteration (BiCGSTAB) + refinement; in discounted policy iteration an
              // inexact, warm-started one (policy_iteration.h).
  kSweeps,    // Repeated application of the policy's Bellman operator (a contraction).
};

// Whether Solve() may renumber states internally for memory locality (solver/internal/
// renumber.h). Internal: not part of model or request documents, never encoded; answers are
// the same up to rounding either way. Only the discounted criterion renumbers.
enum class Renumber {
  kAuto,  // When the model is large and the locality score says the new order pays.
  kOff,   // Never (the document's order).
  kOn,    // Always (tests and benchmarks).
};

struct SolveOptions {
  Method method = Method::kAuto;  // Default: exact, few iterations (policy iteration).
  double tolerance = 1e-8;        // Target bound on sup |V - V*| (in reward units).
  int64_t max_iterations = 100000;  // Outcome kIterationLimit when reached.
  double time_limit_seconds = 0.0;  // 0 means no limit; else outcome kTimeLimit.
  int64_t evaluation_sweeps = 20;   // Modified policy iteration: sweeps per improvement.
  LinearSolver linear_solver = LinearSolver::kAuto;  // Policy iteration's evaluation.
  double tie_tolerance = 1e-9;    // Extra slack (reward units) when grouping tied actions.
  // Threads for sweeps. 0 = automatic: every hardware thread for models with at least
  // kAutoThreadsMinEntries transitions, else 1 (starting threads costs more than a sweep of
  // a small model). Solve() resolves it; Solution::options says what was used.
  int threads = 0;
  // Internal (see Renumber). Solve() resolves kAuto; Solution::options says what was done.
  Renumber renumber = Renumber::kAuto;
};

// Models with at least this many transitions (CSR entries) sweep on every usable CPU
// (UsableCpuCount) when SolveOptions::threads is 0.
inline constexpr int64_t kAutoThreadsMinEntries = int64_t{1} << 18;

// CPUs the calling thread may run on: the count in its affinity mask (taskset, a container's
// cpuset), which can be fewer than the machine's online CPUs; the online count where the
// mask cannot be read. At least 1.
int UsableCpuCount();

struct OptionBound {
  std::string_view name;
  std::string_view description;
  double default_value;
  double min;
  double max;
};

// Bounds of the numeric SolveOptions fields, in declaration order.
inline constexpr std::array<OptionBound, 6> kSolveOptionBounds = {{
    {"tolerance", "target bound on the sup-norm distance of the values to the optimum", 1e-8,
     1e-14, 1e6},
    {"max_iterations", "iteration cap; the outcome says iteration_limit when reached", 100000,
     1, 1e9},
    {"time_limit_seconds", "wall-clock limit in seconds, 0 for none", 0, 0, 1e7},
    {"evaluation_sweeps", "modified policy iteration: evaluation sweeps per improvement", 20, 1,
     1e6},
    {"tie_tolerance", "extra slack when grouping actions as tied, in reward units", 1e-9, 0,
     1e6},
    {"threads", "threads for sweeps; 0 = automatic (all cores from 262144 transitions)", 0, 0,
     256},
}};

// Returns kInvalidArgument naming the field if any option is out of its bounds.
Status CheckSolveOptions(const SolveOptions& options);

std::string_view MethodName(Method method);          // "policy_iteration", ...
std::optional<Method> ParseMethod(std::string_view name);
std::string_view LinearSolverName(LinearSolver solver);  // "auto", "direct", "bicgstab", ...
std::optional<LinearSolver> ParseLinearSolver(std::string_view name);

}  // namespace mdp

#endif  // MDP_SOLVER_OPTIONS_H_
