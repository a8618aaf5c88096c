#include "solver/simulate.h"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <limits>
#include <new>
#include <random>
#include <string>
#include <unordered_map>

#include "solver/solver.h"

namespace mdp {
namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
constexpr double kInf = std::numeric_limits<double>::infinity();
// Rows with at most this many entries are sampled by a linear scan (faster than a search for
// short rows, and needs no memory); longer rows get a cumulative array, built on first use.
constexpr int64_t kLinearScanEntries = 16;
// Cancellation is also polled this often within one episode, so a long episode can be stopped.
constexpr int64_t kCancelPollSteps = 65536;

// A uniform double in [0, 1) from the top 53 bits of one draw: the same on every library.
double Uniform(std::mt19937_64& rng) { return static_cast<double>(rng() >> 11) * 0x1.0p-53; }

// Index i of the first cumulative[i] > u in [begin, end); rounding can leave u at or above the
// last partial sum, so that case falls back to the last index with positive mass.
int64_t SearchCumulative(const double* cumulative, int64_t begin, int64_t end, double u) {
  const double* hit = std::upper_bound(cumulative + begin, cumulative + end, u);
  if (hit != cumulative + end) return hit - cumulative;
  for (int64_t i = end - 1; i > begin; --i) {
    if (cumulative[i] > cumulative[i - 1]) return i;
  }
  return begin;
}

// Draws states, actions and next states for one simulation. Holds per-state data on the
// policy (a fixed row, or cumulative row probabilities) and cumulative arrays of the long
// rows the episodes actually reach, so memory follows the rows used.
class Sampler {
 public:
  // `staged` (may be null): a finite-horizon Solution whose stage decisions replace `policy`.
  Sampler(const Model& m, const Policy& policy, const Solution* staged,
          const std::vector<StartWeight>& start)
      : m_(m), staged_(staged), fixed_row_(m.num_states(), -1), row_cumulative_(m.num_rows(), 0.0) {
    for (StateId s = 0; s < m.num_states(); ++s) PreparePolicy(s, policy);
    double sum = 0.0;
    for (const StartWeight& w : start) {
      sum += w.probability;
      start_states_.push_back(w.state);
      start_cumulative_.push_back(sum);
    }
  }

  StateId Start(std::mt19937_64& rng) {
    if (start_states_.size() == 1) return start_states_[0];
    const double u = Uniform(rng) * start_cumulative_.back();
    return start_states_[SearchCumulative(start_cumulative_.data(), 0,
                                          static_cast<int64_t>(start_states_.size()), u)];
  }

  // The row taken in state s, `stage` steps into the episode. REQUIRES: s is not terminal.
  RowId Action(StateId s, int64_t stage, std::mt19937_64& rng) const {
    if (staged_ != nullptr) return DecideAtStage(m_, *staged_, stage, s).pick;
    if (fixed_row_[s] >= 0) return fixed_row_[s];
    return SearchCumulative(row_cumulative_.data(), m_.row_begin(s), m_.row_end(s), Uniform(rng));
  }

  StateId Next(RowId r, std::mt19937_64& rng) {
    const int64_t begin = m_.entry_begin(r), end = m_.entry_end(r);
    const double u = Uniform(rng);
    if (end - begin <= kLinearScanEntries) return m_.entry_next(ScanRow(begin, end, u));
    const std::vector<double>& cumulative = LongRowCumulative(r, begin, end);
    const int64_t i = SearchCumulative(cumulative.data(), 0, end - begin, u * cumulative.back());
    return m_.entry_next(begin + i);
  }

 private:
  // A state whose policy puts mass on a single row needs no draw; others get cumulative
  // probabilities normalised to end at exactly 1 (policies may sum to 1 within 1e-6).
  void PreparePolicy(StateId s, const Policy& policy) {
    const RowId begin = m_.row_begin(s), end = m_.row_end(s);
    RowId positive = -1, count = 0;
    double sum = 0.0;
    for (RowId r = begin; r < end; ++r) {
      if (policy.row_probability[r] > 0.0) {
        positive = r;
        ++count;
      }
      sum += policy.row_probability[r];
      row_cumulative_[r] = sum;
    }
    if (count <= 1) {
      fixed_row_[s] = positive;
      return;
    }
    for (RowId r = begin; r < end; ++r) row_cumulative_[r] /= sum;
    row_cumulative_[end - 1] = 1.0;
  }

  int64_t ScanRow(int64_t begin, int64_t end, double u) const {
    double acc = 0.0;
    int64_t last_positive = begin;
    for (int64_t e = begin; e < end; ++e) {
      const double p = m_.entry_probability(e);
      if (p <= 0.0) continue;
      acc += p;
      last_positive = e;
      if (u < acc) return e;
    }
    return last_positive;
  }

  const std::vector<double>& LongRowCumulative(RowId r, int64_t begin, int64_t end) {
    auto [it, inserted] = long_rows_.try_emplace(r);
    if (inserted) {
      it->second.resize(end - begin);
      double sum = 0.0;
      for (int64_t e = begin; e < end; ++e) it->second[e - begin] = sum += m_.entry_probability(e);
    }
    return it->second;
  }

  const Model& m_;
  const Solution* staged_;
  std::vector<RowId> fixed_row_;        // Per state: the only row with mass, or -1.
  std::vector<double> row_cumulative_;  // Per row, for states with two or more rows in use.
  std::vector<StateId> start_states_;
  std::vector<double> start_cumulative_;
  std::unordered_map<RowId, std::vector<double>> long_rows_;
};

// Raw results of the episodes, before the statistics.
struct Tally {
  std::vector<double> returns;
  std::vector<int64_t> visits;
  int64_t total_steps = 0;    // All steps, an interrupted episode's included.
  int64_t episode_steps = 0;  // Steps of finished episodes.
  int64_t truncated = 0;
};

// How an episode's return is formed under the model's criterion (header comment).
struct EpisodeRule {
  double discount = 1.0;  // Weight factor per step.
  int64_t steps = 0;      // Step cap.
  bool cut_is_truncation = true;  // Stopping at the cap in a non-terminal state is a cut.
  const std::vector<double>* end_values = nullptr;  // kFiniteHorizon V_H, added times g^H.
  double divide_by = 0.0;  // kAverage: N, the return is per step; 0 = none.
};

EpisodeRule RuleFor(const Model& m, const SimulateOptions& options) {
  const Criterion& c = m.criterion();
  switch (c.kind) {
    case CriterionKind::kDiscounted: return {m.discount(), options.max_steps, true, nullptr, 0.0};
    case CriterionKind::kTotal: return {1.0, options.max_steps, true, nullptr, 0.0};
    case CriterionKind::kFiniteHorizon:
      return {c.discount, c.horizon, false,
              c.terminal_values.empty() ? nullptr : &c.terminal_values, 0.0};
    case CriterionKind::kAverage:
      return {1.0, options.max_steps, false, nullptr, static_cast<double>(options.max_steps)};
  }
  return {};
}

// Runs one episode; false iff `cancel` fired during it. The steps of an interrupted episode
// stay in the visits and total_steps (so the frequencies still sum to 1) but it adds no return.
bool RunEpisode(const Model& m, Sampler& sampler, const EpisodeRule& rule,
                const CancelToken* cancel, std::mt19937_64& rng, Tally& tally) {
  StateId s = sampler.Start(rng);
  double ret = 0.0, weight = 1.0;
  int64_t steps = 0;
  for (; steps < rule.steps && !m.terminal(s); ++steps) {
    if (steps % kCancelPollSteps == kCancelPollSteps - 1 && cancel != nullptr &&
        cancel->cancelled()) {
      return false;
    }
    ++tally.visits[s];
    ++tally.total_steps;
    const RowId r = sampler.Action(s, steps, rng);
    ret += weight * m.row_reward(r);
    weight *= rule.discount;
    s = sampler.Next(r, rng);
  }
  if (rule.end_values != nullptr && !m.terminal(s)) ret += weight * (*rule.end_values)[s];
  if (rule.divide_by > 0.0) ret /= rule.divide_by;
  tally.returns.push_back(ret);
  tally.episode_steps += steps;
  if (rule.cut_is_truncation && !m.terminal(s)) ++tally.truncated;
  return true;
}

// z with Phi(z) = p for p in (0.5, 1), by bisection on the normal distribution function
// Phi(z) = erfc(-z / sqrt(2)) / 2; 200 halvings of [0, 40] reach double precision.
double NormalQuantile(double p) {
  double lo = 0.0, hi = 40.0;
  for (int i = 0; i < 200; ++i) {
    const double mid = 0.5 * (lo + hi);
    if (0.5 * std::erfc(-mid / std::sqrt(2.0)) < p) {
      lo = mid;
    } else {
      hi = mid;
    }
  }
  return 0.5 * (lo + hi);
}

double TruncationBound(const Model& m, const Policy& policy, int64_t max_steps) {
  const double g = m.discount();
  double max_reward = 0.0;
  for (RowId r = 0; r < m.num_rows(); ++r) {
    if (policy.row_probability[r] > 0.0) max_reward = std::max(max_reward, std::fabs(m.row_reward(r)));
  }
  return std::pow(g, static_cast<double>(max_steps)) * max_reward / (1.0 - g);
}

// Fills the statistics of `report` from the stored returns (sorted here).
void Summarise(const SimulateOptions& options, Tally& tally, SimulationReport& report) {
  std::vector<double>& x = tally.returns;
  const int64_t n = static_cast<int64_t>(x.size());
  report.episodes = n;
  report.mean = report.min = report.max = kNaN;
  report.std_dev = report.std_error = report.ci_low = report.ci_high = kNaN;
  for (double level : options.quantiles) report.quantiles.push_back({level, kNaN});
  report.mean_length = n > 0 ? static_cast<double>(tally.episode_steps) / n : kNaN;
  if (n == 0) return;
  // Two passes in episode order (mean, then squared deviations), with the data shifted by the
  // first return: stable, reproducible, and exact (zero spread) when all returns are equal.
  const double shift = x.front();
  double sum = 0.0;
  for (double r : x) sum += r - shift;
  report.mean = shift + sum / static_cast<double>(n);
  if (n >= 2) {
    double squares = 0.0;
    for (double r : x) squares += (r - report.mean) * (r - report.mean);
    report.std_dev = std::sqrt(squares / (n - 1));
    report.std_error = report.std_dev / std::sqrt(static_cast<double>(n));
    const double half = NormalQuantile(0.5 * (1.0 + options.confidence)) * report.std_error;
    report.ci_low = report.mean - half;
    report.ci_high = report.mean + half;
  }
  std::sort(x.begin(), x.end());
  report.min = x.front();
  report.max = x.back();
  for (QuantileValue& q : report.quantiles) {
    // The 1-based rank k = ceil(q n); the tiny slack keeps q n = 95.000000000000014 at 95.
    const double rank = std::ceil(q.level * static_cast<double>(n) - 1e-9);
    const int64_t k = std::clamp<int64_t>(static_cast<int64_t>(rank), 1, n);
    q.value = x[k - 1];
  }
}

Status CheckStart(const Model& m, const std::vector<StartWeight>& start) {
  if (start.empty()) return InvalidArgumentError("start: no start state given");
  double sum = 0.0;
  for (const StartWeight& w : start) {
    if (w.state < 0 || w.state >= m.num_states()) {
      return InvalidArgumentError("start: state index " + std::to_string(w.state) +
                                  " is not in the model");
    }
    if (!std::isfinite(w.probability) || w.probability < 0.0) {
      return InvalidArgumentError("start: probability of state '" + m.state_name(w.state) +
                                  "' must be finite and non-negative");
    }
    sum += w.probability;
  }
  if (std::fabs(sum - 1.0) > kStartSumTolerance) {
    return InvalidArgumentError("start: probabilities sum to " + std::to_string(sum) +
                                ", not 1");
  }
  return Status::Ok();
}

}  // namespace

std::string_view SimulationOutcomeName(SimulationOutcome outcome) {
  switch (outcome) {
    case SimulationOutcome::kCompleted: return "completed";
    case SimulationOutcome::kCancelled: return "cancelled";
  }
  return "unknown";
}

Status CheckSimulateOptions(const Model& m, const SimulateOptions& o) {
  MDP_RETURN_IF_ERROR(CheckStart(m, o.start));
  // Table order: episodes, max_steps (closed ranges), confidence (open range).
  const double values[] = {static_cast<double>(o.episodes), static_cast<double>(o.max_steps),
                           o.confidence};
  for (size_t i = 0; i < kSimulateOptionBounds.size(); ++i) {
    const OptionBound& b = kSimulateOptionBounds[i];
    const bool open = i == 2;
    const bool inside = open ? values[i] > b.min && values[i] < b.max
                             : values[i] >= b.min && values[i] <= b.max;
    if (!inside) {
      return InvalidArgumentError("option " + std::string(b.name) + " must be " +
                                  (open ? "strictly " : "") + "between " + std::to_string(b.min) +
                                  " and " + std::to_string(b.max) + ", got " +
                                  std::to_string(values[i]));
    }
  }
  for (double q : o.quantiles) {
    if (!(q >= 0.0 && q <= 1.0)) {
      return InvalidArgumentError("option quantiles: level " + std::to_string(q) +
                                  " is not in [0, 1]");
    }
  }
  return Status::Ok();
}

namespace {

// The truncation fields of `report` (header comment), once tally.truncated is in it.
void SetTruncation(const Model& m, const Policy& policy, const SimulateOptions& options,
                   SimulationReport& report) {
  const double cut = static_cast<double>(report.truncated_episodes);
  switch (m.criterion().kind) {
    case CriterionKind::kDiscounted:
      report.truncation_bound = TruncationBound(m, policy, options.max_steps);
      if (report.episodes > 0) {
        report.truncation_bias_bound =
            report.truncation_bound * cut / static_cast<double>(report.episodes);
      }
      return;
    case CriterionKind::kTotal:
      report.truncation_bound = kInf;
      report.truncation_bias_bound = cut > 0.0 ? kInf : 0.0;
      return;
    case CriterionKind::kFiniteHorizon:
      report.truncation_bound = report.truncation_bias_bound = 0.0;
      return;
    case CriterionKind::kAverage:
      report.truncation_bound = report.truncation_bias_bound = kNaN;
      return;
  }
}

// Simulate() for a checked policy, with `staged` (may be null) as in Sampler.
Result<SimulationReport> SimulateWith(const Model& m, const Policy& policy, const Solution* staged,
                                      const SimulateOptions& options, const ProgressFn* progress,
                                      const CancelToken* cancel) {
  const auto start_time = std::chrono::steady_clock::now();
  auto elapsed = [&] {
    return std::chrono::duration<double>(std::chrono::steady_clock::now() - start_time).count();
  };
  // The one place where allocation failure inside the simulation becomes a Status.
  try {
    Sampler sampler(m, policy, staged, options.start);
    const EpisodeRule rule = RuleFor(m, options);
    std::mt19937_64 rng(options.seed);
    Tally tally;
    tally.returns.reserve(static_cast<size_t>(options.episodes));
    tally.visits.assign(m.num_states(), 0);
    SimulationReport report;
    report.criterion = m.criterion().kind;
    const int64_t report_every = std::max<int64_t>(1, options.episodes / 100);
    for (int64_t done = 0; done < options.episodes;) {
      if (done % report_every == 0 && cancel != nullptr && cancel->cancelled()) {
        report.outcome = SimulationOutcome::kCancelled;
        break;
      }
      if (!RunEpisode(m, sampler, rule, cancel, rng, tally)) {
        report.outcome = SimulationOutcome::kCancelled;
        break;
      }
      ++done;
      if ((done % report_every == 0 || done == options.episodes) && progress != nullptr &&
          *progress) {
        (*progress)(Progress{done, 0, 0.0, 0.0, elapsed(), "simulate"});
      }
    }
    Summarise(options, tally, report);
    report.truncated_episodes = tally.truncated;
    SetTruncation(m, policy, options, report);
    report.total_steps = tally.total_steps;
    report.visit_frequency.assign(m.num_states(), 0.0);
    for (StateId s = 0; s < m.num_states() && tally.total_steps > 0; ++s) {
      report.visit_frequency[s] = static_cast<double>(tally.visits[s]) / tally.total_steps;
    }
    report.visits = std::move(tally.visits);
    report.elapsed_seconds = elapsed();
    return report;
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("out of memory during simulation");
  }
}

// OK iff `solution` is a Solution of `m` that Simulate can follow from `start`.
Status CheckSimulatedSolution(const Model& m, const Solution& solution,
                              const std::vector<StartWeight>& start) {
  const size_t n = static_cast<size_t>(m.num_states());
  if (solution.criterion != m.criterion().kind || solution.best_row.size() != n) {
    return InvalidArgumentError("the solution does not match the model");
  }
  if (m.criterion().kind == CriterionKind::kFiniteHorizon &&
      (solution.horizon != m.criterion().horizon ||
       solution.stage_values.size() != static_cast<size_t>(solution.horizon + 1) * n)) {
    return InvalidArgumentError("the solution does not hold the decisions of every stage");
  }
  for (const StartWeight& w : start) {
    if (w.state >= 0 && static_cast<size_t>(w.state) < n && !m.terminal(w.state) &&
        solution.best_row[w.state] < 0 && w.probability > 0.0) {
      return InvalidArgumentError("start: the solution has no decision in state '" +
                                  m.state_name(w.state) +
                                  "' (it cannot reach a goal with probability 1)");
    }
  }
  return Status::Ok();
}

}  // namespace

Result<SimulationReport> Simulate(const Model& m, const Policy& policy,
                                  const SimulateOptions& options, const ProgressFn* progress,
                                  const CancelToken* cancel) {
  MDP_RETURN_IF_ERROR(CheckPolicy(m, policy));
  MDP_RETURN_IF_ERROR(CheckSimulateOptions(m, options));
  return SimulateWith(m, policy, nullptr, options, progress, cancel);
}

Result<SimulationReport> Simulate(const Model& m, const Solution& solution,
                                  const SimulateOptions& options, const ProgressFn* progress,
                                  const CancelToken* cancel) {
  MDP_RETURN_IF_ERROR(CheckSimulateOptions(m, options));
  MDP_RETURN_IF_ERROR(CheckSimulatedSolution(m, solution, options.start));
  // States without a decision (kTotal: outside the goal-reaching set) take their first row;
  // no episode reaches them, since the picks take only rows that stay in that set.
  std::vector<RowId> rows = solution.best_row;
  for (StateId s = 0; s < m.num_states(); ++s) {
    if (rows[s] < 0 && !m.terminal(s)) rows[s] = m.row_begin(s);
  }
  const Solution* staged =
      m.criterion().kind == CriterionKind::kFiniteHorizon ? &solution : nullptr;
  return SimulateWith(m, DeterministicPolicy(m, rows), staged, options, progress, cancel);
}

}  // namespace mdp
