#include "solver/average_reward.h"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <functional>
#include <iterator>
#include <limits>
#include <new>
#include <optional>
#include <sstream>
#include <string_view>
#include <type_traits>
#include <unordered_set>
#include <utility>

#include "solver/internal/average_chains.h"
#include "solver/internal/bellman.h"
#include "solver/internal/mmatrix_lu.h"
#include "solver/internal/policy_matrix.h"
#include "solver/internal/run_control.h"
#include "solver/internal/stop_check.h"

namespace mdp {
namespace {

using internal::AnalyseChain;
using internal::AverageEvaluation;
using internal::ChainStructure;
using internal::RowSum;

constexpr double kInf = std::numeric_limits<double>::infinity();

// ---------------------------------------------------------------------------------------
// Messages.

std::string Number(double x) {
  std::ostringstream out;
  out.precision(10);
  out << x;
  return out.str();
}

// {"a", "b", "c"} with at most a few names, then "and N more".
std::string DescribeStates(const Model& m, std::span<const StateId> states) {
  constexpr size_t kShown = 5;
  std::string out = "{";
  for (size_t i = 0; i < states.size() && i < kShown; ++i) {
    if (i > 0) out += ", ";
    out += "\"" + m.state_name(states[i]) + "\"";
  }
  if (states.size() > kShown) out += " and " + std::to_string(states.size() - kShown) + " more";
  return out + "}";
}

std::string DescribeClasses(const Model& m, const std::vector<std::vector<StateId>>& classes) {
  constexpr size_t kShown = 5;
  std::string out;
  for (size_t k = 0; k < classes.size() && k < kShown; ++k) {
    if (k > 0) out += ", ";
    out += DescribeStates(m, classes[k]);
  }
  if (classes.size() > kShown) {
    out += " and " + std::to_string(classes.size() - kShown) + " more classes";
  }
  return out;
}

// ---------------------------------------------------------------------------------------
// Sweeps.

struct Bracket {
  double lower = 0.0;
  double upper = 0.0;
  double width() const { return upper - lower; }
};

// d(s) = best_a [r(s, a) + scale (sum p x - x(s))] (0 at terminal states) and, if `rows` is
// not null, its first best row. With scale = 1 - tau this is T'x - x for the transformed
// model; with scale = 1 it is the d of the gain bracket. Returns [min d, max d].
template <bool kMaximize>
Bracket Residuals(const Model& m, double scale, const double* x, double* d, RowId* rows,
                  int threads) {
  const StateId n = m.num_states();
  const RowId* row_begin = m.state_row_begin_data();
  const double* reward = m.row_reward_data();
  double lower = kInf;
  double upper = -kInf;
  // clang-format off
#pragma omp parallel for num_threads(threads) reduction(min : lower) reduction(max : upper) \
    schedule(dynamic, 8192)
  // clang-format on
  for (StateId s = 0; s < n; ++s) {
    RowId best = -1;
    double best_value = 0.0;
    for (RowId r = row_begin[s], end = row_begin[s + 1]; r < end; ++r) {
      const double value = reward[r] + scale * (RowSum(m, r, x) - x[s]);
      if (best < 0 || internal::Better<kMaximize>(value, best_value)) {
        best = r;
        best_value = value;
      }
    }
    d[s] = best_value;
    if (rows != nullptr) rows[s] = best;
    lower = std::min(lower, best_value);
    upper = std::max(upper, best_value);
  }
  if (n == 0) return Bracket{};
  return Bracket{lower, upper};
}

// ---------------------------------------------------------------------------------------
// Evidence that the optimal gain is not constant.
//
// By the bracket argument of the header applied to the policies that start in s', any
// policy's gain from s' is at most U(s') = max of d over the states reachable from s' under
// any actions (its limiting distribution lives there); and every state of a recurrent class
// C of the greedy policy G has g* >= g^G >= min_C d. (kMinimize: mirror image.) So
// min_C d > U(s') proves g* differs between C and s'. When relative value iteration runs on
// a multichain model whose optimal gain differs, d tends to g* and this test fires.

class GainEvidence {
 public:
  explicit GainEvidence(const Model& m) : m_(m) {}

  // Returns the message of a kFailedPrecondition error if d proves the optimal gain
  // differs between states by more than `margin`, else nullopt. `rows` is v's greedy policy.
  std::optional<std::string> Check(const double* d, std::span<const RowId> rows, double margin) {
    const ChainStructure chain = AnalyseChain(m_, rows);
    if (chain.classes.size() < 2) return std::nullopt;  // Every state then reaches the class.
    const double sign = m_.objective() == Objective::kMaximize ? 1.0 : -1.0;
    size_t best_class = 0;
    double best_class_min = -kInf;
    for (size_t k = 0; k < chain.classes.size(); ++k) {
      double class_min = kInf;
      for (StateId s : chain.classes[k]) class_min = std::min(class_min, sign * d[s]);
      if (class_min > best_class_min) {
        best_class_min = class_min;
        best_class = k;
      }
    }
    const std::vector<double> reach = ReachableMax(d, sign);
    StateId worst = 0;
    for (StateId s = 1; s < m_.num_states(); ++s) {
      if (reach[s] < reach[worst]) worst = s;
    }
    if (!(best_class_min > reach[worst] + margin)) return std::nullopt;
    const bool maximize = sign > 0;
    std::string message = std::string("the optimal ") + (maximize ? "gain" : "cost per step");
    message += " differs between states, so no single value describes the model (it is ";
    message += "multichain): every state in " + DescribeStates(m_, chain.classes[best_class]);
    message += maximize ? " can earn at least " : " can keep the cost at or below ";
    message += Number(sign * best_class_min) + " per step, but from state \"";
    message += m_.state_name(worst) + "\" no policy ";
    message += maximize ? "earns more than " : "costs less than ";
    message += Number(sign * reach[worst]) + " per step. Recurrent classes of the current ";
    message += "greedy policy: " + DescribeClasses(m_, chain.classes) + ". Relative value ";
    message += "iteration needs one gain for all states; use policy iteration, which returns ";
    message += "the optimal gain of each state.";
    return message;
  }

 private:
  // Per state: max of sign * d over the states reachable from it (itself included).
  std::vector<double> ReachableMax(const double* d, double sign) {
    if (components_.of.empty()) components_ = internal::AllActionComponents(m_);
    const StateId n = m_.num_states();
    // States grouped by component, in component order (counting sort).
    std::vector<StateId> start(components_.count + 1, 0);
    for (StateId s = 0; s < n; ++s) ++start[components_.of[s] + 1];
    for (int32_t k = 0; k < components_.count; ++k) start[k + 1] += start[k];
    std::vector<StateId> order(n);
    std::vector<StateId> fill(start.begin(), start.end() - 1);
    for (StateId s = 0; s < n; ++s) order[fill[components_.of[s]]++] = s;
    // Edges only reach components with smaller numbers, finished before this one.
    std::vector<double> best(components_.count, -kInf);
    for (int32_t k = 0; k < components_.count; ++k) {
      for (StateId i = start[k]; i < start[k + 1]; ++i) {
        const StateId s = order[i];
        best[k] = std::max(best[k], sign * d[s]);
        // Every row of s: a state's rows, and so their entries, are contiguous.
        const int64_t end = m_.entry_begin(m_.row_end(s));
        for (int64_t e = m_.entry_begin(m_.row_begin(s)); e < end; ++e) {
          best[k] = std::max(best[k], best[components_.of[m_.entry_next(e)]]);
        }
      }
    }
    std::vector<double> out(n);
    for (StateId s = 0; s < n; ++s) out[s] = best[components_.of[s]];
    return out;
  }

  const Model& m_;
  internal::Components components_;  // Of the all-actions graph; computed on first use.
};

// ---------------------------------------------------------------------------------------
// Completing a solution.

double SupAbs(std::span<const double> x) {
  double out = 0.0;
  for (double v : x) out = std::max(out, std::fabs(v));
  return out;
}

// The slack under which two values of sum p g count as equal: rounding in the evaluated
// gains, with room to spare, plus twice the evaluation's error bound when that is finite
// (differences below it could be the solver's, not the model's).
double GainSlack(const AverageEvaluation& eval) {
  const double error = std::isfinite(eval.gain_error) ? eval.gain_error : 0.0;
  return 1e-11 * std::max(1.0, SupAbs(eval.gain)) + 2.0 * error;
}

// Fills best_row, optimal_row, action_gap and tied_states from out.q, the per-state best q
// `best` and out.tie_tolerance. Only rows with eligible[r] != 0 take part (an empty
// `eligible` admits every row); best_row[s] is the first of them within `pick` of the best.
// Returns how far the picks trail the best q.
template <bool kMaximize>
double SelectRows(const Model& m, std::span<const double> best, std::span<const uint8_t> eligible,
                  double pick, int threads, AverageRewardSolution& out) {
  const StateId n = m.num_states();
  out.best_row.assign(n, -1);
  out.optimal_row.assign(m.num_rows(), 0);
  out.action_gap.assign(n, std::numeric_limits<double>::quiet_NaN());
  int64_t tied = 0;
  double pick_slack = 0.0;
#pragma omp parallel for num_threads(threads) reduction(+ : tied) reduction(max : pick_slack) \
    schedule(dynamic, 8192)
  for (StateId s = 0; s < n; ++s) {
    // A few units in the last place of q, so that rounding cannot split a tie.
    const double state_rounding = 1e-12 * std::max(1.0, std::fabs(best[s]));
    int count = 0;
    int taking_part = 0;
    bool have_second = false;
    bool skipped_best = false;
    double second = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      if (!eligible.empty() && eligible[r] == 0) continue;
      ++taking_part;
      const double behind = std::fabs(out.q[r] - best[s]);
      out.optimal_row[r] = behind <= out.tie_tolerance + state_rounding ? 1 : 0;
      count += out.optimal_row[r];
      if (out.best_row[s] < 0 && behind <= pick + state_rounding) {
        out.best_row[s] = r;
        pick_slack = std::max(pick_slack, behind);
      }
      if (!skipped_best && out.q[r] == best[s]) {
        skipped_best = true;  // The best itself; the gap is to the best of the others.
      } else if (!have_second || internal::Better<kMaximize>(out.q[r], second)) {
        second = out.q[r];
        have_second = true;
      }
    }
    if (taking_part >= 2) out.action_gap[s] = std::fabs(best[s] - second);
    if (count >= 2) ++tied;
  }
  out.tied_states = tied;
  return pick_slack;
}

// Sets recurrent_classes, multichain_suspected and chain_structure_note from best_row.
void DescribeChain(const Model& m, double tolerance, AverageRewardSolution& out) {
  ChainStructure chain = AnalyseChain(m, out.best_row);
  out.recurrent_classes = std::move(chain.classes);
  out.multichain_suspected = out.recurrent_classes.size() >= 2;
  out.chain_structure_note.clear();
  if (!out.multichain_suspected) return;
  out.chain_structure_note =
      "The chosen policy has " + std::to_string(out.recurrent_classes.size()) +
      " recurrent classes: " + DescribeClasses(m, out.recurrent_classes) + ". ";
  const double width = out.gain_upper - out.gain_lower;
  if (out.multichain_gain) {
    const auto [low, high] = std::minmax_element(out.state_gain.begin(), out.state_gain.end());
    out.chain_structure_note += "The optimal gain differs between states, from " + Number(*low) +
                                " to " + Number(*high) +
                                " per step: read each state's own gain (state_gain); the single "
                                "gain is only the middle of that range.";
  } else if (width <= tolerance) {
    out.chain_structure_note += "Their optimal gains agree within the gain bracket (width " +
                                Number(width) + "), so the single gain holds for every state.";
  } else {
    out.chain_structure_note +=
        "The solve stopped with a gain bracket of width " + Number(width) +
        ", so the optimal gain may differ between these classes and the single gain may "
        "be wrong for some states.";
  }
}

// The solution when one gain describes every state: fills q, the optimal sets, the bracket,
// gain, state_gain, tie tolerance and loss bound from h (already 0 at the reference state),
// then the chain structure of best_row. The bracket is widened by a rounding allowance so
// that it holds in floating point too.
template <bool kMaximize>
void FinishSolution(const Model& m, std::vector<double> h, const AverageRewardOptions& options,
                    AverageRewardSolution& out) {
  const StateId n = m.num_states();
  const int threads = internal::ThreadCount(options.threads);
  out.q.assign(m.num_rows(), 0.0);
  std::vector<double> best(n, 0.0);
  double lower = kInf;
  double upper = -kInf;
  double scale = 1.0;
  // clang-format off
#pragma omp parallel for num_threads(threads) reduction(min : lower) \
    reduction(max : upper, scale) schedule(dynamic, 8192)
  // clang-format on
  for (StateId s = 0; s < n; ++s) {
    double b = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      out.q[r] = m.row_reward(r) + RowSum(m, r, h.data());
      if (r == m.row_begin(s) || internal::Better<kMaximize>(out.q[r], b)) b = out.q[r];
      scale = std::max(scale, std::fabs(out.q[r]));
    }
    best[s] = b;
    const double d = m.row_begin(s) == m.row_end(s) ? 0.0 : b - h[s];
    lower = std::min(lower, d);
    upper = std::max(upper, d);
    scale = std::max(scale, std::fabs(h[s]));
  }
  if (n == 0) lower = upper = 0.0;
  const double rounding = 1e-15 * scale;  // A few units in the last place of q - h.
  out.gain_lower = lower - rounding;
  out.gain_upper = upper + rounding;
  out.gain = 0.5 * (out.gain_lower + out.gain_upper);
  const double width = out.gain_upper - out.gain_lower;
  out.tie_tolerance = options.tie_tolerance + width;
  const double pick_slack = SelectRows<kMaximize>(m, best, {}, options.tie_tolerance, threads, out);
  // The pick trails the best q by pick_slack: its gain is at least gain_lower - pick_slack
  // (header comment), while g* <= gain_upper.
  out.policy_loss_bound = width + pick_slack;
  out.reference_state = options.reference_state;
  out.bias = std::move(h);
  out.state_gain.assign(n, out.gain);
  out.multichain_gain = false;
  // g* and best q - h(s) lie in the bracket, and the gain is its midpoint.
  out.optimality_residual = 0.5 * width;
  out.state_gain_error = 0.5 * width;
  ++out.sweeps;
  DescribeChain(m, options.tolerance, out);
}

void Finish(const Model& m, std::vector<double> h, const AverageRewardOptions& options,
            AverageRewardSolution& out) {
  if (m.objective() == Objective::kMaximize) {
    FinishSolution<true>(m, std::move(h), options, out);
  } else {
    FinishSolution<false>(m, std::move(h), options, out);
  }
  out.outcome =
      out.gain_upper - out.gain_lower <= options.tolerance ? SolveOutcome::kConverged : out.outcome;
}

// ---------------------------------------------------------------------------------------
// Completing a solution whose gain differs between states.

struct MultichainRows {
  std::vector<uint8_t> keeps_gain;  // Per row: |sum p g - g(s)| <= the keep tolerance.
  std::vector<double> best;         // Per state: the best q over the rows that keep the gain.
  double gain_residual = 0.0;       // max_s |best_a sum p g - g(s)|.
  double bias_residual = 0.0;       // max_s |best[s] - g(s) - h(s)|.
};

// Fills q = r + P h and classifies the rows by the two multichain optimality equations
// (Puterman 1994, sec. 9.1, from memory): which keep the gain, and the best q among those.
template <bool kMaximize>
MultichainRows ClassifyRows(const Model& m, std::span<const double> g, std::span<const double> h,
                            double keep_tolerance, int threads, std::vector<double>& q) {
  const StateId n = m.num_states();
  MultichainRows out;
  out.keeps_gain.assign(m.num_rows(), 0);
  out.best.assign(n, 0.0);
  q.assign(m.num_rows(), 0.0);
  uint8_t* keeps = out.keeps_gain.data();
  double gain_residual = 0.0;
  double bias_residual = 0.0;
  // clang-format off
#pragma omp parallel for num_threads(threads) reduction(max : gain_residual, bias_residual) \
    schedule(dynamic, 8192)
  // clang-format on
  for (StateId s = 0; s < n; ++s) {
    const RowId begin = m.row_begin(s);
    const RowId end = m.row_end(s);
    if (begin == end) continue;
    double best_gain = 0.0;
    bool any = false;
    for (RowId r = begin; r < end; ++r) {
      const double expected = RowSum(m, r, g.data());
      if (r == begin || internal::Better<kMaximize>(expected, best_gain)) best_gain = expected;
      keeps[r] = std::fabs(expected - g[s]) <= keep_tolerance ? 1 : 0;
      any = any || keeps[r] != 0;
      q[r] = m.row_reward(r) + RowSum(m, r, h.data());
    }
    if (!any) {  // Only possible in a run stopped early: then the best sum p g decides.
      for (RowId r = begin; r < end; ++r) {
        keeps[r] = std::fabs(RowSum(m, r, g.data()) - best_gain) <= keep_tolerance;
      }
    }
    bool first = true;
    double best = 0.0;
    for (RowId r = begin; r < end; ++r) {
      if (keeps[r] != 0 && (first || internal::Better<kMaximize>(q[r], best))) best = q[r];
      first = first && keeps[r] == 0;
    }
    out.best[s] = best;
    gain_residual = std::max(gain_residual, std::fabs(best_gain - g[s]));
    bias_residual = std::max(bias_residual, std::fabs(best - g[s] - h[s]));
  }
  out.gain_residual = gain_residual;
  out.bias_residual = bias_residual;
  return out;
}

// The header's bracket, which holds for any vector v, taken at v = h and at v = h + M g and
// intersected. With M large enough that no row losing gain has the best
// r + P v - v (M >= (r + P h - h - g) / (g - P g) over those rows), r + P v - v at the rows
// that keep the gain is r + P h - h, so d(s) -> g*(s) and the bracket tends to
// [min g*, max g*]. Each end is widened by a rounding allowance.
template <bool kMaximize>
Bracket CertifiedBracket(const Model& m, std::span<const double> g, std::span<const double> h,
                         double keep_tolerance, int threads) {
  const StateId n = m.num_states();
  const double sign = kMaximize ? 1.0 : -1.0;
  double max_reward = 0.0;
  double big_m = 0.0;
  // clang-format off
#pragma omp parallel for num_threads(threads) reduction(max : big_m, max_reward) \
    schedule(static, 2048)
  // clang-format on
  for (StateId s = 0; s < n; ++s) {
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      max_reward = std::max(max_reward, std::fabs(m.row_reward(r)));
      const double drop = sign * (g[s] - RowSum(m, r, g.data()));
      if (!(drop > keep_tolerance)) continue;
      const double excess = sign * (m.row_reward(r) + RowSum(m, r, h.data()) - h[s] - g[s]);
      big_m = std::max(big_m, excess / drop);
    }
  }
  std::vector<double> d(n);
  auto bracket_at = [&](const std::vector<double>& v) {
    Bracket b = Residuals<kMaximize>(m, 1.0, v.data(), d.data(), nullptr, threads);
    const double rounding = 1e-15 * (1.0 + max_reward + 2.0 * SupAbs(v));
    return Bracket{b.lower - rounding, b.upper + rounding};
  };
  std::vector<double> v(h.begin(), h.end());
  Bracket out = bracket_at(v);
  if (big_m > 0.0) {
    for (StateId s = 0; s < n; ++s) v[s] = h[s] + big_m * g[s];
    const Bracket at_u = bracket_at(v);
    out = Bracket{std::max(out.lower, at_u.lower), std::min(out.upper, at_u.upper)};
  }
  return out;
}

// The solution when the gain g of policy iteration's last evaluated policy `policy` differs
// between states: state_gain = g, the optimal sets by both optimality equations, the bracket
// [min g, max g] joined with CertifiedBracket, and the loss of the best_row policy, which is
// evaluated when it differs from `policy`. kConverged iff `stable` and both the residual of
// the equations and the evaluation's error bound are within the tolerance.
template <bool kMaximize>
Status FinishMultichain(const Model& m, const AverageEvaluation& eval,
                        std::span<const RowId> policy, bool stable, double target,
                        const internal::StopCheck& stop, const AverageRewardOptions& options,
                        AverageRewardSolution& out) {
  const int threads = internal::ThreadCount(options.threads);
  const std::vector<double>& g = eval.gain;
  std::vector<double> h = eval.bias;
  const double shift = h[options.reference_state];
  for (double& x : h) x -= shift;
  const double keep_tolerance = options.tie_tolerance + GainSlack(eval);
  const MultichainRows rows = ClassifyRows<kMaximize>(m, g, h, keep_tolerance, threads, out.q);
  const double rounding = 1e-15 * std::max({1.0, SupAbs(out.q), SupAbs(h), SupAbs(g)});
  out.optimality_residual = std::max(rows.gain_residual, rows.bias_residual) + rounding;
  out.state_gain_error = eval.gain_error + rounding;
  out.tie_tolerance = options.tie_tolerance + 2.0 * out.optimality_residual;
  // The picks' own slack shows up in the evaluation of the best_row policy below.
  SelectRows<kMaximize>(m, rows.best, rows.keeps_gain, options.tie_tolerance, threads, out);
  const auto [low, high] = std::minmax_element(g.begin(), g.end());
  const Bracket certified = CertifiedBracket<kMaximize>(m, g, h, keep_tolerance, threads);
  out.gain_lower = std::min(*low, certified.lower);
  out.gain_upper = std::max(*high, certified.upper);
  out.gain = 0.5 * (out.gain_lower + out.gain_upper);
  out.sweeps += 4;  // ClassifyRows, then M and two brackets in CertifiedBracket.
  out.state_gain = g;
  out.multichain_gain = true;
  out.reference_state = options.reference_state;
  out.bias = std::move(h);

  double loss = 0.0;
  if (!std::equal(policy.begin(), policy.end(), out.best_row.begin())) {
    AverageEvaluation picked;
    const Status status =
        internal::EvaluateAverage(m, out.best_row, target, stop, eval, picked, nullptr, threads);
    if (status.ok()) {
      const double sign = kMaximize ? 1.0 : -1.0;
      for (size_t s = 0; s < g.size(); ++s) loss = std::max(loss, sign * (g[s] - picked.gain[s]));
    } else if (status.code() == StatusCode::kCancelled ||
               status.code() == StatusCode::kDeadlineExceeded ||
               status.code() == StatusCode::kInternal) {  // Not evaluable in floating point.
      loss = std::numeric_limits<double>::quiet_NaN();
    } else {
      return status;
    }
    ++out.sweeps;
  }
  out.policy_loss_bound = loss + out.optimality_residual;
  if (stable && out.optimality_residual <= options.tolerance &&
      out.state_gain_error <= options.tolerance) {
    out.outcome = SolveOutcome::kConverged;
  }
  DescribeChain(m, options.tolerance, out);
  return Status::Ok();
}

// The run limits in the form RunControl reads.
SolveOptions RunLimits(const AverageRewardOptions& options) {
  SolveOptions run;
  run.max_iterations = options.max_iterations;
  run.time_limit_seconds = options.time_limit_seconds;
  return run;
}

// ---------------------------------------------------------------------------------------
// Policy improvement (Puterman 1994, sec. 9.2, from memory): first on the gain, then, where
// the gain cannot improve, on q among the rows that keep it. A state keeps its row unless
// another is better by more than the slack, so rounding noise cannot make the method cycle.

// rows[s] = the first row of s with the best value(r), unless the current row is within
// `slack` of it; states without a row (rows[s] < 0) are skipped. Returns the number changed.
template <bool kMaximize, typename RowValue>
int64_t ImproveRows(const Model& m, const RowValue& value, double slack, RowId* rows,
                    int threads) {
  int64_t changed = 0;
#pragma omp parallel for num_threads(threads) reduction(+ : changed) schedule(dynamic, 8192)
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (rows[s] < 0) continue;
    RowId best = -1;
    double best_value = 0.0;
    for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
      const double x = value(r);
      if (best < 0 || internal::Better<kMaximize>(x, best_value)) {
        best = r;
        best_value = x;
      }
    }
    const double current = value(rows[s]);
    if (internal::Better<kMaximize>(best_value, kMaximize ? current + slack : current - slack)) {
      rows[s] = best;
      ++changed;
    }
  }
  return changed;
}

template <bool kMaximize>
int64_t ImproveGain(const Model& m, const double* g, double slack, RowId* rows, int threads) {
  return ImproveRows<kMaximize>(
      m, [&](RowId r) { return RowSum(m, r, g); }, slack, rows, threads);
}

template <bool kMaximize>
int64_t ImproveBias(const Model& m, const double* g, const double* h, double gain_slack,
                    double slack, RowId* rows, int threads) {
  int64_t changed = 0;
#pragma omp parallel for num_threads(threads) reduction(+ : changed) schedule(dynamic, 8192)
  for (StateId s = 0; s < m.num_states(); ++s) {
    const RowId begin = m.row_begin(s);
    const RowId end = m.row_end(s);
    if (begin == end) continue;
    double best_gain = 0.0;
    for (RowId r = begin; r < end; ++r) {
      const double value = RowSum(m, r, g);
      if (r == begin || internal::Better<kMaximize>(value, best_gain)) best_gain = value;
    }
    RowId best = -1;
    double best_q = 0.0;
    double current_q = 0.0;
    bool current_eligible = false;
    for (RowId r = begin; r < end; ++r) {
      if (std::fabs(RowSum(m, r, g) - best_gain) > gain_slack) continue;
      const double q = m.row_reward(r) + RowSum(m, r, h);
      if (r == rows[s]) {
        current_q = q;
        current_eligible = true;
      }
      if (best < 0 || internal::Better<kMaximize>(q, best_q)) {
        best = r;
        best_q = q;
      }
    }
    if (current_eligible &&
        !internal::Better<kMaximize>(best_q, kMaximize ? current_q + slack : current_q - slack)) {
      continue;
    }
    if (best != rows[s]) {
      rows[s] = best;
      ++changed;
    }
  }
  return changed;
}

// Look-ahead for the bias step (the gain is then one number g, no state terminal):
// Gauss-Seidel sweeps of v(s) <- best_a [r(s, a) + sum p v] - g from v = h, in place,
// alternately in increasing and decreasing order of states; policy iteration then improves
// on v instead of h, a form of modified policy iteration. Why: on a slowly mixing local
// model (the 100,000-state benchmark ring) Howard's steps from h moved the boundary between
// states that should go one way round and those that should go the other by a few hundred
// states per evaluation, over 100 evaluations; the sweeps carry improvements further per
// evaluation (kLookAheadSweeps has the numbers).
// Why the gain cannot drop: d = Th - h >= g up to the evaluation's residual (the current row
// gives g), and if Tv - v >= g at the start of a sweep, every in-place update raises v, so
// the values each update used are <= the final ones and Tv - v >= g still holds after it.
// The greedy policy sigma of v (keeping its row within `slack`) has r + P v - v >= g - slack,
// so g^sigma = P*_sigma (r + P v - v) >= g - slack - residual (the bracket argument of the
// header). Its bias need not improve, so the caller never lets a look-ahead step return to a
// policy it has evaluated.
// With `discount` < 1 and g = 0 the same sweeps serve the discounted model (the warm start
// below).
template <bool kMaximize>
void LookAheadSweeps(const Model& m, double discount, double g, int sweeps,
                     std::vector<double>& v) {
  const StateId n = m.num_states();
  for (int k = 0; k < sweeps; ++k) {
    const bool forward = k % 2 == 0;
    for (StateId i = 0; i < n; ++i) {
      const StateId s = forward ? i : n - 1 - i;
      double best = 0.0;
      for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
        const double q = m.row_reward(r) + discount * RowSum(m, r, v.data());
        if (r == m.row_begin(s) || internal::Better<kMaximize>(q, best)) best = q;
      }
      v[s] = best - g;
    }
  }
}

// Sets `fewer` (a copy of `from`) to `from` with the better half (rounded up) of the
// switches that lead to `to`, ranked by sum p g, then by q = r + P h, at the evaluation of
// `from`. Returns false iff `to` differs from `from` in at most one state (nothing to halve).
template <bool kMaximize>
bool KeepBetterHalf(const Model& m, const AverageEvaluation& eval, std::span<const RowId> from,
                    std::span<const RowId> to, std::vector<RowId>& fewer) {
  const double sign = kMaximize ? 1.0 : -1.0;
  struct Switch {
    double gain_step;
    double q_step;
    StateId s;
  };
  std::vector<Switch> switches;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (from[s] == to[s]) continue;
    auto value = [&](RowId r, const std::vector<double>& x) {
      return RowSum(m, r, x.data());
    };
    auto ranked = [](double x) { return std::isnan(x) ? -kInf : x; };  // A strict order.
    switches.push_back({ranked(sign * (value(to[s], eval.gain) - value(from[s], eval.gain))),
                        ranked(sign * (m.row_reward(to[s]) + value(to[s], eval.bias) -
                                       m.row_reward(from[s]) - value(from[s], eval.bias))),
                        s});
  }
  if (switches.size() <= 1) return false;
  std::sort(switches.begin(), switches.end(), [](const Switch& a, const Switch& b) {
    if (a.gain_step != b.gain_step) return a.gain_step > b.gain_step;
    if (a.q_step != b.q_step) return a.q_step > b.q_step;
    return a.s < b.s;
  });
  switches.resize((switches.size() + 1) / 2);
  for (const Switch& w : switches) fewer[w.s] = to[w.s];
  return true;
}

// FNV-1a over the rows of a policy.
uint64_t PolicyHash(std::span<const RowId> rows) {
  uint64_t hash = 14695981039346656037ull;
  for (const RowId r : rows) {
    uint64_t x = static_cast<uint64_t>(r);
    for (int byte = 0; byte < 8; ++byte) {
      hash = (hash ^ (x & 0xff)) * 1099511628211ull;
      x >>= 8;
    }
  }
  return hash;
}

double GainSpread(const std::vector<double>& g) {
  const auto [low, high] = std::minmax_element(g.begin(), g.end());
  return *high - *low;
}

// ---------------------------------------------------------------------------------------
// A first policy for policy iteration's second run (PolicyIterationWithRestart).
//
// From the policy that is greedy on rewards, Howard's steps on a slowly mixing model can walk
// through policies whose chains stay in several parts of the state space in turn, each for
// longer than a double can count; their biases are then rounding noise and the method
// stalls. On a 2,000-state ring whose moves reach at most 4 states either way (solver_bench
// local --reach=4) it stopped with a gain bracket of [0.68, 66], where an LP (scipy's HiGHS)
// puts the gain at 0.7281213. Discounting cuts such stays short. So this start is the
// discounted optimum for discounts 1 - 1e-2, 1 - 1e-3, ... down to 1 - kWarmStartLastGap,
// each found by policy iteration from the last one's policy and values: as the discount
// tends to 1 these optima tend to a policy that is gain optimal and bias optimal
// (Blackwell's theorem; Puterman 1994, sec. 10.1, from memory). Each evaluation is followed
// by kWarmStartSweeps Gauss-Seidel sweeps of the discounted Bellman operator, alternately
// forward and backward (modified policy iteration: from a policy's own values the sweeps
// move them only towards the optimum), which carry an improvement along a ring in one sweep
// where Howard's step moves it a few states; without them, the 30,000-state ring of reach 4
// still led to a policy that could not be evaluated in double precision. It is only a start:
// Howard's steps and the bracket that certifies the result follow as before, so a poor start
// costs time, never correctness.
inline constexpr double kWarmStartFirstGap = 1e-2;
inline constexpr double kWarmStartLastGap = 1e-6;
// Improvements per discount, and work per evaluation (passes over the policy's rows).
inline constexpr int kWarmStartImprovements = 50;
inline constexpr double kWarmStartEvaluationWork = 200.0;
inline constexpr int kWarmStartSweeps = 8;

// ImproveRows on r + discount P v.
template <bool kMaximize>
int64_t ImproveDiscounted(const Model& m, const double* v, double discount, double slack,
                          RowId* rows, int threads) {
  return ImproveRows<kMaximize>(
      m, [&](RowId r) { return m.row_reward(r) + discount * RowSum(m, r, v); }, slack,
      rows, threads);
}

// The system I - discount P of the policy `rows` in the form the factors take: entries
// discount p(s' | s) for s' != s, leak 1 - discount (1 and no entries at terminal states), so
// A(s, s) = 1 - discount p(s | s) as the model's probabilities sum to 1.
internal::LeakySystem DiscountedSystem(const Model& m, std::span<const RowId> rows,
                                       double discount) {
  const StateId n = m.num_states();
  internal::LeakySystem a;
  a.size = static_cast<int32_t>(n);
  a.row_begin.assign(static_cast<size_t>(n) + 1, 0);
  a.leak.resize(n);
  for (StateId s = 0; s < n; ++s) {
    a.leak[s] = rows[s] < 0 ? 1.0 : 1.0 - discount;
    if (rows[s] >= 0) {
      for (int64_t e = m.entry_begin(rows[s]); e < m.entry_end(rows[s]); ++e) {
        if (m.entry_next(e) == s) continue;
        a.col.push_back(static_cast<int32_t>(m.entry_next(e)));
        a.weight.push_back(discount * m.entry_probability(e));
      }
    }
    a.row_begin[s + 1] = static_cast<int64_t>(a.col.size());
  }
  return a;
}

// The discounted values of `rows` into v by the chain's factors (internal/mmatrix_lu.h), if
// they fit the budget the average evaluation uses; accurate entry by entry however close the
// discount is to 1. Returns false, v unchanged, if the factors do not fit or fail; the
// stop_check's status if it fires.
Result<bool> FactoredDiscountedValues(const Model& m, std::span<const RowId> rows, double discount,
                                      const internal::StopCheck& stop_check, int threads,
                                      double* work, std::vector<double>& v) {
  const internal::LeakySystem a = DiscountedSystem(m, rows, discount);
  const double budget = internal::FactorBudgetBytes(m);
  internal::FactorPlan plan = internal::PlanWithin(a, budget);
  *work += 2.0;
  if (!internal::FactorsFit(plan, a.entries(), budget, false)) return false;
  const double entries = static_cast<double>(std::max<int64_t>(1, a.entries()));
  *work += plan.multiply_adds / entries;
  internal::MMatrixLu factors;
  const Status status = factors.Factorize(a, std::move(plan), stop_check, threads);
  if (status.code() == StatusCode::kFailedPrecondition) return false;
  MDP_RETURN_IF_ERROR(status);
  std::vector<double> x(m.num_states());
  for (StateId s = 0; s < m.num_states(); ++s) x[s] = rows[s] < 0 ? 0.0 : m.row_reward(rows[s]);
  factors.Solve(x);
  v = std::move(x);
  return true;
}

// Replaces `rows` by the policy that policy iteration at the discounts above reaches (each
// discount's optimum unless kWarmStartImprovements ran out first); stops early, keeping the
// policy reached so far, when stop_check fires. Each policy's values come from BiCGSTAB,
// warm-started, while it meets its target within kWarmStartEvaluationWork; once it misses
// (a slowly mixing chain at a discount near 1), from the chain's factors, unless they once
// did not fit (an expander's fill) or failed. Returns the work done, in sweeps.
template <bool kMaximize>
int64_t DiscountedWarmStart(const Model& m, const internal::StopCheck& stop_check,
                            double reward_scale, int threads, std::vector<RowId>& rows) {
  const StateId n = m.num_states();
  internal::PolicyMatrix policy;
  internal::EvaluationPlan plan;
  const std::function<bool()> interrupted = [&] { return !stop_check.Poll().ok(); };
  std::vector<double> v(n, 0.0);
  double work = 0.0;
  double last_gap = 0.0;
  bool factor = false;      // Evaluate by factors.
  bool factors_fit = true;  // No factorisation has been declined or failed.
  for (double gap = kWarmStartFirstGap; gap >= 0.5 * kWarmStartLastGap; gap *= 0.1) {
    const double discount = 1.0 - gap;
    if (last_gap > 0.0) {
      // Values at discount 1 - gap are about gain / gap + bias: rescale the gain's part.
      const auto [low, high] = std::minmax_element(v.begin(), v.end());
      const double gain = 0.5 * (*low + *high) * last_gap;
      for (StateId s = 0; s < n; ++s) {
        if (rows[s] >= 0) v[s] += gain * (1.0 / gap - 1.0 / last_gap);
      }
    }
    last_gap = gap;
    for (int k = 0; k < kWarmStartImprovements; ++k) {
      bool solved = false;
      if (factor) {
        const Result<bool> factored =
            FactoredDiscountedValues(m, rows, discount, stop_check, threads, &work, v);
        if (!factored.ok()) return static_cast<int64_t>(std::ceil(work));
        solved = *factored;
        if (!solved) factor = factors_fit = false;  // BiCGSTAB from here on.
      }
      if (!solved) {
        policy.Assign(m, rows.data(), discount, threads);
        ++work;
        // Values within 1e-6 * reward_scale of the policy's (residual / gap), or rounding's
        // floor.
        const double target = std::max(1e-6 * gap * reward_scale, 1e-13 * SupAbs(v));
        const internal::EvaluationResult r = internal::SolvePolicyValues(
            policy, target, kWarmStartEvaluationWork, threads, interrupted, plan, v);
        work += r.work;
        if (r.interrupted) return static_cast<int64_t>(std::ceil(work));
        if (r.residual > target && factors_fit) factor = true;
      }
      LookAheadSweeps<kMaximize>(m, discount, 0.0, kWarmStartSweeps, v);
      work += kWarmStartSweeps;
      const double slack = 1e-11 * std::max(reward_scale, SupAbs(v));
      ++work;
      if (ImproveDiscounted<kMaximize>(m, v.data(), discount, slack, rows.data(), threads) == 0) {
        break;
      }
    }
  }
  return static_cast<int64_t>(std::ceil(work));
}

template <bool kMaximize>
Result<AverageRewardSolution> PolicyIterationT(const Model& m, const AverageRewardOptions& options,
                                               const ProgressFn* progress,
                                               const CancelToken* cancel, bool warm_start) {
  const SolveOptions limits = RunLimits(options);
  internal::RunControl control(limits, progress, cancel);
  // The run's limits inside one evaluation too: a factorisation or a Krylov solve of a large
  // slowly mixing chain can take seconds.
  const internal::StopCheck stop_check{cancel,
                                       internal::StopCheck::DeadlineIn(options.time_limit_seconds)};
  const int threads = internal::ThreadCount(options.threads);
  const StateId n = m.num_states();
  AverageRewardSolution out;
  out.method = AverageRewardMethod::kPolicyIteration;
  out.options = options;
  double reward_scale = 1.0;
  for (RowId r = 0; r < m.num_rows(); ++r) {
    reward_scale = std::max(reward_scale, std::fabs(m.row_reward(r)));
  }
  const double target = std::max(1e-14 * reward_scale, 0.01 * options.tolerance);
  std::vector<RowId> rows(n, -1);
  std::vector<double> zeros(n, 0.0);
  std::vector<double> d(n, 0.0);
  ImproveBias<kMaximize>(m, zeros.data(), zeros.data(), 0.0, 0.0, rows.data(), threads);
  ++out.sweeps;
  if (warm_start) {
    out.sweeps += DiscountedWarmStart<kMaximize>(m, stop_check, reward_scale, threads, rows);
  }
  AverageEvaluation eval;        // Empty until the first evaluation.
  std::vector<RowId> evaluated;  // The policy `eval` belongs to.
  std::optional<SolveOutcome> stop;
  bool stable = false;
  // Look-ahead sweeps per improvement (LookAheadSweeps). On the 100,000-state benchmark ring
  // (scripts/bench, local) 0, 16, 32, 64, 128 and 256 sweeps took 144, 65, 45, 38, 31 and 25
  // evaluations and 33, 19, 16, 14, 15 and 17 s: 64 was fastest.
  constexpr int kLookAheadSweeps = 64;
  bool has_terminal = false;
  for (StateId s = 0; s < n; ++s) has_terminal = has_terminal || m.row_begin(s) == m.row_end(s);
  // Policies evaluated so far (by hash): a look-ahead step may only lead to a new one, so
  // look-ahead steps are finitely many and, Howard's steps improving strictly, no policy
  // cycle can form. A hash collision only forgoes a look-ahead step.
  std::unordered_set<uint64_t> seen;
  double last_width = kInf;       // Bracket width at the last evaluated bias ...
  double narrowest_width = kInf;  // ... and the narrowest so far, with its bias.
  std::vector<double> narrowest_bias;
  for (;;) {
    AverageEvaluation next;
    internal::AverageSolveCounts counts;
    const Status status =
        internal::EvaluateAverage(m, rows, target, stop_check, eval, next, &counts, threads);
    if (!status.ok()) {
      // Stopped inside the evaluation: the result is the last policy evaluated in full.
      if (status.code() == StatusCode::kCancelled) {
        stop = SolveOutcome::kCancelled;
      } else if (status.code() == StatusCode::kDeadlineExceeded) {
        stop = SolveOutcome::kTimeLimit;
      } else if (status.code() == StatusCode::kInternal && !eval.gain.empty()) {
        // A policy the arithmetic cannot evaluate (on a million-state ring some kept the chain
        // in a corner for longer than a double can count). Any nonempty subset of an
        // improving step improves too (Howard's argument holds state by state), so try the
        // better half of the switches; when not even one switch can be evaluated, floating
        // point, not the method, ends the run, and the last evaluation stands.
        std::vector<RowId> fewer = evaluated;
        if (KeepBetterHalf<kMaximize>(m, eval, evaluated, rows, fewer)) {
          rows = std::move(fewer);
          continue;
        }
        stop = SolveOutcome::kStalled;
      } else {
        return status;
      }
      break;
    }
    eval = std::move(next);
    evaluated = rows;
    seen.insert(PolicyHash(rows));
    ++out.sweeps;
    const double gain_slack = GainSlack(eval);
    const double slack = 1e-11 * std::max(reward_scale, SupAbs(eval.bias));
    int64_t changed = ImproveGain<kMaximize>(m, eval.gain.data(), gain_slack, rows.data(), threads);
    if (changed == 0) {
      changed = ImproveBias<kMaximize>(m, eval.gain.data(), eval.bias.data(), gain_slack, slack,
                                       rows.data(), threads);
      // The look-ahead is for local models, where the evaluation factors (on an expander
      // Howard's steps already need only a handful of iterations), and only from a bias
      // that solves its equations well: sweeps from a bias wrong by more (a chain that
      // lingers 1e100 steps in a part of the ring gives one) led to worse policies.
      if (changed > 0 && counts.factored > 0 && kLookAheadSweeps > 0 && !has_terminal &&
          GainSpread(eval.gain) <= gain_slack && eval.gain_error <= 1e-6 * reward_scale) {
        std::vector<double> v = eval.bias;
        LookAheadSweeps<kMaximize>(m, 1.0, eval.gain[0], kLookAheadSweeps, v);
        std::vector<RowId> ahead = evaluated;
        const double ahead_slack = 1e-11 * std::max(reward_scale, SupAbs(v));
        if (ImproveBias<kMaximize>(m, eval.gain.data(), v.data(), gain_slack, ahead_slack,
                                   ahead.data(), threads) > 0 &&
            !seen.contains(PolicyHash(ahead))) {
          rows = std::move(ahead);
        }
        out.sweeps += kLookAheadSweeps + 1;
      }
    }
    // In exact arithmetic Howard's steps never return to a policy; here one only can by
    // rounding noise, which makes the current policy as good as the method can tell.
    if (changed > 0 && seen.contains(PolicyHash(rows))) changed = 0;
    const Bracket bracket =
        Residuals<kMaximize>(m, 1.0, eval.bias.data(), d.data(), nullptr, threads);
    last_width = bracket.width();
    if (last_width < narrowest_width) {
      narrowest_width = last_width;
      narrowest_bias = eval.bias;
    }
    ++out.iterations;
    out.sweeps += 2;
    if (changed == 0) {
      stable = true;
      break;
    }
    stop = control.After(out.iterations, out.sweeps, bracket.width(), 0.5 * bracket.width(),
                         "improve");
    if (stop) break;
  }
  // A stable policy is gain-optimal from every state (Puterman 1994, sec. 9.2, from memory):
  // if its gain differs between states, so does the optimal gain.
  out.outcome = stop.value_or(SolveOutcome::kStalled);
  if (!eval.gain.empty() && GainSpread(eval.gain) > options.tolerance) {
    MDP_RETURN_IF_ERROR(
        FinishMultichain<kMaximize>(m, eval, evaluated, stable, target, stop_check, options, out));
  } else {
    std::vector<double> h = eval.bias.empty() ? zeros : std::move(eval.bias);
    // Stopped early: the bracket holds at any vector, so report the evaluated bias that gave
    // the narrowest (on a slowly mixing model the last policy may be one whose chain lingers
    // for ages in a corner, and its bias a poor witness).
    if (!stable && !narrowest_bias.empty() && narrowest_width < last_width) {
      h = std::move(narrowest_bias);
    }
    if (n > 0) {
      const double shift = h[options.reference_state];
      for (double& x : h) x -= shift;
    }
    Finish(m, std::move(h), options, out);
  }
  out.solve_seconds = control.elapsed_seconds();
  return out;
}

// `progress` (may be null or empty) for a run that continues another: the earlier run's
// iterations, sweeps and seconds are added to every report. Empty when there is no one to
// report to.
ProgressFn Continued(const ProgressFn* progress, int64_t iterations, int64_t sweeps,
                     double seconds) {
  if (progress == nullptr || !*progress) return {};
  return [progress, iterations, sweeps, seconds](const Progress& p) {
    Progress total = p;
    total.iteration += iterations;
    total.sweeps += sweeps;
    total.elapsed_seconds += seconds;
    (*progress)(total);
  };
}

double SecondsSince(std::chrono::steady_clock::time_point start) {
  return std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
}

// Policy iteration from the policy greedy on rewards and, when that run stalls (or cannot
// evaluate its first policy), once more from the discounted warm start (DiscountedWarmStart),
// within what is left of the time and iteration limits. The warm start comes second
// because it costs more where Howard's steps do well: on the 100,000-state benchmark ring
// (solver_bench local) policy iteration converged in 12.9 s from the greedy policy and in
// 27.3 s after the warm start; on that ring with moves of at most 4 states, 30,000 states,
// the first run stalls with a bracket of [-6e292, 7e302] after 3.6 s, the warm start
// converges (gain 0.819028) in 4.3 s. The counts and the time of both runs are reported.
template <bool kMaximize>
Result<AverageRewardSolution> PolicyIterationWithRestart(const Model& m,
                                                         const AverageRewardOptions& options,
                                                         const ProgressFn* progress,
                                                         const CancelToken* cancel) {
  const auto start = std::chrono::steady_clock::now();
  Result<AverageRewardSolution> first =
      PolicyIterationT<kMaximize>(m, options, progress, cancel, false);
  const bool stalled = first.ok() ? first->outcome == SolveOutcome::kStalled
                                  : first.status().code() == StatusCode::kInternal;
  if (!stalled) return first;
  AverageRewardOptions rest = options;
  const double elapsed = SecondsSince(start);
  if (options.time_limit_seconds > 0.0) {
    rest.time_limit_seconds = options.time_limit_seconds - elapsed;
    if (rest.time_limit_seconds <= 0.0) return first;
  }
  if (first.ok()) {
    rest.max_iterations -= first->iterations;
    if (rest.max_iterations < 1) return first;
  }
  // The second run's progress continues the first's counts and clock.
  const ProgressFn continued = Continued(progress, first.ok() ? first->iterations : 0,
                                         first.ok() ? first->sweeps : 0, elapsed);
  Result<AverageRewardSolution> second =
      PolicyIterationT<kMaximize>(m, rest, continued ? &continued : nullptr, cancel, true);
  const double seconds = SecondsSince(start);
  if (!second.ok()) {
    // The first run stands, with the time both took (the second's counts died with it).
    if (!first.ok()) return second;
    first->solve_seconds = seconds;
    return first;
  }
  // The second run stands unless it certified a wider bracket than the first.
  if (first.ok() && second->outcome != SolveOutcome::kConverged &&
      second->gain_upper - second->gain_lower > first->gain_upper - first->gain_lower) {
    first->iterations += second->iterations;
    first->sweeps += second->sweeps;
    first->solve_seconds = seconds;
    return first;
  }
  second->options = options;
  if (first.ok()) {
    second->iterations += first->iterations;
    second->sweeps += first->sweeps;
  }
  second->solve_seconds = seconds;
  return second;
}

// Whether relative value iteration, run as the prelude of AutomaticT, should hand over to
// policy iteration after `k` sweeps with bracket width `width`: at k = 16, 32, 64, ... it goes
// on only if the width's decay over the last k / 2 sweeps, kept up at the same rate, reaches
// `aim` within `budget` sweeps in all; it hands over at `budget` sweeps in any case.
// `width_at_half` carries the width at the last power of two from call to call.
bool PreludeHandsOver(int64_t k, double width, double aim, int64_t budget, double& width_at_half) {
  if (k >= budget) return true;
  if (k < 8 || (k & (k - 1)) != 0) return false;
  const double before = width_at_half;
  width_at_half = width;
  if (k < 16) return false;
  if (!(width < before)) return true;
  const double rate = std::log(before / width) / static_cast<double>(k / 2);
  return static_cast<double>(k) + std::log(width / aim) / rate > static_cast<double>(budget);
}

// Relative value iteration (RelativeValueIteration). With prelude_budget > 0 it is
// AutomaticT's prelude: when PreludeHandsOver says so it stops and sets *handed_over, and the
// solution returned holds only its counts (iterations, sweeps, solve_seconds) and, in `bias`,
// the values it reached (h = (1 - tau) v, 0 at the reference state), for Finish.
template <bool kMaximize>
Result<AverageRewardSolution> RelativeValueIterationT(
    const Model& m, const AverageRewardOptions& options, const ProgressFn* progress,
    const CancelToken* cancel, int64_t prelude_budget = 0, bool* handed_over = nullptr) {
  const SolveOptions limits = RunLimits(options);
  internal::RunControl control(limits, progress, cancel);
  const int threads = internal::ThreadCount(options.threads);
  const StateId n = m.num_states();
  const StateId ref = options.reference_state;
  const double tau = options.aperiodicity;
  // How often to look for evidence of differing gains (a cost of about one sweep).
  constexpr int64_t kEvidenceInterval = 32;
  AverageRewardSolution out;
  out.method = AverageRewardMethod::kRelativeValueIteration;
  out.options = options;
  GainEvidence evidence(m);
  double prelude_width = kInf;  // PreludeHandsOver's width at the last power of two.
  std::vector<double> v(n, 0.0);
  std::vector<double> d(n, 0.0);
  std::vector<RowId> rows(n, -1);
  std::optional<SolveOutcome> stop;
  bool converged = false;
  auto check_evidence = [&]() -> std::optional<std::string> {
    const double margin =
        std::max(options.tolerance, 1e-9 * std::max(1.0, SupAbs(d))) + 1e-13 * SupAbs(v);
    return evidence.Check(d.data(), rows, margin);
  };
  for (;;) {
    // d = T'v - v; the bracket of the transformed model at v is that of the original model
    // at (1 - tau) v, and both contain g* (header comment).
    const bool look = (out.iterations + 1) % kEvidenceInterval == 0;
    const Bracket bracket = Residuals<kMaximize>(m, 1.0 - tau, v.data(), d.data(),
                                                 look ? rows.data() : nullptr, threads);
    ++out.iterations;
    ++out.sweeps;
    // Aim at half the tolerance: the final bracket is recomputed from h and widened by a
    // rounding allowance (FinishSolution).
    if (bracket.width() <= 0.5 * options.tolerance) {
      converged = true;
      break;
    }
    if (look) {
      if (std::optional<std::string> message = check_evidence()) {
        return FailedPreconditionError(*message);
      }
    }
    if (prelude_budget > 0 &&
        PreludeHandsOver(out.iterations, bracket.width(), 0.5 * options.tolerance, prelude_budget,
                         prelude_width)) {
      *handed_over = true;
      for (double& x : v) x *= 1.0 - tau;
      out.bias = std::move(v);
      out.solve_seconds = control.elapsed_seconds();
      return out;
    }
    stop =
        control.After(out.iterations, out.sweeps, bracket.width(), 0.5 * bracket.width(), "sweep");
    if (stop) break;
    // v <- T'v - (T'v)(ref): subtracting a constant leaves every later d unchanged and keeps
    // v bounded (relative value iteration; Puterman 1994, sec. 8.5.5, from memory).
    const double shift = v[ref] + d[ref];
#pragma omp parallel for num_threads(threads) schedule(static, 2048)
    for (StateId s = 0; s < n; ++s) v[s] += d[s] - shift;
  }
  if (!converged) {
    Residuals<kMaximize>(m, 1.0 - tau, v.data(), d.data(), rows.data(), threads);
    ++out.sweeps;
    if (std::optional<std::string> message = check_evidence()) {
      return FailedPreconditionError(*message);
    }
  }
  // The transformed model's bias is h / (1 - tau) (options header), so h = (1 - tau) v;
  // v(ref) = 0 already.
  for (double& x : v) x *= 1.0 - tau;
  out.outcome = stop.value_or(SolveOutcome::kStalled);
  Finish(m, std::move(v), options, out);
  out.solve_seconds = control.elapsed_seconds();
  return out;
}

// The method `auto` (header, AverageRewardAutomatic).
template <bool kMaximize>
Result<AverageRewardSolution> AutomaticT(const Model& m, const AverageRewardOptions& options,
                                         const ProgressFn* progress, const CancelToken* cancel) {
  if (m.num_states() <= kAutomaticPreludeMinStates) {
    return PolicyIterationWithRestart<kMaximize>(m, options, progress, cancel);
  }
  const auto start = std::chrono::steady_clock::now();
  // The prelude's sweeps, also when it ends in an error (evidence of differing gains).
  int64_t prelude_sweeps = 0;
  const ProgressFn counting = [&](const Progress& p) {
    prelude_sweeps = p.sweeps;
    if (progress != nullptr && *progress) (*progress)(p);
  };
  bool handed_over = false;
  Result<AverageRewardSolution> first = RelativeValueIterationT<kMaximize>(
      m, options, &counting, cancel, kAutomaticPreludeSweeps, &handed_over);
  if (first.ok()) {
    prelude_sweeps = first->sweeps;
    // Converged, or stopped by the caller's limits: relative value iteration's answer stands.
    if (!handed_over && first->outcome != SolveOutcome::kStalled &&
        first->outcome != SolveOutcome::kIterationLimit) {
      return first;
    }
  } else if (first.status().code() != StatusCode::kFailedPrecondition) {
    return first;  // Not evidence of differing gains, which policy iteration handles.
  }
  AverageRewardOptions rest = options;
  const double elapsed = SecondsSince(start);
  if (options.time_limit_seconds > 0.0) {
    rest.time_limit_seconds = std::max(options.time_limit_seconds - elapsed, 1e-9);
  }
  const ProgressFn continued = Continued(progress, 0, prelude_sweeps, elapsed);
  Result<AverageRewardSolution> second =
      PolicyIterationWithRestart<kMaximize>(m, rest, continued ? &continued : nullptr, cancel);
  // The prelude's answer stands if policy iteration failed, or stopped short of converging
  // (a limit, a cancel) with a wider bracket: a bracket holds every state's optimal gain
  // whichever values gave it, also one of policy iteration's with gains per state. A
  // prelude that handed over is made a solution only then (a pass over the model).
  if (first.ok() && (!second.ok() || second->outcome != SolveOutcome::kConverged)) {
    if (handed_over) {
      first->outcome = SolveOutcome::kStalled;
      Finish(m, std::move(first->bias), options, *first);
      ++first->sweeps;
    }
    if (!second.ok() ||
        second->gain_upper - second->gain_lower > first->gain_upper - first->gain_lower) {
      if (second.ok() && first->outcome != SolveOutcome::kConverged) {
        first->outcome = second->outcome;  // What ended the run.
      }
      first->sweeps += second.ok() ? second->sweeps : 0;
      first->solve_seconds = SecondsSince(start);
      return first;
    }
  }
  const double seconds = SecondsSince(start);
  if (!second.ok()) return second;
  second->options = options;
  second->sweeps += prelude_sweeps;
  second->solve_seconds = seconds;
  return second;
}

}  // namespace

std::string_view AverageRewardMethodName(AverageRewardMethod method) {
  switch (method) {
    case AverageRewardMethod::kRelativeValueIteration:
      return "relative_value_iteration";
    case AverageRewardMethod::kPolicyIteration:
      return "policy_iteration";
  }
  return "unknown";
}

Status CheckAverageRewardOptions(const Model& m, const AverageRewardOptions& options) {
  const double values[] = {options.tolerance,
                           static_cast<double>(options.max_iterations),
                           options.time_limit_seconds,
                           options.aperiodicity,
                           options.tie_tolerance,
                           static_cast<double>(options.threads),
                           static_cast<double>(options.reference_state)};
  static_assert(std::size(values) == kAverageRewardOptionBounds.size());
  for (size_t i = 0; i < kAverageRewardOptionBounds.size(); ++i) {
    const OptionBound& bound = kAverageRewardOptionBounds[i];
    if (!(values[i] >= bound.min && values[i] <= bound.max)) {
      return InvalidArgumentError(std::string(bound.name) + " must be in [" + Number(bound.min) +
                                  ", " + Number(bound.max) + "], got " + Number(values[i]));
    }
  }
  if (options.reference_state >= m.num_states()) {
    return InvalidArgumentError("reference_state " + std::to_string(options.reference_state) +
                                " is not a state of the model (it has " +
                                std::to_string(m.num_states()) + ")");
  }
  return Status::Ok();
}

std::vector<std::vector<StateId>> RecurrentClasses(const Model& m, std::span<const RowId> rows) {
  return AnalyseChain(m, rows).classes;
}

namespace {

// Checks the options, then calls run(std::true_type) when the model maximises and
// run(std::false_type) when it minimises; running out of memory becomes kResourceExhausted.
template <typename Run>
Result<AverageRewardSolution> Dispatch(const Model& m, const AverageRewardOptions& options,
                                       std::string_view what, const Run& run) {
  MDP_RETURN_IF_ERROR(CheckAverageRewardOptions(m, options));
  try {
    return m.objective() == Objective::kMaximize ? run(std::true_type{}) : run(std::false_type{});
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory during " + std::string(what));
  }
}

}  // namespace

Result<AverageRewardSolution> RelativeValueIteration(const Model& m,
                                                     const AverageRewardOptions& options,
                                                     const ProgressFn* progress,
                                                     const CancelToken* cancel) {
  return Dispatch(m, options, "relative value iteration", [&](auto maximize) {
    return RelativeValueIterationT<decltype(maximize)::value>(m, options, progress, cancel);
  });
}

Result<AverageRewardSolution> AverageRewardAutomatic(const Model& m,
                                                     const AverageRewardOptions& options,
                                                     const ProgressFn* progress,
                                                     const CancelToken* cancel) {
  return Dispatch(m, options, "the average-reward solve", [&](auto maximize) {
    return AutomaticT<decltype(maximize)::value>(m, options, progress, cancel);
  });
}

Result<AverageRewardSolution> AverageRewardPolicyIteration(const Model& m,
                                                           const AverageRewardOptions& options,
                                                           const ProgressFn* progress,
                                                           const CancelToken* cancel) {
  return Dispatch(m, options, "average-reward policy iteration", [&](auto maximize) {
    return PolicyIterationWithRestart<decltype(maximize)::value>(m, options, progress, cancel);
  });
}

}  // namespace mdp
