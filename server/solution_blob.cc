#include "server/solution_blob.h"

#include <cstring>
#include <limits>
#include <type_traits>

#include "server/byte_io.h"

namespace mdp::server {
namespace {

constexpr char kMagic[4] = {'M', 'D', 'P', 'S'};
constexpr uint32_t kVersion = 2;  // 1: discounted only (no criterion section); still read.

// Stable codes of methods in blobs (the enum's order is not a storage format).
constexpr Method kMethodCodes[] = {Method::kValueIteration, Method::kGaussSeidel,
                                   Method::kPolicyIteration, Method::kModifiedPolicyIteration,
                                   Method::kRelativeValueIteration, Method::kBackwardInduction,
                                   Method::kAuto};
constexpr uint32_t kMethodCount = sizeof kMethodCodes / sizeof kMethodCodes[0];

uint32_t MethodCode(Method method) {
  for (uint32_t i = 0; i < kMethodCount; ++i) {
    if (kMethodCodes[i] == method) return i;
  }
  return 0;
}

class Writer : public ByteWriter {
 public:
  template <typename T>
  void PutCounted(const std::vector<T>& values) {
    Put(static_cast<int64_t>(values.size()));
    PutArray(values);
  }
};

class Reader : public ByteReader {
 public:
  using ByteReader::ByteReader;
  // A length-prefixed array of at most `max` elements.
  template <typename T>
  bool GetCounted(std::vector<T>* values, int64_t max) {
    int64_t count = 0;
    return Get(&count) && count >= 0 && count <= max && GetArray(values, count);
  }
};

// Version 2 appends: u32 criterion; average: f64 gain, gain_lower, gain_upper,
// i32 reference_state, u8 multichain, i64 classes, per class i64 n + i32[n], i64 n + note
// bytes, i64 n + f64[n] state_gain; finite horizon: i64 horizon, i64 n + f64[n] stage
// values; total: i64 n + u8[n] reaches_goal, i64 n + f64[n] expected_steps, i64
// states_not_reaching_goal, f64 max_expected_steps.
void PutCriterionSection(const Solution& s, Writer& w) {
  w.Put(static_cast<uint32_t>(s.criterion));
  const Solution::AverageReport& a = s.average;
  w.Put(a.gain);
  w.Put(a.gain_lower);
  w.Put(a.gain_upper);
  w.Put(static_cast<int32_t>(a.reference_state));
  w.Put(static_cast<uint8_t>(a.multichain ? 1 : 0));
  w.Put(static_cast<int64_t>(a.recurrent_classes.size()));
  for (const auto& c : a.recurrent_classes) w.PutCounted(c);
  w.PutCounted(std::vector<char>(a.note.begin(), a.note.end()));
  w.PutCounted(a.state_gain);
  w.Put(s.horizon);
  w.PutCounted(s.stage_values);
  w.PutCounted(s.total.reaches_goal);
  w.PutCounted(s.total.expected_steps);
  w.Put(s.total.states_not_reaching_goal);
  w.Put(s.total.max_expected_steps);
}

bool GetCriterionSection(Reader& r, int64_t states, Solution& s) {
  uint32_t kind = 0;
  uint8_t multichain = 0;
  int32_t reference = 0;
  int64_t classes = 0;
  Solution::AverageReport& a = s.average;
  if (!(r.Get(&kind) && kind <= 3 && r.Get(&a.gain) && r.Get(&a.gain_lower) &&
        r.Get(&a.gain_upper) && r.Get(&reference) && r.Get(&multichain) && r.Get(&classes) &&
        classes >= 0 && classes <= states)) {
    return false;
  }
  s.criterion = static_cast<CriterionKind>(kind);
  a.reference_state = reference;
  a.multichain = multichain != 0;
  a.recurrent_classes.resize(static_cast<size_t>(classes));
  for (auto& c : a.recurrent_classes) {
    if (!r.GetCounted(&c, states)) return false;
  }
  std::vector<char> note;
  if (!r.GetCounted(&note, int64_t{1} << 20)) return false;
  a.note.assign(note.begin(), note.end());
  if (!(r.GetCounted(&a.state_gain, states) && r.Get(&s.horizon) && s.horizon >= 0)) return false;
  // At most (horizon + 1) * states stage values. The horizon is read from the blob: a product
  // past int64 (found by tests/fuzz) saturates instead of overflowing; no blob holds that many.
  int64_t stage_cap = std::numeric_limits<int64_t>::max();
  if (s.horizon < stage_cap && __builtin_mul_overflow(s.horizon + 1, states, &stage_cap)) {
    stage_cap = std::numeric_limits<int64_t>::max();
  }
  return r.GetCounted(&s.stage_values, stage_cap) &&
         r.GetCounted(&s.total.reaches_goal, states) &&
         r.GetCounted(&s.total.expected_steps, states) &&
         r.Get(&s.total.states_not_reaching_goal) && r.Get(&s.total.max_expected_steps);
}

}  // namespace

std::string EncodeSolutionBlob(const Solution& s) {
  Writer w;
  w.Reserve(256 + s.values.size() * 24 + s.q.size() * 9);
  for (char c : kMagic) w.Put(c);
  w.Put(kVersion);
  w.Put(MethodCode(s.method));
  w.Put(static_cast<uint32_t>(s.outcome));
  w.Put(s.iterations);
  w.Put(s.sweeps);
  for (double x : {s.residual, s.value_error_bound, s.q_error_bound, s.policy_loss_bound,
                   s.tie_tolerance, s.solve_seconds}) {
    w.Put(x);
  }
  const SolveOptions& o = s.options;
  w.Put(MethodCode(o.method));
  w.Put(o.tolerance);
  w.Put(o.max_iterations);
  w.Put(o.time_limit_seconds);
  w.Put(o.evaluation_sweeps);
  w.Put(static_cast<uint32_t>(o.linear_solver));
  w.Put(o.tie_tolerance);
  w.Put(static_cast<int32_t>(o.threads));
  w.Put(s.tied_states);
  w.Put(static_cast<int64_t>(s.values.size()));
  w.Put(static_cast<int64_t>(s.q.size()));
  w.PutArray(s.values);
  w.PutArray(s.q);
  w.PutArray(s.best_row);
  w.PutArray(s.optimal_row);
  w.PutArray(s.action_gap);
  PutCriterionSection(s, w);
  return w.Take();
}

Result<Solution> DecodeSolutionBlob(std::string_view blob, int64_t states, int64_t rows) {
  Reader r(blob);
  char magic[4];
  uint32_t version = 0, method = 0, outcome = 0, option_method = 0, linear = 0;
  int32_t threads = 0;
  int64_t stored_states = 0, stored_rows = 0;
  Solution s;
  bool ok = r.Get(&magic[0]) && r.Get(&magic[1]) && r.Get(&magic[2]) && r.Get(&magic[3]) &&
            std::memcmp(magic, kMagic, 4) == 0 && r.Get(&version) &&
            (version == 1 || version == kVersion);
  if (!ok) return InternalError("stored solution has an unknown format or version");
  ok = r.Get(&method) && r.Get(&outcome) && r.Get(&s.iterations) && r.Get(&s.sweeps) &&
       r.Get(&s.residual) && r.Get(&s.value_error_bound) && r.Get(&s.q_error_bound) &&
       r.Get(&s.policy_loss_bound) && r.Get(&s.tie_tolerance) && r.Get(&s.solve_seconds) &&
       r.Get(&option_method) && r.Get(&s.options.tolerance) && r.Get(&s.options.max_iterations) &&
       r.Get(&s.options.time_limit_seconds) && r.Get(&s.options.evaluation_sweeps) &&
       r.Get(&linear) && r.Get(&s.options.tie_tolerance) && r.Get(&threads) &&
       r.Get(&s.tied_states) && r.Get(&stored_states) && r.Get(&stored_rows);
  if (!ok || stored_states != states || stored_rows != rows || method >= kMethodCount ||
      outcome > 4 || option_method >= kMethodCount || linear > 3) {
    return InternalError("stored solution is truncated or does not match its model");
  }
  s.method = kMethodCodes[method];
  s.outcome = static_cast<SolveOutcome>(outcome);
  s.options.method = kMethodCodes[option_method];
  s.options.linear_solver = static_cast<LinearSolver>(linear);
  s.options.threads = threads;
  ok = r.GetArray(&s.values, states) && r.GetArray(&s.q, rows) &&
       r.GetArray(&s.best_row, states) && r.GetArray(&s.optimal_row, rows) &&
       r.GetArray(&s.action_gap, states) &&
       (version == 1 || GetCriterionSection(r, states, s)) && r.AtEnd();
  if (!ok) return InternalError("stored solution is truncated");
  return s;
}

int64_t SolutionByteSize(const Solution& s) {
  return static_cast<int64_t>(sizeof(Solution) + s.values.size() * sizeof(double) +
                              s.q.size() * sizeof(double) + s.best_row.size() * sizeof(RowId) +
                              s.optimal_row.size() + s.action_gap.size() * sizeof(double) +
                              s.stage_values.size() * sizeof(double) +
                              s.average.state_gain.size() * sizeof(double) +
                              s.total.reaches_goal.size() +
                              s.total.expected_steps.size() * sizeof(double));
}

}  // namespace mdp::server
