// Small models for solver tests: seeded random models for property tests, and helpers to
// write models down in a few lines. Models with known answers name their source where
// they are used (tests/solver/references_test.cc).
#ifndef MDP_TESTS_TESTING_TEST_MODELS_H_
#define MDP_TESTS_TESTING_TEST_MODELS_H_

#include <cstdint>
#include <string>
#include <vector>

#include "solver/model.h"
#include "solver/options.h"
#include "solver/solution.h"
#include "solver/model_spec.h"
#include "solver/policy.h"

namespace mdp::testing {

struct RandomModelOptions {
  StateId states = 50;
  int max_actions = 4;      // Per state, at least 1.
  int max_outcomes = 6;     // Per state action, at least 1.
  double terminal_fraction = 0.1;
  double discount = 0.9;
  Objective objective = Objective::kMaximize;
  double reward_scale = 10.0;
};

// A seeded random model spec: same seed, same model.
ModelSpec RandomSpec(uint64_t seed, const RandomModelOptions& options);

// Builds a Model from `spec`; aborts the test binary if the spec is invalid.
Model MustBuild(const ModelSpec& spec);

inline constexpr Method kAllMethods[] = {Method::kValueIteration, Method::kGaussSeidel,
                                         Method::kPolicyIteration,
                                         Method::kModifiedPolicyIteration};

// Solves `m` with `method` to `tolerance`; records a test failure if the call fails.
Solution MustSolve(const Model& m, Method method = Method::kPolicyIteration,
                   double tolerance = 1e-10);

// A criterion of `kind` with the given discount and horizon (other fields default).
Criterion CriterionOf(CriterionKind kind, double discount = 1.0, int64_t horizon = 0);

// A seeded stochastic policy: random weights over each state's rows, about a third of them 0.
Policy RandomPolicy(const Model& m, uint64_t seed);

// n seeded values drawn uniformly from [lo, hi): inputs for sweeps and products.
std::vector<double> SomeValues(StateId n, uint64_t seed, double lo = -50.0, double hi = 50.0);

// A one-line outcome list entry for SpecWriter.
struct Out {
  std::string next;
  double probability;
  double reward = 0.0;
};

// Writes a model down by names: AddState / AddAction in order.
class SpecWriter {
 public:
  SpecWriter(double discount, Objective objective);
  // Declares states up front so outcomes can name states defined later.
  SpecWriter& States(const std::vector<std::string>& names, const std::vector<bool>& terminal);
  // Adds an action to state `state` (already declared).
  SpecWriter& Action(const std::string& state, const std::string& action, std::vector<Out> outs,
                     double reward = 0.0);
  ModelSpec Spec() const;
  Model Build() const { return MustBuild(Spec()); }

 private:
  struct PendingAction {
    std::string action;
    std::vector<Out> outs;
    double reward;
  };

  double discount_;
  Objective objective_;
  std::vector<std::string> names_;
  std::vector<bool> terminal_;
  std::vector<std::vector<PendingAction>> actions_;
};

// The model `w` writes, under `criterion` instead of its own.
Model WithCriterion(const SpecWriter& w, Criterion criterion);

}  // namespace mdp::testing

#endif  // MDP_TESTS_TESTING_TEST_MODELS_H_
