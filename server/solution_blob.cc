#include "server/solution_blob.h"

#include <cstring>
#include <type_traits>

namespace mdp::server {
namespace {

constexpr char kMagic[4] = {'M', 'D', 'P', 'S'};
constexpr uint32_t kVersion = 1;

class Writer {
 public:
  template <typename T>
  void Put(T value) {
    static_assert(std::is_trivially_copyable_v<T>);
    out_.append(reinterpret_cast<const char*>(&value), sizeof value);
  }
  template <typename T>
  void PutArray(const std::vector<T>& values) {
    out_.append(reinterpret_cast<const char*>(values.data()), values.size() * sizeof(T));
  }
  std::string Take() { return std::move(out_); }
  void Reserve(size_t n) { out_.reserve(n); }

 private:
  std::string out_;
};

class Reader {
 public:
  explicit Reader(std::string_view in) : in_(in) {}
  template <typename T>
  bool Get(T* value) {
    if (in_.size() < sizeof(T)) return false;
    std::memcpy(value, in_.data(), sizeof(T));
    in_.remove_prefix(sizeof(T));
    return true;
  }
  template <typename T>
  bool GetArray(std::vector<T>* values, int64_t count) {
    const size_t bytes = static_cast<size_t>(count) * sizeof(T);
    if (count < 0 || in_.size() < bytes) return false;
    values->resize(static_cast<size_t>(count));
    std::memcpy(values->data(), in_.data(), bytes);
    in_.remove_prefix(bytes);
    return true;
  }
  bool AtEnd() const { return in_.empty(); }

 private:
  std::string_view in_;
};

}  // namespace

std::string EncodeSolutionBlob(const Solution& s) {
  Writer w;
  w.Reserve(256 + s.values.size() * 24 + s.q.size() * 9);
  for (char c : kMagic) w.Put(c);
  w.Put(kVersion);
  w.Put(static_cast<uint32_t>(s.method));
  w.Put(static_cast<uint32_t>(s.outcome));
  w.Put(s.iterations);
  w.Put(s.sweeps);
  for (double x : {s.residual, s.value_error_bound, s.q_error_bound, s.policy_loss_bound,
                   s.tie_tolerance, s.solve_seconds}) {
    w.Put(x);
  }
  const SolveOptions& o = s.options;
  w.Put(static_cast<uint32_t>(o.method));
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
            std::memcmp(magic, kMagic, 4) == 0 && r.Get(&version) && version == kVersion;
  if (!ok) return InternalError("stored solution has an unknown format or version");
  ok = r.Get(&method) && r.Get(&outcome) && r.Get(&s.iterations) && r.Get(&s.sweeps) &&
       r.Get(&s.residual) && r.Get(&s.value_error_bound) && r.Get(&s.q_error_bound) &&
       r.Get(&s.policy_loss_bound) && r.Get(&s.tie_tolerance) && r.Get(&s.solve_seconds) &&
       r.Get(&option_method) && r.Get(&s.options.tolerance) && r.Get(&s.options.max_iterations) &&
       r.Get(&s.options.time_limit_seconds) && r.Get(&s.options.evaluation_sweeps) &&
       r.Get(&linear) && r.Get(&s.options.tie_tolerance) && r.Get(&threads) &&
       r.Get(&s.tied_states) && r.Get(&stored_states) && r.Get(&stored_rows);
  if (!ok || stored_states != states || stored_rows != rows || method > 3 || outcome > 4 ||
      option_method > 3 || linear > 3) {
    return InternalError("stored solution is truncated or does not match its model");
  }
  s.method = static_cast<Method>(method);
  s.outcome = static_cast<SolveOutcome>(outcome);
  s.options.method = static_cast<Method>(option_method);
  s.options.linear_solver = static_cast<LinearSolver>(linear);
  s.options.threads = threads;
  ok = r.GetArray(&s.values, states) && r.GetArray(&s.q, rows) &&
       r.GetArray(&s.best_row, states) && r.GetArray(&s.optimal_row, rows) &&
       r.GetArray(&s.action_gap, states) && r.AtEnd();
  if (!ok) return InternalError("stored solution is truncated");
  return s;
}

int64_t SolutionByteSize(const Solution& s) {
  return static_cast<int64_t>(sizeof(Solution) + s.values.size() * sizeof(double) +
                              s.q.size() * sizeof(double) + s.best_row.size() * sizeof(RowId) +
                              s.optimal_row.size() + s.action_gap.size() * sizeof(double));
}

}  // namespace mdp::server
