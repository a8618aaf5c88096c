// The stored form of a Solution: a versioned little-endian binary blob, so a solved
// Q-table of millions of rows is written and read back without JSON. Layout (version 1, and
// the start of version 2; see solution_blob.cc for the criterion section version 2 appends):
//   "MDPS" u32 version
//   u32 method, u32 outcome, i64 iterations, i64 sweeps,
//   f64 residual, value_error_bound, q_error_bound, policy_loss_bound, tie_tolerance,
//       solve_seconds,
//   options: u32 method, f64 tolerance, i64 max_iterations, f64 time_limit_seconds,
//       i64 evaluation_sweeps, u32 linear_solver, f64 tie_tolerance, i32 threads,
//   i64 tied_states, i64 states S, i64 rows R,
//   f64[S] values, f64[R] q, i64[S] best_row, u8[R] optimal_row, f64[S] action_gap.
// Stateless; thread-safe.
#ifndef MDP_SERVER_SOLUTION_BLOB_H_
#define MDP_SERVER_SOLUTION_BLOB_H_

#include <string>
#include <string_view>

#include "solver/solution.h"
#include "solver/status.h"

namespace mdp::server {

std::string EncodeSolutionBlob(const Solution& solution);

// Returns kInternal if the blob is truncated, of another version, or does not match the
// model's sizes (states, rows).
Result<Solution> DecodeSolutionBlob(std::string_view blob, int64_t states, int64_t rows);

// Approximate bytes a Solution holds in memory, for cache accounting.
int64_t SolutionByteSize(const Solution& solution);

}  // namespace mdp::server

#endif  // MDP_SERVER_SOLUTION_BLOB_H_
