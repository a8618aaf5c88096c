// A small hand-written metrics registry for the HTTP service, rendered in the Prometheus text
// exposition format, version 0.0.4. Thread-safety: recording through a Counter, Gauge or
// Histogram handle is lock-free (relaxed atomics) and safe from any thread; creating handles,
// registering callbacks and rendering take the registry's mutex. Ownership: the registry owns
// every handle it returns, and a handle stays valid for the registry's whole life.
// HttpMetrics builds per-route request counts and latency histograms on top.
#ifndef MDP_SERVER_METRICS_H_
#define MDP_SERVER_METRICS_H_

#include <array>
#include <atomic>
#include <cstdint>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

namespace mdp::server {

// The Content-Type header value for RenderText() output.
inline constexpr std::string_view kMetricsContentType = "text/plain; version=0.0.4; charset=utf-8";

// Label pairs (name, value). Names match [a-zA-Z_][a-zA-Z0-9_]* and must not start with
// "__"; values are any UTF-8 text (escaped when rendered). The registry sorts them by name.
using Labels = std::vector<std::pair<std::string, std::string>>;

// A monotonically increasing count (requests, bytes). Lock-free.
class Counter {
 public:
  Counter() = default;
  Counter(const Counter&) = delete;
  Counter& operator=(const Counter&) = delete;

  void Add(uint64_t n = 1) { value_.fetch_add(n, std::memory_order_relaxed); }
  uint64_t value() const { return value_.load(std::memory_order_relaxed); }

 private:
  std::atomic<uint64_t> value_{0};
};

// A value that goes up and down (workers busy, models loaded). Lock-free.
class Gauge {
 public:
  Gauge() = default;
  Gauge(const Gauge&) = delete;
  Gauge& operator=(const Gauge&) = delete;

  void Set(double v) { value_.store(v, std::memory_order_relaxed); }
  void Add(double delta) { value_.fetch_add(delta, std::memory_order_relaxed); }
  double value() const { return value_.load(std::memory_order_relaxed); }

 private:
  std::atomic<double> value_{0.0};
};

// A consistent-enough copy of a histogram: bucket counts are read one by one, so a snapshot
// taken while others observe may lag by in-flight observations, but `count` always equals
// the last cumulative bucket.
struct HistogramSnapshot {
  std::vector<double> upper_bounds;  // Finite, strictly increasing; +Inf is implicit.
  std::vector<uint64_t> cumulative;  // cumulative[i] = observations <= upper_bounds[i].
  uint64_t count = 0;                // All observations (the +Inf bucket).
  double sum = 0.0;                  // Sum of observed values.
};

// Observations (usually seconds) counted into fixed buckets chosen at creation. Lock-free:
// one bucket increment and one atomic add to the sum per observation.
class Histogram {
 public:
  // REQUIRES: `upper_bounds` finite and strictly increasing (without +Inf).
  explicit Histogram(std::vector<double> upper_bounds);
  Histogram(const Histogram&) = delete;
  Histogram& operator=(const Histogram&) = delete;

  // Counts `value` into the first bucket whose upper bound is >= value. NaN is ignored.
  void Observe(double value);
  HistogramSnapshot Snapshot() const;

 private:
  const std::vector<double> upper_bounds_;
  // Per-bucket (not cumulative) counts; the last one is the +Inf overflow bucket.
  const std::unique_ptr<std::atomic<uint64_t>[]> buckets_;
  std::atomic<double> sum_{0.0};
};

enum class MetricType { kCounter, kGauge, kHistogram };

// One sample produced by a collector at render time.
struct CollectedSample {
  Labels labels;  // REQUIRES: sorted by name, valid names (see Labels).
  double value = 0.0;
};

// Fills `out` with the current samples of one family; called under the registry's mutex, so
// it must be quick and must not call back into the registry.
using CollectFn = std::function<void(std::vector<CollectedSample>* out)>;

// The set of metric families of one process (or one test). Names match
// [a-zA-Z_:][a-zA-Z0-9_:]*. Misuse found while creating a handle (bad name, one name with two
// types or two help texts, histogram buckets that differ within a family) is a programming
// error: the process prints the reason to stderr and aborts.
class MetricsRegistry {
 public:
  MetricsRegistry();
  ~MetricsRegistry();
  MetricsRegistry(const MetricsRegistry&) = delete;
  MetricsRegistry& operator=(const MetricsRegistry&) = delete;

  // Returns the handle for (name, labels), creating it on first use; the same (name, labels)
  // always returns the same pointer. Owned by the registry.
  Counter* GetCounter(std::string_view name, std::string_view help, Labels labels = {});
  Gauge* GetGauge(std::string_view name, std::string_view help, Labels labels = {});
  // As above; `upper_bounds` (seconds, finite, strictly increasing; a trailing +Inf is
  // dropped) must be the same for every series of the family. Labels must not include "le".
  Histogram* GetHistogram(std::string_view name, std::string_view help, Labels labels,
                          std::vector<double> upper_bounds);

  // A gauge with no labels whose value is `read()` at render time (queue depth, cache bytes).
  // `read` runs under the registry's mutex: it must not call into the registry, and what it
  // reads must outlive the registry or be replaced by registering the same name again.
  void RegisterGaugeCallback(std::string_view name, std::string_view help,
                             std::function<double()> read);
  // A counter or gauge family whose samples come from `collect` at render time. Registering
  // an existing callback family's name again replaces its help and callback.
  // REQUIRES: type is kCounter or kGauge.
  void RegisterCollector(std::string_view name, std::string_view help, MetricType type,
                         CollectFn collect);

  // Every family in name order, each with one HELP and one TYPE line and its series sorted by
  // labels (collector series in the order collected). Ends with a newline unless empty.
  std::string RenderText() const;

 private:
  struct Family;

  // Returns the family `name`, adding it if new; aborts if it exists with another type or
  // help text. REQUIRES: mu_ held.
  Family* FamilyFor(std::string_view name, std::string_view help, MetricType type,
                    bool is_collector);

  mutable std::mutex mu_;
  // Keyed by metric name. Protected by mu_; a Family never moves once added.
  std::map<std::string, std::unique_ptr<Family>, std::less<>> families_;
};

// A route template and an HTTP method the server answers, e.g. {"/v1/models/{id}", "GET"}.
struct RouteMethod {
  std::string route;
  std::string method;
};

// Request counts per (route, method, status) and a latency histogram per (route, method):
//   mdpserve_http_requests_total{method,route,status}   (only statuses seen so far)
//   mdpserve_http_request_duration_seconds{method,route}
// Handles are resolved once per route at startup with For(); Record() is lock-free.
// Thread-safe. REQUIRES: the registry outlives every Record() call; use one HttpMetrics
// per registry.
class HttpMetrics {
 public:
  struct RequestHandle;  // Opaque; defined in metrics.cc.

  // Series for requests whose (route, method) was not declared, so that unexpected paths
  // and methods cannot grow the label set.
  static constexpr std::string_view kUnmatchedRoute = "unmatched";
  static constexpr std::string_view kUnmatchedMethod = "other";
  // Latency bucket upper bounds in seconds.
  static constexpr std::array<double, 16> kLatencyBuckets = {
      0.0001, 0.00025, 0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025,
      0.05,   0.1,     0.25,   0.5,   1,      2.5,   5,    10};

  // Creates the series for every declared (route, method) and for the unmatched pair.
  HttpMetrics(MetricsRegistry* registry, const std::vector<RouteMethod>& routes);
  ~HttpMetrics();
  HttpMetrics(const HttpMetrics&) = delete;
  HttpMetrics& operator=(const HttpMetrics&) = delete;

  // The handle for a declared (route, method), else the unmatched handle; never null. Owned
  // by this object and the registry, valid while either lives. Takes no lock, but scans the
  // route list: call once per route at startup, not per request.
  RequestHandle* For(std::string_view route, std::string_view method) const;

  // Counts one answered request with HTTP `status` (100..599; anything else is counted as
  // status="other") that took `seconds`. Lock-free.
  static void Record(RequestHandle* handle, int status, double seconds);

 private:
  struct Handles;
  std::shared_ptr<Handles> handles_;  // Constant after construction; shared with the registry.
  RequestHandle* unmatched_;
};

}  // namespace mdp::server

#endif  // MDP_SERVER_METRICS_H_
