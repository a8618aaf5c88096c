#include "solver/solver.h"

#include <new>

#include "solver/policy_iteration.h"
#include "solver/value_iteration.h"

namespace mdp {

Result<Solution> Solve(const Model& m, const SolveOptions& options, const ProgressFn* progress,
                       const CancelToken* cancel) {
  MDP_RETURN_IF_ERROR(CheckSolveOptions(options));
  // The one place where allocation failure inside the solver becomes a Status.
  try {
    switch (options.method) {
      case Method::kValueIteration: return ValueIteration(m, options, progress, cancel);
      case Method::kGaussSeidel:
        return GaussSeidelValueIteration(m, options, progress, cancel);
      case Method::kPolicyIteration: return PolicyIteration(m, options, progress, cancel);
      case Method::kModifiedPolicyIteration:
        return ModifiedPolicyIteration(m, options, progress, cancel);
    }
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory while solving");
  }
  return InvalidArgumentError("unknown solve method");
}

}  // namespace mdp
