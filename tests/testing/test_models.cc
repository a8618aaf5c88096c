#include "tests/testing/test_models.h"

#include <gtest/gtest.h>

#include <algorithm>
#include <cstdlib>
#include <iostream>
#include <numeric>
#include <random>

#include "solver/solver.h"

namespace mdp::testing {

ModelSpec RandomSpec(uint64_t seed, const RandomModelOptions& o) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> unit(0.0, 1.0);
  ModelSpec spec;
  spec.name = "random-" + std::to_string(seed);
  spec.objective = o.objective;
  spec.criterion.discount = o.discount;
  for (int a = 0; a < o.max_actions; ++a) spec.action_names.push_back("a" + std::to_string(a));
  std::vector<uint8_t> terminal(o.states);
  for (StateId s = 0; s < o.states; ++s) terminal[s] = s > 0 && unit(rng) < o.terminal_fraction;
  for (StateId s = 0; s < o.states; ++s) {
    spec.AddState("s" + std::to_string(s), terminal[s] != 0);
    if (terminal[s]) continue;
    std::vector<ActionId> actions(o.max_actions);
    std::iota(actions.begin(), actions.end(), 0);
    std::shuffle(actions.begin(), actions.end(), rng);
    const int count = 1 + static_cast<int>(rng() % o.max_actions);
    for (int k = 0; k < count; ++k) {
      spec.AddStateAction(actions[k], unit(rng) < 0.3 ? o.reward_scale * (unit(rng) - 0.5) : 0.0);
      const int outcomes = 1 + static_cast<int>(rng() % o.max_outcomes);
      std::vector<double> p(outcomes);
      for (double& x : p) x = unit(rng) + 1e-3;
      const double sum = std::accumulate(p.begin(), p.end(), 0.0);
      for (int j = 0; j < outcomes; ++j) {
        spec.AddOutcome(static_cast<StateId>(rng() % o.states), p[j] / sum,
                        o.reward_scale * (2.0 * unit(rng) - 1.0));
      }
    }
  }
  return spec;
}

Model MustBuild(const ModelSpec& spec) {
  Result<Model> model = BuildModel(spec);
  if (!model.ok()) {
    std::cerr << "test model is invalid: " << model.status().ToString() << "\n";
    std::abort();
  }
  return std::move(*model);
}

Solution MustSolve(const Model& m, Method method, double tolerance) {
  SolveOptions options;
  options.method = method;
  options.tolerance = tolerance;
  Result<Solution> solution = Solve(m, options);
  if (!solution.ok()) {
    ADD_FAILURE() << "solve failed: " << solution.status().ToString();
    return Solution();
  }
  return std::move(*solution);
}

SpecWriter::SpecWriter(double discount, Objective objective)
    : discount_(discount), objective_(objective) {}

SpecWriter& SpecWriter::States(const std::vector<std::string>& names,
                               const std::vector<bool>& terminal) {
  names_ = names;
  terminal_ = terminal;
  terminal_.resize(names_.size(), false);
  actions_.assign(names_.size(), {});
  return *this;
}

SpecWriter& SpecWriter::Action(const std::string& state, const std::string& action,
                               std::vector<Out> outs, double reward) {
  const auto it = std::find(names_.begin(), names_.end(), state);
  if (it == names_.end()) {
    std::cerr << "SpecWriter: unknown state " << state << "\n";
    std::abort();
  }
  actions_[it - names_.begin()].push_back({action, std::move(outs), reward});
  return *this;
}

ModelSpec SpecWriter::Spec() const {
  ModelSpec spec;
  spec.name = "test";
  spec.objective = objective_;
  spec.criterion.discount = discount_;
  for (size_t s = 0; s < names_.size(); ++s) {
    spec.AddState(names_[s], terminal_[s]);
    for (const PendingAction& a : actions_[s]) {
      spec.AddStateAction(spec.InternAction(a.action), a.reward);
      for (const Out& o : a.outs) {
        const auto it = std::find(names_.begin(), names_.end(), o.next);
        spec.AddOutcome(it == names_.end() ? -1 : static_cast<StateId>(it - names_.begin()),
                        o.probability, o.reward);
      }
    }
  }
  return spec;
}

Criterion CriterionOf(CriterionKind kind, double discount, int64_t horizon) {
  Criterion c;
  c.kind = kind;
  c.discount = discount;
  c.horizon = horizon;
  return c;
}

std::vector<double> SomeValues(StateId n, uint64_t seed, double lo, double hi) {
  std::mt19937_64 rng(seed);
  std::uniform_real_distribution<double> u(lo, hi);
  std::vector<double> v(n);
  for (double& x : v) x = u(rng);
  return v;
}

Policy RandomPolicy(const Model& m, uint64_t seed) {
  std::mt19937_64 rng(seed);
  Policy p;
  p.row_probability.assign(m.num_rows(), 0.0);
  for (StateId s = 0; s < m.num_states(); ++s) {
    double sum = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      const double w = rng() % 3 == 0 ? 0.0 : static_cast<double>(rng() % 1000 + 1);
      p.row_probability[r] = w;
      sum += w;
    }
    if (m.row_begin(s) < m.row_end(s) && sum == 0.0) p.row_probability[m.row_begin(s)] = sum = 1.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) p.row_probability[r] /= sum;
  }
  return p;
}

Model WithCriterion(const SpecWriter& w, Criterion criterion) {
  ModelSpec spec = w.Spec();
  spec.criterion = std::move(criterion);
  return MustBuild(spec);
}

}  // namespace mdp::testing
