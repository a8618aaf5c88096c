#include "solver/options.h"

#include <sched.h>

#include <algorithm>
#include <cmath>
#include <string>
#include <thread>

namespace mdp {
namespace {

Status CheckBound(const OptionBound& bound, double value) {
  if (!(value >= bound.min && value <= bound.max)) {
    return InvalidArgumentError("option " + std::string(bound.name) + " must be between " +
                                std::to_string(bound.min) + " and " + std::to_string(bound.max) +
                                ", got " + std::to_string(value));
  }
  return Status::Ok();
}

}  // namespace

int UsableCpuCount() {
#ifdef __linux__
  cpu_set_t set;
  CPU_ZERO(&set);
  if (sched_getaffinity(0, sizeof(set), &set) == 0 && CPU_COUNT(&set) > 0) {
    return CPU_COUNT(&set);
  }
#endif
  return static_cast<int>(std::max(1u, std::thread::hardware_concurrency()));
}

Status CheckSolveOptions(const SolveOptions& o) {
  const double values[] = {o.tolerance,
                           static_cast<double>(o.max_iterations),
                           o.time_limit_seconds,
                           static_cast<double>(o.evaluation_sweeps),
                           o.tie_tolerance,
                           static_cast<double>(o.threads)};
  for (size_t i = 0; i < kSolveOptionBounds.size(); ++i) {
    MDP_RETURN_IF_ERROR(CheckBound(kSolveOptionBounds[i], values[i]));
  }
  return Status::Ok();
}

std::string_view MethodName(Method method) {
  switch (method) {
    case Method::kAuto: return "auto";
    case Method::kValueIteration: return "value_iteration";
    case Method::kGaussSeidel: return "gauss_seidel";
    case Method::kPolicyIteration: return "policy_iteration";
    case Method::kModifiedPolicyIteration: return "modified_policy_iteration";
    case Method::kRelativeValueIteration: return "relative_value_iteration";
    case Method::kBackwardInduction: return "backward_induction";
  }
  return "unknown";
}

std::optional<Method> ParseMethod(std::string_view name) {
  for (Method m : {Method::kAuto, Method::kValueIteration, Method::kGaussSeidel,
                   Method::kPolicyIteration, Method::kModifiedPolicyIteration,
                   Method::kRelativeValueIteration, Method::kBackwardInduction}) {
    if (MethodName(m) == name) return m;
  }
  return std::nullopt;
}

std::string_view LinearSolverName(LinearSolver solver) {
  switch (solver) {
    case LinearSolver::kAuto: return "auto";
    case LinearSolver::kDirect: return "direct";
    case LinearSolver::kBiCgStab: return "bicgstab";
    case LinearSolver::kSweeps: return "sweeps";
  }
  return "unknown";
}

std::optional<LinearSolver> ParseLinearSolver(std::string_view name) {
  for (LinearSolver s : {LinearSolver::kAuto, LinearSolver::kDirect, LinearSolver::kBiCgStab,
                         LinearSolver::kSweeps}) {
    if (LinearSolverName(s) == name) return s;
  }
  return std::nullopt;
}

}  // namespace mdp
