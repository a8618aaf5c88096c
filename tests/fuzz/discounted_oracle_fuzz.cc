// Fuzz target: the discounted solvers against an oracle outside the solver. The input bytes
// build a small model directly (1 to 6 states, 1 to 3 actions each, 1 to 3 outcomes per
// action, some terminal states, discounts up to 0.9999, rewards from 1e-3 to 1e6 in size,
// outcome weights down to 1e-9, and actions that copy another action of their state, so that
// exact ties occur). The oracle enumerates every deterministic policy (at most 3^6 = 729),
// solves (I - g P_pi) V = r_pi for each with Eigen's dense LU in long double, and takes V*
// as the values of the policy with the best sum (a finite discounted model has a
// deterministic stationary policy that attains V* in every state at once: common practice).
// For every method and linear solver:
//  - any finite value_error_bound holds: |values - V*| <= bound (whatever the outcome);
//  - a converged run's deterministic picks lose at most policy_loss_bound against V*, with
//    the picked policy's values taken from the enumeration;
//  - actions with identical data in one state (copies) are both in or both out of the
//    optimal set, and a converged run's set holds every action whose Q* (by enumeration)
//    equals the state's best exactly.
// Slack: 1e-9 * (1 + max |V*|) on every comparison, for rounding in both computations, plus
// the rounding of rewards whose parts cancel (below).
#include <Eigen/Dense>

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <limits>
#include <string>
#include <vector>

#include "solver/model.h"
#include "solver/model_spec.h"
#include "solver/solver.h"
#include "tests/fuzz/fuzz_checks.h"

namespace {

using mdp::fuzz::Fail;

// Reads the input a byte at a time; 0 once it is used up.
class Bytes {
 public:
  Bytes(const uint8_t* data, size_t size) : data_(data), size_(size) {}
  uint8_t Next() { return at_ < size_ ? data_[at_++] : 0; }
  template <typename T, size_t N>
  T Pick(const T (&table)[N]) {
    return table[Next() % N];
  }

 private:
  const uint8_t* data_;
  size_t size_;
  size_t at_ = 0;
};

constexpr double kDiscounts[] = {0.0, 0.3, 0.5, 0.9, 0.95, 0.99, 0.999, 0.9999};
constexpr double kRewards[] = {0.0, 1.0, -1.0, 0.5, 3.0, -2.5, 1e-3, 10.0, -10.0, 1e3, 1e6, -1e6};
constexpr double kWeights[] = {1.0, 2.0, 3.0, 0.5, 7.0, 1e-9, 1e-3, 100.0};

struct Slot {
  double reward = 0.0;     // Expected immediate reward, outcome rewards included.
  double magnitude = 0.0;  // |slot reward| + sum p |outcome reward|: the reward's parts.
  std::vector<std::pair<int, double>> outcomes;  // (next, probability)
};

struct Oracle {
  std::vector<double> best;                    // V*
  std::vector<std::vector<double>> q;          // Q*(s, slot index within s)
  std::vector<std::vector<int>> policy_of;     // Enumerated policies (slot per state).
  std::vector<std::vector<double>> values_of;  // Their values.
};

// V^pi by Eigen's dense LU in long double (x87 extended precision where available): the
// solve's error grows with the largest value of the policy, and a poor policy's values
// (5e9 with a reward of 1e6 at g = 0.9999) polluted the other states' values in double
// (by 2e-3 on a state whose value is -10000 under every policy).
std::vector<double> PolicyValues(const std::vector<std::vector<Slot>>& slots,
                                 const std::vector<int>& policy, double g) {
  using Matrix = Eigen::Matrix<long double, Eigen::Dynamic, Eigen::Dynamic>;
  using Vector = Eigen::Matrix<long double, Eigen::Dynamic, 1>;
  const int n = static_cast<int>(slots.size());
  Matrix a = Matrix::Identity(n, n);
  Vector r = Vector::Zero(n);
  for (int s = 0; s < n; ++s) {
    if (slots[s].empty()) continue;  // Terminal: V = 0.
    const Slot& slot = slots[s][policy[s]];
    r(s) = slot.reward;
    for (const auto& [next, p] : slot.outcomes) {
      a(s, next) -= static_cast<long double>(g) * static_cast<long double>(p);
    }
  }
  const Vector v = a.partialPivLu().solve(r);
  std::vector<double> out(n);
  for (int s = 0; s < n; ++s) out[s] = static_cast<double>(v(s));
  return out;
}

Oracle Enumerate(const std::vector<std::vector<Slot>>& slots, double g, bool maximize) {
  const int n = static_cast<int>(slots.size());
  Oracle o;
  // V* is the value of the policy with the best sum of values: an optimal policy is best in
  // every state at once, so it has the best sum, and any policy with that sum equals V*.
  // Taking it from one policy, not the best entry per state over all policies, keeps the
  // rounding of poor policies' solves out of V*.
  size_t best_policy = 0;
  long double best_sum = 0.0L;
  std::vector<int> policy(n, 0);
  for (;;) {
    std::vector<double> v = PolicyValues(slots, policy, g);
    long double sum = 0.0L;
    for (double x : v) sum += x;
    if (o.values_of.empty() || (maximize ? sum > best_sum : sum < best_sum)) {
      best_sum = sum;
      best_policy = o.values_of.size();
    }
    o.policy_of.push_back(policy);
    o.values_of.push_back(std::move(v));
    int s = 0;
    while (s < n && (slots[s].empty() || ++policy[s] == static_cast<int>(slots[s].size()))) {
      policy[s] = 0;
      ++s;
    }
    if (s == n) break;
  }
  o.best = o.values_of[best_policy];
  o.q.resize(n);
  for (int s = 0; s < n; ++s) {
    for (const Slot& slot : slots[s]) {
      double sum = 0.0;
      for (const auto& [next, p] : slot.outcomes) sum += p * o.best[next];
      o.q[s].push_back(slot.reward + g * sum);
    }
  }
  return o;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  Bytes in(data, size);
  const int n = 1 + in.Next() % 6;
  const bool maximize = in.Next() % 2 == 0;
  const double g = in.Pick(kDiscounts);
  std::vector<std::vector<Slot>> slots(n);
  mdp::ModelSpec spec;
  spec.name = "oracle";
  spec.objective = maximize ? mdp::Objective::kMaximize : mdp::Objective::kMinimize;
  spec.criterion.kind = mdp::CriterionKind::kDiscounted;
  spec.criterion.discount = g;
  for (int a = 0; a < 3; ++a) spec.InternAction("a" + std::to_string(a));
  // Next states are drawn before the states exist in the spec; they index 0..n-1.
  for (int s = 0; s < n; ++s) {
    const bool terminal = n > 1 && in.Next() % 5 == 0;
    spec.AddState("s" + std::to_string(s), terminal);
    if (terminal) continue;
    const int actions = 1 + in.Next() % 3;
    for (int a = 0; a < actions; ++a) {
      if (a > 0 && in.Next() % 4 == 0) {
        // A copy of the previous action (an exact tie): the same slot for the oracle, and
        // the previous spec slot's reward and outcomes under this action.
        slots[s].push_back(slots[s].back());
        const mdp::SlotId prev = spec.num_slots() - 1;
        spec.AddStateAction(a, spec.slot_reward[prev]);
        for (mdp::OutcomeId o = spec.slot_first_outcome[prev];
             o < spec.slot_first_outcome[prev + 1]; ++o) {
          spec.AddOutcome(spec.outcome_next[o], spec.outcome_probability[o],
                          spec.outcome_reward[o]);
        }
        continue;
      }
      const double slot_reward = in.Pick(kRewards);
      const int outcomes = 1 + in.Next() % 3;
      std::vector<double> weight(outcomes), outcome_reward(outcomes);
      std::vector<int> next(outcomes);
      double total = 0.0;
      for (int k = 0; k < outcomes; ++k) {
        next[k] = in.Next() % n;
        weight[k] = in.Pick(kWeights);
        outcome_reward[k] = in.Next() % 3 == 0 ? in.Pick(kRewards) : 0.0;
        total += weight[k];
      }
      // The spec keeps the slot's reward and its outcomes' rewards apart, as documents do;
      // the oracle adds their expectation.
      Slot slot;
      slot.reward = slot_reward;
      slot.magnitude = std::fabs(slot_reward);
      spec.AddStateAction(a, slot_reward);
      for (int k = 0; k < outcomes; ++k) {
        slot.outcomes.emplace_back(next[k], weight[k] / total);
        slot.reward += weight[k] / total * outcome_reward[k];
        slot.magnitude += weight[k] / total * std::fabs(outcome_reward[k]);
        spec.AddOutcome(next[k], weight[k] / total, outcome_reward[k]);
      }
      slots[s].push_back(std::move(slot));
    }
  }
  mdp::Result<mdp::Model> model = mdp::BuildModel(spec);
  if (!model.ok()) return 0;  // Refused by validation: nothing to compare.
  const mdp::Model& m = *model;
  if (m.num_states() != n) Fail("the model does not have the spec's states");

  const Oracle oracle = Enumerate(slots, g, maximize);
  double scale = 0.0;
  for (double v : oracle.best) scale = std::max(scale, std::fabs(v));
  // The model and the oracle add a row's reward parts in different orders; where they
  // cancel (1e6 - 999999.998), the sums differ by rounding of the parts' size, and V* by that
  // over 1 - g (found: 4.9e-9 at g = 0.95). Allow 8 units of roundoff of the largest parts.
  double parts = 0.0;
  for (const auto& state : slots) {
    for (const Slot& slot : state) parts = std::max(parts, slot.magnitude);
  }
  const double slack = 1e-9 * (1.0 + scale) +
                       8.0 * std::numeric_limits<double>::epsilon() * parts / (1.0 - g);

  struct Run {
    mdp::Method method;
    mdp::LinearSolver linear;
  };
  const Run runs[] = {{mdp::Method::kAuto, mdp::LinearSolver::kAuto},
                      {mdp::Method::kValueIteration, mdp::LinearSolver::kAuto},
                      {mdp::Method::kGaussSeidel, mdp::LinearSolver::kAuto},
                      {mdp::Method::kPolicyIteration, mdp::LinearSolver::kDirect},
                      {mdp::Method::kPolicyIteration, mdp::LinearSolver::kBiCgStab},
                      {mdp::Method::kPolicyIteration, mdp::LinearSolver::kSweeps},
                      {mdp::Method::kModifiedPolicyIteration, mdp::LinearSolver::kAuto}};
  for (const Run& run : runs) {
    mdp::SolveOptions options;
    options.method = run.method;
    options.linear_solver = run.linear;
    options.tolerance = 1e-6;
    // Short runs (near-1 discounts stop at a limit): the bounds must hold all the same.
    options.max_iterations = 2000;
    options.time_limit_seconds = 0.2;
    options.threads = 1;
    const mdp::Result<mdp::Solution> solved = mdp::Solve(m, options);
    const std::string label = std::string(mdp::MethodName(run.method)) + " (linear solver " +
                              std::to_string(static_cast<int>(run.linear)) + ")";
    if (!solved.ok()) Fail(label + ": " + solved.status().ToString());
    const mdp::Solution& sol = *solved;
    // Rows follow the spec's slots in order (one row per state action).
    if (sol.values.size() != static_cast<size_t>(n)) Fail(label + ": values are not per state");
    if (std::isfinite(sol.value_error_bound)) {
      for (int s = 0; s < n; ++s) {
        if (!(std::fabs(sol.values[s] - oracle.best[s]) <= sol.value_error_bound + slack)) {
          Fail(label + ": state " + std::to_string(s) + " value " +
               std::to_string(sol.values[s]) + " is farther than its bound " +
               std::to_string(sol.value_error_bound) + " from V* = " +
               std::to_string(oracle.best[s]));
        }
      }
    }
    const bool converged = sol.outcome == mdp::SolveOutcome::kConverged;
    std::vector<int> picks(n, 0);
    for (int s = 0; s < n; ++s) {
      const mdp::RowId b = m.row_begin(s), e = m.row_end(s);
      if (static_cast<int>(e - b) != static_cast<int>(slots[s].size())) {
        Fail(label + ": the model's rows do not follow the spec's slots");
      }
      if (b == e) continue;
      picks[s] = static_cast<int>(sol.best_row[s] - b);
      double best_q = oracle.q[s][0];
      for (double q : oracle.q[s]) best_q = maximize ? std::max(best_q, q) : std::min(best_q, q);
      for (mdp::RowId r = b; r < e; ++r) {
        const int k = static_cast<int>(r - b);
        if (k > 0 && slots[s][k].outcomes == slots[s][k - 1].outcomes &&
            slots[s][k].reward == slots[s][k - 1].reward &&
            sol.optimal_row[r] != sol.optimal_row[r - 1]) {
          Fail(label + ": two copies of one action differ in the optimal set");
        }
        // Optimal by enumeration: its Q* equals the best exactly (copies of the best action,
        // and ties built the same way); nearer misses are left to the bounds above.
        if (converged && oracle.q[s][k] == best_q && !sol.optimal_row[r]) {
          Fail(label + ": an optimal action (by enumeration) is not in the optimal set");
        }
      }
    }
    if (converged && std::isfinite(sol.policy_loss_bound)) {
      for (size_t i = 0; i < oracle.policy_of.size(); ++i) {
        bool same = true;
        for (int s = 0; s < n && same; ++s) {
          same = slots[s].empty() || oracle.policy_of[i][s] == picks[s];
        }
        if (!same) continue;
        for (int s = 0; s < n; ++s) {
          const double loss = maximize ? oracle.best[s] - oracle.values_of[i][s]
                                       : oracle.values_of[i][s] - oracle.best[s];
          if (!(loss <= sol.policy_loss_bound + slack)) {
            Fail(label + ": the picked policy loses " + std::to_string(loss) + " in state " +
                 std::to_string(s) + ", over its bound " + std::to_string(sol.policy_loss_bound));
          }
        }
      }
    }
  }
  return 0;
}
