// Chain structure and exact evaluation of a deterministic stationary policy under the
// average-reward criterion: the pieces solver/average_reward.cc builds its methods from.
// Pure functions over caller-owned values; thread-safe on immutable models. A terminal state
// counts as absorbing with reward 0 per step. Internal: the server never includes this.
#ifndef MDP_SOLVER_INTERNAL_AVERAGE_CHAINS_H_
#define MDP_SOLVER_INTERNAL_AVERAGE_CHAINS_H_

#include <cstdint>
#include <span>
#include <vector>

#include "solver/model.h"
#include "solver/progress.h"
#include "solver/status.h"

namespace mdp::internal {

// sum_s' p(s' | row r) x(s').
inline double RowExpectation(const Model& m, RowId r, const double* x) {
  const int64_t* begin = m.row_entry_begin_data();
  const StateId* next = m.entry_next_data();
  const double* prob = m.entry_probability_data();
  double acc = 0.0;
  for (int64_t e = begin[r], end = begin[r + 1]; e < end; ++e) acc += prob[e] * x[next[e]];
  return acc;
}

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
  // A bound on max_s |gain(s) - g^pi(s)| from the solves' residuals (without the rounding
  // in computing them); may be +infinity.
  double gain_error = 0.0;
};

// Solves (I - P) g = 0, g + (I - P) h = r for the policy `rows` (as AnalyseChain), with
// h = 0 at the smallest state of each recurrent class, which makes the solution unique
// (Puterman 1994, Markov Decision Processes, sec. 8.2 and 9.2, from memory). Sparse LU up
// to EvaluateOptions().direct_max_states unknowns, BiCGSTAB (aiming at sup-norm residual
// `target`, falling back to LU) beyond. `previous` (may be empty) is a warm start.
// Returns kCancelled if `cancel` (may be null) fires during an iterative solve, kInternal if
// a linear solve fails.
Status EvaluateAverage(const Model& m, std::span<const RowId> rows, double target,
                       const CancelToken* cancel, const AverageEvaluation& previous,
                       AverageEvaluation& out);

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_AVERAGE_CHAINS_H_
