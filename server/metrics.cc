#include "server/metrics.h"

#include <algorithm>
#include <charconv>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <limits>

namespace mdp::server {
namespace {

// Misuse is found while wiring the service at startup, so dying loudly there beats rendering
// text that a scraper would reject (or silently merging two different metrics).
[[noreturn]] void DieMisuse(std::string_view name, std::string_view reason) {
  std::fprintf(stderr, "mdpserve metrics: metric \"%.*s\": %.*s\n", static_cast<int>(name.size()),
               name.data(), static_cast<int>(reason.size()), reason.data());
  std::abort();
}

bool IsLetterOrUnderscore(char c) {
  return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || c == '_';
}

bool IsDigit(char c) { return c >= '0' && c <= '9'; }

// Metric names: [a-zA-Z_:][a-zA-Z0-9_:]* (exposition format 0.0.4).
bool IsValidMetricName(std::string_view name) {
  if (name.empty() || IsDigit(name[0])) return false;
  return std::all_of(name.begin(), name.end(),
                     [](char c) { return IsLetterOrUnderscore(c) || IsDigit(c) || c == ':'; });
}

// Label names: [a-zA-Z_][a-zA-Z0-9_]*; names starting "__" are reserved for Prometheus.
bool IsValidLabelName(std::string_view name) {
  if (name.empty() || IsDigit(name[0]) || name.starts_with("__")) return false;
  return std::all_of(name.begin(), name.end(),
                     [](char c) { return IsLetterOrUnderscore(c) || IsDigit(c); });
}

// Sorts `labels` by name and aborts on a bad or repeated name.
Labels Canonical(std::string_view metric, Labels labels) {
  std::sort(labels.begin(), labels.end());
  for (size_t i = 0; i < labels.size(); ++i) {
    if (!IsValidLabelName(labels[i].first)) DieMisuse(metric, "invalid label name");
    if (i > 0 && labels[i].first == labels[i - 1].first) {
      DieMisuse(metric, "repeated label name");
    }
  }
  return labels;
}

// Drops a trailing +Inf (it is always implicit) and aborts unless the rest is finite and
// strictly increasing.
std::vector<double> CheckedBounds(std::string_view metric, std::vector<double> bounds) {
  if (!bounds.empty() && bounds.back() == std::numeric_limits<double>::infinity()) {
    bounds.pop_back();
  }
  for (size_t i = 0; i < bounds.size(); ++i) {
    if (!std::isfinite(bounds[i])) DieMisuse(metric, "histogram bound not finite");
    if (i > 0 && !(bounds[i - 1] < bounds[i])) {
      DieMisuse(metric, "histogram bounds not strictly increasing");
    }
  }
  return bounds;
}

// Sample values as Go's ParseFloat reads them: NaN, +Inf, -Inf, integers without an exponent
// (counts stay readable up to 1e15), otherwise the shortest text that round-trips.
void AppendValue(std::string* out, double v) {
  if (std::isnan(v)) {
    out->append("NaN");
  } else if (std::isinf(v)) {
    out->append(v > 0 ? "+Inf" : "-Inf");
  } else {
    char buf[32];
    std::to_chars_result r;
    if (v == std::trunc(v) && std::fabs(v) < 1e15) {
      r = std::to_chars(buf, buf + sizeof(buf), static_cast<int64_t>(v));
    } else {
      r = std::to_chars(buf, buf + sizeof(buf), v, std::chars_format::general);
    }
    out->append(buf, r.ptr);
  }
}

void AppendValue(std::string* out, uint64_t v) {
  char buf[24];
  std::to_chars_result r = std::to_chars(buf, buf + sizeof(buf), v);
  out->append(buf, r.ptr);
}

// Label values escape backslash, double quote and newline; HELP text escapes only backslash
// and newline (exposition format 0.0.4).
void AppendEscaped(std::string* out, std::string_view text, bool escape_quote) {
  for (char c : text) {
    if (c == '\\') {
      out->append("\\\\");
    } else if (c == '\n') {
      out->append("\\n");
    } else if (c == '"' && escape_quote) {
      out->append("\\\"");
    } else {
      out->push_back(c);
    }
  }
}

// Appends `{a="x",b="y"}` (plus le="..." last, when given), or nothing for no labels.
void AppendLabels(std::string* out, const Labels& labels, const std::string* le = nullptr) {
  if (labels.empty() && le == nullptr) return;
  out->push_back('{');
  bool first = true;
  auto append_pair = [&](std::string_view name, std::string_view value) {
    if (!first) out->push_back(',');
    first = false;
    out->append(name);
    out->append("=\"");
    AppendEscaped(out, value, /*escape_quote=*/true);
    out->push_back('"');
  };
  for (const auto& [name, value] : labels) append_pair(name, value);
  if (le != nullptr) append_pair("le", *le);
  out->push_back('}');
}

template <typename Value>
void AppendSample(std::string* out, std::string_view name, std::string_view suffix,
                  const Labels& labels, Value value, const std::string* le = nullptr) {
  out->append(name);
  out->append(suffix);
  AppendLabels(out, labels, le);
  out->push_back(' ');
  AppendValue(out, value);
  out->push_back('\n');
}

void AppendHistogram(std::string* out, std::string_view name, const Labels& labels,
                     const HistogramSnapshot& snap) {
  std::string le;
  for (size_t i = 0; i < snap.upper_bounds.size(); ++i) {
    le.clear();
    AppendValue(&le, snap.upper_bounds[i]);
    AppendSample(out, name, "_bucket", labels, snap.cumulative[i], &le);
  }
  le = "+Inf";
  AppendSample(out, name, "_bucket", labels, snap.count, &le);
  AppendSample(out, name, "_sum", labels, snap.sum);
  AppendSample(out, name, "_count", labels, snap.count);
}

const char* TypeName(MetricType type) {
  switch (type) {
    case MetricType::kCounter:
      return "counter";
    case MetricType::kGauge:
      return "gauge";
    case MetricType::kHistogram:
      return "histogram";
  }
  return "untyped";
}

}  // namespace

// ---------------------------------------------------------------------------------------
// Histogram

Histogram::Histogram(std::vector<double> upper_bounds)
    : upper_bounds_(CheckedBounds("histogram", std::move(upper_bounds))),
      buckets_(new std::atomic<uint64_t>[upper_bounds_.size() + 1]()) {}

void Histogram::Observe(double value) {
  // One NaN would turn _sum into NaN for the rest of the process.
  if (std::isnan(value)) return;
  // "le" buckets are inclusive: the first bound >= value; past the end is the +Inf bucket.
  size_t index = static_cast<size_t>(
      std::lower_bound(upper_bounds_.begin(), upper_bounds_.end(), value) - upper_bounds_.begin());
  buckets_[index].fetch_add(1, std::memory_order_relaxed);
  sum_.fetch_add(value, std::memory_order_relaxed);
}

HistogramSnapshot Histogram::Snapshot() const {
  HistogramSnapshot snap;
  snap.upper_bounds = upper_bounds_;
  snap.cumulative.reserve(upper_bounds_.size());
  uint64_t running = 0;
  for (size_t i = 0; i < upper_bounds_.size(); ++i) {
    running += buckets_[i].load(std::memory_order_relaxed);
    snap.cumulative.push_back(running);
  }
  // Derive the count from the same bucket reads so +Inf and _count always agree.
  snap.count = running + buckets_[upper_bounds_.size()].load(std::memory_order_relaxed);
  snap.sum = sum_.load(std::memory_order_relaxed);
  return snap;
}

// ---------------------------------------------------------------------------------------
// MetricsRegistry

struct MetricsRegistry::Family {
  MetricType type;
  bool is_collector;
  std::string help;
  std::vector<double> upper_bounds;  // Histogram families only.
  // Exactly one of these is used, by type (collector families use only `collect`).
  std::map<Labels, std::unique_ptr<Counter>> counters;
  std::map<Labels, std::unique_ptr<Gauge>> gauges;
  std::map<Labels, std::unique_ptr<Histogram>> histograms;
  CollectFn collect;
};

MetricsRegistry::MetricsRegistry() = default;
MetricsRegistry::~MetricsRegistry() = default;

MetricsRegistry::Family* MetricsRegistry::FamilyFor(std::string_view name, std::string_view help,
                                                    MetricType type, bool is_collector) {
  auto it = families_.find(name);
  if (it == families_.end()) {
    if (!IsValidMetricName(name)) DieMisuse(name, "invalid metric name");
    auto family = std::make_unique<Family>();
    family->type = type;
    family->is_collector = is_collector;
    family->help = std::string(help);
    it = families_.emplace(std::string(name), std::move(family)).first;
    return it->second.get();
  }
  Family* family = it->second.get();
  if (family->type != type || family->is_collector != is_collector) {
    DieMisuse(name, "registered twice with different types");
  }
  // A collector may be re-registered with new text; handle families share one HELP line.
  if (is_collector) {
    family->help = std::string(help);
  } else if (family->help != help) {
    DieMisuse(name, "registered twice with different help texts");
  }
  return family;
}

Counter* MetricsRegistry::GetCounter(std::string_view name, std::string_view help, Labels labels) {
  labels = Canonical(name, std::move(labels));
  std::lock_guard<std::mutex> lock(mu_);
  Family* family = FamilyFor(name, help, MetricType::kCounter, /*is_collector=*/false);
  std::unique_ptr<Counter>& slot = family->counters[std::move(labels)];
  if (slot == nullptr) slot = std::make_unique<Counter>();
  return slot.get();
}

Gauge* MetricsRegistry::GetGauge(std::string_view name, std::string_view help, Labels labels) {
  labels = Canonical(name, std::move(labels));
  std::lock_guard<std::mutex> lock(mu_);
  Family* family = FamilyFor(name, help, MetricType::kGauge, /*is_collector=*/false);
  std::unique_ptr<Gauge>& slot = family->gauges[std::move(labels)];
  if (slot == nullptr) slot = std::make_unique<Gauge>();
  return slot.get();
}

Histogram* MetricsRegistry::GetHistogram(std::string_view name, std::string_view help,
                                         Labels labels, std::vector<double> upper_bounds) {
  labels = Canonical(name, std::move(labels));
  for (const auto& label : labels) {
    if (label.first == "le") DieMisuse(name, "histogram label \"le\" is reserved");
  }
  upper_bounds = CheckedBounds(name, std::move(upper_bounds));
  std::lock_guard<std::mutex> lock(mu_);
  Family* family = FamilyFor(name, help, MetricType::kHistogram, /*is_collector=*/false);
  if (family->histograms.empty()) {
    family->upper_bounds = upper_bounds;
  } else if (family->upper_bounds != upper_bounds) {
    DieMisuse(name, "histogram buckets differ within the family");
  }
  std::unique_ptr<Histogram>& slot = family->histograms[std::move(labels)];
  if (slot == nullptr) slot = std::make_unique<Histogram>(std::move(upper_bounds));
  return slot.get();
}

void MetricsRegistry::RegisterGaugeCallback(std::string_view name, std::string_view help,
                                            std::function<double()> read) {
  RegisterCollector(name, help, MetricType::kGauge,
                    [read = std::move(read)](std::vector<CollectedSample>* out) {
                      out->push_back(CollectedSample{{}, read()});
                    });
}

void MetricsRegistry::RegisterCollector(std::string_view name, std::string_view help,
                                        MetricType type, CollectFn collect) {
  if (type == MetricType::kHistogram) DieMisuse(name, "collectors cannot be histograms");
  std::lock_guard<std::mutex> lock(mu_);
  FamilyFor(name, help, type, /*is_collector=*/true)->collect = std::move(collect);
}

std::string MetricsRegistry::RenderText() const {
  std::string out;
  std::vector<CollectedSample> collected;
  std::lock_guard<std::mutex> lock(mu_);
  for (const auto& [name, family] : families_) {
    out.append("# HELP ").append(name).push_back(' ');
    AppendEscaped(&out, family->help, /*escape_quote=*/false);
    out.append("\n# TYPE ").append(name).push_back(' ');
    out.append(TypeName(family->type)).push_back('\n');
    if (family->is_collector) {
      collected.clear();
      family->collect(&collected);
      for (const CollectedSample& s : collected) AppendSample(&out, name, "", s.labels, s.value);
      continue;
    }
    for (const auto& [labels, c] : family->counters) {
      AppendSample(&out, name, "", labels, c->value());
    }
    for (const auto& [labels, g] : family->gauges) {
      AppendSample(&out, name, "", labels, g->value());
    }
    for (const auto& [labels, h] : family->histograms) {
      AppendHistogram(&out, name, labels, h->Snapshot());
    }
  }
  return out;
}

// ---------------------------------------------------------------------------------------
// HttpMetrics

namespace {

constexpr int kMinStatus = 100;
constexpr int kMaxStatus = 599;
// One slot per status 100..599, then one for anything outside that range.
constexpr size_t kStatusSlots = kMaxStatus - kMinStatus + 2;
constexpr size_t kOtherStatusSlot = kStatusSlots - 1;

constexpr std::string_view kRequestsName = "mdpserve_http_requests_total";
constexpr std::string_view kRequestsHelp =
    "HTTP requests answered, by route template, method and status code.";
constexpr std::string_view kDurationName = "mdpserve_http_request_duration_seconds";
constexpr std::string_view kDurationHelp =
    "Time to handle an HTTP request in seconds, by route template and method.";

}  // namespace

// All counters of one (route, method) in one allocation, preallocated so that Record()
// never allocates or locks. 501 x 8 bytes per route is small next to a connection buffer.
struct HttpMetrics::RequestHandle {
  RequestHandle(std::string route_template, std::string http_method, Histogram* histogram)
      : route(std::move(route_template)), method(std::move(http_method)), latency(histogram) {}

  const std::string route;
  const std::string method;
  Histogram* const latency;  // Owned by the registry.
  std::array<std::atomic<uint64_t>, kStatusSlots> by_status{};
};

struct HttpMetrics::Handles {
  std::vector<std::unique_ptr<RequestHandle>> list;  // Constant after construction.

  RequestHandle* Find(std::string_view route, std::string_view method) const {
    for (const auto& h : list) {
      if (h->route == route && h->method == method) return h.get();
    }
    return nullptr;
  }

  // Emits one sample per (route, method, status) with a non-zero count.
  void Collect(std::vector<CollectedSample>* out) const {
    for (const auto& h : list) {
      for (size_t slot = 0; slot < kStatusSlots; ++slot) {
        uint64_t n = h->by_status[slot].load(std::memory_order_relaxed);
        if (n == 0) continue;
        std::string status = slot == kOtherStatusSlot
                                 ? std::string("other")
                                 : std::to_string(kMinStatus + static_cast<int>(slot));
        out->push_back(CollectedSample{
            {{"method", h->method}, {"route", h->route}, {"status", std::move(status)}},
            static_cast<double>(n)});
      }
    }
  }
};

HttpMetrics::HttpMetrics(MetricsRegistry* registry, const std::vector<RouteMethod>& routes)
    : handles_(std::make_shared<Handles>()) {
  std::vector<double> buckets(kLatencyBuckets.begin(), kLatencyBuckets.end());
  auto add = [&](std::string_view route, std::string_view method) {
    if (RequestHandle* existing = handles_->Find(route, method)) return existing;
    Histogram* latency = registry->GetHistogram(
        kDurationName, kDurationHelp,
        {{"method", std::string(method)}, {"route", std::string(route)}}, buckets);
    handles_->list.push_back(
        std::make_unique<RequestHandle>(std::string(route), std::string(method), latency));
    return handles_->list.back().get();
  };
  for (const RouteMethod& r : routes) add(r.route, r.method);
  unmatched_ = add(kUnmatchedRoute, kUnmatchedMethod);
  // The registry keeps the handles alive through this shared pointer, so rendering stays
  // safe whichever of the two objects is destroyed first.
  registry->RegisterCollector(kRequestsName, kRequestsHelp, MetricType::kCounter,
                              [handles = std::shared_ptr<const Handles>(handles_)](
                                  std::vector<CollectedSample>* out) { handles->Collect(out); });
}

HttpMetrics::~HttpMetrics() = default;

HttpMetrics::RequestHandle* HttpMetrics::For(std::string_view route,
                                             std::string_view method) const {
  RequestHandle* handle = handles_->Find(route, method);
  return handle != nullptr ? handle : unmatched_;
}

void HttpMetrics::Record(RequestHandle* handle, int status, double seconds) {
  size_t slot = (status >= kMinStatus && status <= kMaxStatus)
                    ? static_cast<size_t>(status - kMinStatus)
                    : kOtherStatusSlot;
  handle->by_status[slot].fetch_add(1, std::memory_order_relaxed);
  handle->latency->Observe(seconds);
}

}  // namespace mdp::server
