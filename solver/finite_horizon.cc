#include "solver/finite_horizon.h"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <limits>
#include <string>

#include "solver/internal/bellman.h"

namespace mdp {
namespace {

// Q of row r against next-stage values v, with the caller's discount g.
double StageQ(const Model& m, RowId r, const double* v, double g) {
  return m.row_reward(r) + g * internal::RowSum(m, r, v);
}

Status CheckOptions(const Model& m, const FiniteHorizonOptions& o) {
  if (o.horizon < 1) return InvalidArgumentError("horizon must be at least 1");
  if (!(o.discount >= 0.0 && o.discount <= 1.0)) {
    return InvalidArgumentError("finite-horizon discount must be between 0 and 1");
  }
  if (!o.terminal_values.empty()) {
    if (static_cast<StateId>(o.terminal_values.size()) != m.num_states()) {
      return InvalidArgumentError("terminal values must give one value per state");
    }
    for (StateId s = 0; s < m.num_states(); ++s) {
      if (!std::isfinite(o.terminal_values[s])) {
        return InvalidArgumentError("terminal value of state '" + m.state_name(s) +
                                    "' is not a finite number");
      }
      if (m.terminal(s) && o.terminal_values[s] != 0.0) {
        return InvalidArgumentError("state '" + m.state_name(s) +
                                    "' is absorbing: its terminal value is 0");
      }
    }
  }
  const double entries = (static_cast<double>(o.horizon) + 1.0) * m.num_states();
  if (entries > static_cast<double>(o.max_table_entries)) {
    return ResourceExhaustedError("a horizon of " + std::to_string(o.horizon) + " over " +
                                  std::to_string(m.num_states()) +
                                  " states needs more memory than allowed for the value table");
  }
  return Status::Ok();
}

}  // namespace

Result<FiniteHorizonSolution> BackwardInduction(const Model& m, const FiniteHorizonOptions& o,
                                                const ProgressFn* progress,
                                                const CancelToken* cancel) {
  MDP_RETURN_IF_ERROR(CheckOptions(m, o));
  const auto start = std::chrono::steady_clock::now();
  const auto elapsed = [&] {
    return std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  };
  FiniteHorizonSolution out;
  out.horizon = o.horizon;
  out.discount = o.discount;
  out.states = m.num_states();
  try {
    out.stage_values.assign(static_cast<size_t>((o.horizon + 1) * m.num_states()), 0.0);
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory for the finite-horizon value table");
  }
  double* table = out.stage_values.data();
  if (!o.terminal_values.empty()) {
    std::copy(o.terminal_values.begin(), o.terminal_values.end(), table + o.horizon * out.states);
  }
  const int threads = internal::ThreadCount(o.threads);
  for (int64_t t = o.horizon - 1; t >= 0; --t) {
    const double* next = table + (t + 1) * out.states;
    double* here = table + t * out.states;
    internal::StageSweep(m, next, o.discount, here, threads);  // Terminal states stay 0.
    const int64_t done = o.horizon - t;
    if (progress != nullptr && *progress) {
      (*progress)(Progress{done, done, 0.0, 0.0, elapsed(), "stage"});
    }
    if (cancel != nullptr && cancel->cancelled()) {
      out.cancelled = true;
      break;
    }
  }
  out.seconds = elapsed();
  return out;
}

StageDecision DecideAtStage(const Model& m, const FiniteHorizonSolution& solution, int64_t stage,
                            StateId s, double tie_tolerance) {
  return DecideFromNextStage(m, solution.stage_values.data() + (stage + 1) * solution.states,
                             solution.discount, s, tie_tolerance);
}

StageDecision DecideFromNextStage(const Model& m, const double* next, double discount, StateId s,
                                  double tie_tolerance) {
  StageDecision d;
  d.action_gap = std::numeric_limits<double>::quiet_NaN();
  const bool maximize = m.objective() == Objective::kMaximize;
  double best = 0.0;
  for (RowId r = m.row_begin(s); r < m.row_end(s); ++r) {
    const double q = StageQ(m, r, next, discount);
    d.q.push_back(q);
    if (r == m.row_begin(s) || (maximize ? q > best : q < best)) best = q;
  }
  if (d.q.empty()) return d;
  d.value = best;
  const double slack = tie_tolerance + 1e-12 * std::max(1.0, std::fabs(best));
  double second = std::numeric_limits<double>::quiet_NaN();
  bool skipped_best = false;
  for (size_t i = 0; i < d.q.size(); ++i) {
    const bool optimal = std::fabs(d.q[i] - best) <= slack;
    d.optimal.push_back(optimal ? 1 : 0);
    if (optimal && d.pick < 0) d.pick = m.row_begin(s) + static_cast<RowId>(i);
    if (!skipped_best && d.q[i] == best) {
      skipped_best = true;
      continue;
    }
    if (std::isnan(second) || (maximize ? d.q[i] > second : d.q[i] < second)) second = d.q[i];
  }
  if (d.q.size() >= 2) d.action_gap = std::fabs(best - second);
  return d;
}

}  // namespace mdp
