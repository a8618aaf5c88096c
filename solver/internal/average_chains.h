// Chain structure and exact evaluation of a deterministic stationary policy under the
// average-reward criterion: the pieces solver/average_reward.cc builds its methods from.
// Pure functions over caller-owned values; thread-safe on immutable models. A terminal state
// counts as absorbing with reward 0 per step. Internal: the server never includes this.
#ifndef MDP_SOLVER_INTERNAL_AVERAGE_CHAINS_H_
#define MDP_SOLVER_INTERNAL_AVERAGE_CHAINS_H_

#include <cstdint>
#include <limits>
#include <span>
#include <vector>

#include "solver/internal/mmatrix_lu.h"
#include "solver/internal/row_dot.h"
#include "solver/internal/stop_check.h"
#include "solver/model.h"
#include "solver/status.h"

namespace mdp::internal {

// Strongly connected components of a graph on the states, numbered so that every edge goes
// to a component with the same or a smaller number.
struct Components {
  std::vector<int32_t> of;  // Per state.
  int32_t count = 0;
};

// Components of the graph with an edge s -> s' whenever some row of s has an entry for s'.
Components AllActionComponents(const Model& m);

struct ChainStructure {
  std::vector<std::vector<StateId>> classes;  // Recurrent classes, each sorted, by first state.
  std::vector<int32_t> class_of;              // Per state: its class, or -1 if transient.
};

// The recurrent classes (closed strongly connected components) of the chain of the policy
// `rows`. REQUIRES: rows.size() == m.num_states(); rows[s] is a row of s, or -1 exactly for
// terminal states (each then a class by itself).
ChainStructure AnalyseChain(const Model& m, std::span<const RowId> rows);

// The gain and a bias of one deterministic stationary policy.
struct AverageEvaluation {
  ChainStructure chain;
  std::vector<double> class_gain;  // Per recurrent class.
  std::vector<double> gain;        // Per state: g = P g, the class gain on each class.
  std::vector<double> bias;        // Per state; 0 at the smallest state of each class.
  // Per state: its stationary probability within its class where a factored solve found it
  // (classes above EvaluateOptions().direct_max_states states), else 0. The next
  // evaluation anchors its solve at the most visited state (see the .cc).
  std::vector<double> stationary;
  // A bound on max_s |gain(s) - g^pi(s)| from the solves' residuals (without the rounding
  // in computing them); may be +infinity.
  double gain_error = 0.0;
  // The fewest unknowns of a system whose factors this evaluation (or one it followed)
  // declined, else the largest int32_t. An evaluation given this one as `previous` solves
  // systems at least as large by BiCGSTAB without planning factors.
  int32_t declined_factor_size = std::numeric_limits<int32_t>::max();
  // The fewest unknowns of a system on which BiCGSTAB missed its target in this evaluation
  // (or one it followed) and factors took over, else the largest int32_t. An evaluation
  // given this one as `previous` factors systems at least as large first whenever the
  // factors fit the memory budget (whatever their work; planning them even where
  // declined_factor_size says not to).
  int32_t missed_iterative_size = std::numeric_limits<int32_t>::max();
};

// How a system of EvaluateAverage is solved.
enum class AverageSolver {
  kSmallLu,    // Up to EvaluateOptions().direct_max_states unknowns: Eigen's sparse LU.
  kFactored,   // Beyond: MMatrixLu (internal/mmatrix_lu.h), when its factors fit the budget.
  kIterative,  // Beyond, when they do not: BiCGSTAB.
};

// What EvaluateAverage did, for tests and measurements.
struct AverageSolveCounts {
  int64_t small_lu = 0;  // Systems solved by each solver (a system that fell back from
  int64_t factored = 0;  // BiCGSTAB to factors counts under both).
  int64_t iterative = 0;
  int64_t reanchored = 0;  // Factorisations redone at another anchor (average_chains.cc).
};

// The factored solver is used beyond EvaluateOptions().direct_max_states unknowns iff its
// factors take at most FactorBudgetBytes(m) and at most kFactorWorkPerEntry multiply-adds
// per entry of the system plus kFactorWorkFloor (about 500 BiCGSTAB iterations' work, which
// a badly conditioned system easily needs). When BiCGSTAB then misses its target, the
// factors are used if they fit the memory budget, whatever the work, and from the next
// evaluation on systems as large are factored first (AverageEvaluation::missed_iterative_size).
inline constexpr double kFactorWorkPerEntry = 2000.0;
inline constexpr double kFactorWorkFloor = 1e9;
// Four times the bytes of the model's transitions (next state and probability per entry),
// and at least 512 MiB. The total criterion's factored evaluations (total_reward.cc) share it.
double FactorBudgetBytes(const Model& m);
// Whether the factors of `plan` are to be used for a system of `entries` entries: they fit
// the memory budget and, when `mind_work`, the work budget above.
bool FactorsFit(const FactorPlan& plan, int64_t entries, double budget_bytes, bool mind_work);

// Solves (I - P) g = 0, g + (I - P) h = r for the policy `rows` (as AnalyseChain), with
// h = 0 at the smallest state of each recurrent class, which makes the solution unique
// (Puterman 1994, Markov Decision Processes, sec. 8.2 and 9.2, from memory). Each system is
// solved as AverageSolver says; BiCGSTAB aims at sup-norm residual `target`.
// `previous` (may be empty) is a warm start and gives the anchors of the factored solves.
// Returns kCancelled or kDeadlineExceeded when `stop` says so (polled inside factorisations
// and between rounds of BiCGSTAB), kInternal if a linear solve fails. `counts` may be null.
// Factorisations run on up to `threads` threads (>= 1, as resolved; MMatrixLu::Factorize,
// the same results on any number).
Status EvaluateAverage(const Model& m, std::span<const RowId> rows, double target,
                       const StopCheck& stop, const AverageEvaluation& previous,
                       AverageEvaluation& out, AverageSolveCounts* counts = nullptr,
                       int threads = 1);

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_AVERAGE_CHAINS_H_
