// What every fuzz target does with a model document that decoded: the properties a hostile
// but valid document must keep (tests/fuzz/README.md). Each check aborts the process (libFuzzer
// then keeps the input as a crash) when a property fails, with a message saying which.
#ifndef MDP_TESTS_FUZZ_FUZZ_CHECKS_H_
#define MDP_TESTS_FUZZ_FUZZ_CHECKS_H_

#include <string_view>

#include "solver/model.h"
#include "solver/model_spec.h"

namespace mdp::fuzz {

// Prints "fuzz check failed: <what>" to stderr and aborts.
[[noreturn]] void Fail(std::string_view what);

// The canonical document of `spec` decodes again, in the object encoding, to a model with the
// same canonical document (one model, one id).
void CheckCanonicalRoundTrip(const ModelSpec& spec);

// Solves `m` with every method its criterion allows (small caps on iterations and time, one
// thread) and checks each Solution's shape: one value per state, finite values where the
// outcome is converged, each state's optimal set non-empty and within its actions; then
// verifies the first converged solution's values against the model. Models over
// kMaxSolvedStates states are skipped (the fuzzer's inputs stay small).
inline constexpr int64_t kMaxSolvedStates = 200;
void CheckSolves(const Model& m);

}  // namespace mdp::fuzz

#endif  // MDP_TESTS_FUZZ_FUZZ_CHECKS_H_
