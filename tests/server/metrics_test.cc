// Tests server/metrics.{h,cc}: the registry's exact Prometheus text (format 0.0.4), handle
// identity, callback gauges, HttpMetrics per-status counts, exact totals under concurrent
// recording, and a small line checker that every rendered line follows the exposition grammar.
#include "server/metrics.h"

#include <gtest/gtest.h>

#include <atomic>
#include <cmath>
#include <limits>
#include <optional>
#include <regex>
#include <set>
#include <sstream>
#include <string>
#include <thread>
#include <vector>

namespace mdp::server {
namespace {

// Returns every way `text` breaks the exposition format's line grammar (empty if none):
// HELP/TYPE/sample lines only, each family's TYPE once and before its samples, sample names
// belonging to the current family (histograms: _bucket, _sum, _count), histogram buckets
// cumulative and the +Inf bucket equal to _count.
std::vector<std::string> ExpositionProblems(const std::string& text) {
  static const std::string name_re = R"([a-zA-Z_:][a-zA-Z0-9_:]*)";
  static const std::string label_re = R"([a-zA-Z_][a-zA-Z0-9_]*="(?:[^"\\\n]|\\[\\"n])*")";
  static const std::regex help_line("# HELP (" + name_re + R"() (?:[^\\\n]|\\[\\n])*)");
  static const std::regex type_line("# TYPE (" + name_re + ") (counter|gauge|histogram|untyped)");
  static const std::regex sample_line(
      "(" + name_re + R"()(\{)" + label_re + "(?:," + label_re +
      R"()*\})? ([+-]Inf|NaN|-?[0-9]+(?:\.[0-9]+)?(?:e[+-][0-9]+)?))");
  static const std::regex le_label(R"(le="([^"]*)\")");

  std::vector<std::string> problems;
  if (!text.empty() && text.back() != '\n') problems.push_back("no final newline");
  std::set<std::string> typed;
  std::string family, type, help_for;
  double last_bucket = 0, inf_bucket = -1;
  std::istringstream lines(text);
  std::string line;
  while (std::getline(lines, line)) {
    std::smatch m;
    if (std::regex_match(line, m, help_line)) {
      help_for = m[1];
    } else if (std::regex_match(line, m, type_line)) {
      if (!typed.insert(m[1]).second) problems.push_back("second TYPE: " + line);
      if (help_for != m[1]) problems.push_back("TYPE without HELP: " + line);
      family = m[1];
      type = m[2];
    } else if (std::regex_match(line, m, sample_line)) {
      std::string name = m[1];
      double value = std::stod(m[3] == "+Inf" ? "inf" : std::string(m[3]));
      if (type != "histogram") {
        if (name != family) problems.push_back("sample outside its family: " + line);
      } else if (name == family + "_bucket") {
        std::smatch le;
        std::string labels = m[2];
        if (!std::regex_search(labels, le, le_label))
          problems.push_back("bucket without le: " + line);
        if (value < last_bucket) problems.push_back("bucket not cumulative: " + line);
        last_bucket = value;
        if (le.size() > 1 && le[1] == "+Inf") inf_bucket = value;
      } else if (name == family + "_count") {
        if (value != inf_bucket) problems.push_back("_count differs from +Inf: " + line);
        last_bucket = 0;
        inf_bucket = -1;
      } else if (name != family + "_sum") {
        problems.push_back("sample outside its family: " + line);
      }
    } else {
      problems.push_back("not in the grammar: " + line);
    }
  }
  return problems;
}

// The value text of the sample line `series` (name plus labels), if rendered.
std::optional<std::string> SampleValue(const std::string& text, const std::string& series) {
  std::string prefix = "\n" + series + " ";
  size_t at = ("\n" + text).find(prefix);
  if (at == std::string::npos) return std::nullopt;
  size_t start = at + prefix.size() - 1;
  return text.substr(start, text.find('\n', start) - start);
}

TEST(MetricsLineCheckerTest, RejectsMalformedText) {
  const std::string head = "# HELP a A.\n# TYPE a counter\n";
  EXPECT_TRUE(ExpositionProblems(head + "a{x=\"1\"} 2\n").empty());
  EXPECT_EQ(ExpositionProblems(head + "a{x=\"say \"hi\"\"} 2\n").size(), 1u);  // Bad quotes.
  EXPECT_EQ(ExpositionProblems(head + "a{x=\"1\"}\n").size(), 1u);             // No value.
  EXPECT_EQ(ExpositionProblems(head + "b 1\n").size(), 1u);                    // Wrong family.
  EXPECT_EQ(ExpositionProblems("a 1\n").size(), 1u);                           // No TYPE.
  EXPECT_EQ(ExpositionProblems(head + head).size(), 1u);                       // TYPE twice.
  EXPECT_EQ(ExpositionProblems("# HELP h H.\n# TYPE h histogram\nh_bucket{le=\"1\"} 3\n"
                               "h_bucket{le=\"+Inf\"} 2\nh_sum 1\nh_count 3\n")
                .size(),
            2u);  // Bucket falls, and +Inf differs from _count.
}

TEST(MetricsRegistryTest, RendersExactText) {
  MetricsRegistry registry;
  registry.GetCounter("jobs_total", "Jobs \\ submitted\nby kind.", {{"kind", "a\"b\\c\nd"}})
      ->Add(3);
  registry.GetCounter("jobs_total", "Jobs \\ submitted\nby kind.", {{"kind", "solve"}})->Add();
  registry.GetGauge("workers_busy", "Busy workers.")->Set(2.5);
  Histogram* h =
      registry.GetHistogram("solve_seconds", "Solve time.", {{"method", "vi"}}, {0.125, 1, 10});
  for (double seconds : {0.0625, 0.125, 0.5, 20.0}) h->Observe(seconds);

  EXPECT_EQ(registry.RenderText(),
            "# HELP jobs_total Jobs \\\\ submitted\\nby kind.\n"
            "# TYPE jobs_total counter\n"
            "jobs_total{kind=\"a\\\"b\\\\c\\nd\"} 3\n"
            "jobs_total{kind=\"solve\"} 1\n"
            "# HELP solve_seconds Solve time.\n"
            "# TYPE solve_seconds histogram\n"
            "solve_seconds_bucket{method=\"vi\",le=\"0.125\"} 2\n"
            "solve_seconds_bucket{method=\"vi\",le=\"1\"} 3\n"
            "solve_seconds_bucket{method=\"vi\",le=\"10\"} 3\n"
            "solve_seconds_bucket{method=\"vi\",le=\"+Inf\"} 4\n"
            "solve_seconds_sum{method=\"vi\"} 20.6875\n"
            "solve_seconds_count{method=\"vi\"} 4\n"
            "# HELP workers_busy Busy workers.\n"
            "# TYPE workers_busy gauge\n"
            "workers_busy 2.5\n");
  EXPECT_TRUE(ExpositionProblems(registry.RenderText()).empty());
}

TEST(MetricsRegistryTest, EmptyRegistryRendersNothing) {
  MetricsRegistry registry;
  EXPECT_EQ(registry.RenderText(), "");
}

TEST(MetricsRegistryTest, SameNameAndLabelsReturnSameHandle) {
  MetricsRegistry registry;
  Counter* a = registry.GetCounter("c_total", "C.", {{"x", "1"}, {"y", "2"}});
  EXPECT_EQ(registry.GetCounter("c_total", "C.", {{"x", "1"}, {"y", "2"}}), a);
  EXPECT_EQ(registry.GetCounter("c_total", "C.", {{"y", "2"}, {"x", "1"}}), a);  // Unsorted.
  EXPECT_NE(registry.GetCounter("c_total", "C.", {{"x", "1"}, {"y", "3"}}), a);
  Gauge* g = registry.GetGauge("g", "G.");
  EXPECT_EQ(registry.GetGauge("g", "G."), g);
  Histogram* h = registry.GetHistogram("h_seconds", "H.", {}, {1, 2});
  EXPECT_EQ(registry.GetHistogram("h_seconds", "H.", {}, {1, 2}), h);

  a->Add(2);
  registry.GetCounter("c_total", "C.", {{"y", "2"}, {"x", "1"}})->Add(5);
  EXPECT_EQ(a->value(), 7u);
  EXPECT_EQ(SampleValue(registry.RenderText(), "c_total{x=\"1\",y=\"2\"}"), "7");
}

TEST(MetricsRegistryTest, GaugeAddsAndRendersSpecialValues) {
  MetricsRegistry registry;
  Gauge* g = registry.GetGauge("g", "G.");
  g->Add(1.5);
  g->Add(-4);
  EXPECT_EQ(g->value(), -2.5);
  EXPECT_EQ(SampleValue(registry.RenderText(), "g"), "-2.5");
  g->Set(std::numeric_limits<double>::infinity());
  EXPECT_EQ(SampleValue(registry.RenderText(), "g"), "+Inf");
  g->Set(std::nan(""));
  EXPECT_EQ(SampleValue(registry.RenderText(), "g"), "NaN");
  g->Set(1e20);
  EXPECT_EQ(SampleValue(registry.RenderText(), "g"), "1e+20");
  EXPECT_TRUE(ExpositionProblems(registry.RenderText()).empty());
}

TEST(MetricsRegistryTest, CallbackGaugeIsEvaluatedAtRender) {
  MetricsRegistry registry;
  double depth = 3;
  int calls = 0;
  registry.RegisterGaugeCallback("queue_depth", "Jobs waiting.", [&] {
    ++calls;
    return depth;
  });
  EXPECT_EQ(calls, 0);
  EXPECT_EQ(registry.RenderText(),
            "# HELP queue_depth Jobs waiting.\n# TYPE queue_depth gauge\nqueue_depth 3\n");
  depth = 7;
  EXPECT_EQ(SampleValue(registry.RenderText(), "queue_depth"), "7");
  EXPECT_EQ(calls, 2);

  registry.RegisterGaugeCallback("queue_depth", "Jobs waiting.", [] { return 0.25; });
  EXPECT_EQ(SampleValue(registry.RenderText(), "queue_depth"), "0.25");
}

TEST(MetricsRegistryTest, HistogramBucketsAreInclusiveAndIgnoreNaN) {
  Histogram h({1, 2, std::numeric_limits<double>::infinity()});  // Trailing +Inf dropped.
  for (double v : {-1.0, 1.0, 1.5, 2.0, 3.0, std::numeric_limits<double>::infinity()}) {
    h.Observe(v);
  }
  h.Observe(std::nan(""));
  HistogramSnapshot snap = h.Snapshot();
  EXPECT_EQ(snap.upper_bounds, (std::vector<double>{1, 2}));
  EXPECT_EQ(snap.cumulative, (std::vector<uint64_t>{2, 4}));
  EXPECT_EQ(snap.count, 6u);
  EXPECT_EQ(snap.sum, std::numeric_limits<double>::infinity());
}

using MetricsRegistryDeathTest = ::testing::Test;

TEST_F(MetricsRegistryDeathTest, MisuseAborts) {
  GTEST_FLAG_SET(death_test_style, "threadsafe");
  MetricsRegistry registry;
  registry.GetCounter("jobs_total", "Jobs.");
  registry.GetHistogram("h_seconds", "H.", {{"a", "1"}}, {1, 2});
  EXPECT_DEATH(registry.GetGauge("jobs_total", "Jobs."), "different types");
  EXPECT_DEATH(registry.GetCounter("jobs_total", "Other."), "different help");
  EXPECT_DEATH(registry.GetCounter("9lives", "N."), "invalid metric name");
  EXPECT_DEATH(registry.GetCounter("c", "C.", {{"__x", "1"}}), "invalid label name");
  EXPECT_DEATH(registry.GetCounter("c", "C.", {{"x", "1"}, {"x", "2"}}), "repeated label");
  EXPECT_DEATH(registry.GetHistogram("h_seconds", "H.", {{"a", "2"}}, {1, 3}), "buckets differ");
  EXPECT_DEATH(registry.GetHistogram("k", "K.", {{"le", "1"}}, {1}), "reserved");
  EXPECT_DEATH(registry.GetHistogram("k", "K.", {}, {2, 1}), "strictly increasing");
}

std::vector<RouteMethod> DeclaredRoutes() {
  return {{"/v1/models/{id}/policy", "GET"}, {"/v1/models", "POST"}, {"/v1/models", "GET"}};
}

TEST(HttpMetricsTest, CountsPerStatusAndRoute) {
  MetricsRegistry registry;
  HttpMetrics http(&registry, DeclaredRoutes());
  HttpMetrics::RequestHandle* policy = http.For("/v1/models/{id}/policy", "GET");
  HttpMetrics::RequestHandle* create = http.For("/v1/models", "POST");
  EXPECT_NE(policy, create);
  EXPECT_EQ(http.For("/v1/models", "GET"), http.For("/v1/models", "GET"));
  HttpMetrics::Record(policy, 200, 0.001);
  HttpMetrics::Record(policy, 200, 0.002);
  HttpMetrics::Record(policy, 404, 0.0001);
  HttpMetrics::Record(create, 201, 0.5);
  HttpMetrics::Record(create, 999, 0.5);

  const std::string text = registry.RenderText();
  const std::string policy_labels = "method=\"GET\",route=\"/v1/models/{id}/policy\"";
  const std::string create_labels = "method=\"POST\",route=\"/v1/models\"";
  auto requests = [&](const std::string& labels, const std::string& status) {
    return SampleValue(text,
                       "mdpserve_http_requests_total{" + labels + ",status=\"" + status + "\"}");
  };
  EXPECT_EQ(requests(policy_labels, "200"), "2");
  EXPECT_EQ(requests(policy_labels, "404"), "1");
  EXPECT_EQ(requests(create_labels, "201"), "1");
  EXPECT_EQ(requests(create_labels, "other"), "1");
  EXPECT_EQ(requests(policy_labels, "500"), std::nullopt);  // Zero counts are not rendered.
  EXPECT_EQ(requests(create_labels, "200"), std::nullopt);

  const std::string duration = "mdpserve_http_request_duration_seconds";
  EXPECT_EQ(SampleValue(text, duration + "_count{" + policy_labels + "}"), "3");
  EXPECT_EQ(SampleValue(text, duration + "_bucket{" + policy_labels + ",le=\"0.0001\"}"), "1");
  EXPECT_EQ(SampleValue(text, duration + "_bucket{" + policy_labels + ",le=\"0.001\"}"), "2");
  EXPECT_EQ(SampleValue(text, duration + "_bucket{" + policy_labels + ",le=\"0.0025\"}"), "3");
  EXPECT_EQ(SampleValue(text, duration + "_count{" + create_labels + "}"), "2");
  // Declared routes have latency series from the start, requests or not.
  EXPECT_EQ(SampleValue(text, duration + "_count{method=\"GET\",route=\"/v1/models\"}"), "0");
  EXPECT_TRUE(ExpositionProblems(text).empty());
}

TEST(HttpMetricsTest, UndeclaredRoutesShareTheUnmatchedSeries) {
  MetricsRegistry registry;
  HttpMetrics http(&registry, DeclaredRoutes());
  HttpMetrics::RequestHandle* unmatched = http.For("/nope", "GET");
  EXPECT_EQ(http.For("/v1/models", "DELETE"), unmatched);
  EXPECT_EQ(http.For(HttpMetrics::kUnmatchedRoute, HttpMetrics::kUnmatchedMethod), unmatched);
  HttpMetrics::Record(unmatched, 404, 0.0002);
  HttpMetrics::Record(http.For("/other", "BREW"), 404, 0.0002);
  EXPECT_EQ(SampleValue(registry.RenderText(),
                        "mdpserve_http_requests_total{method=\"other\",route=\"unmatched\","
                        "status=\"404\"}"),
            "2");
}

TEST(HttpMetricsTest, RenderingSurvivesTheHttpMetricsObject) {
  MetricsRegistry registry;
  {
    HttpMetrics http(&registry, DeclaredRoutes());
    HttpMetrics::Record(http.For("/v1/models", "GET"), 200, 0.01);
  }
  EXPECT_EQ(SampleValue(registry.RenderText(),
                        "mdpserve_http_requests_total{method=\"GET\",route=\"/v1/models\","
                        "status=\"200\"}"),
            "1");
}

TEST(HttpMetricsTest, ConcurrentRecordsGiveExactTotals) {
  constexpr int kThreads = 4;
  constexpr int kRecordsPerThread = 100000;
  MetricsRegistry registry;
  HttpMetrics http(&registry, DeclaredRoutes());
  HttpMetrics::RequestHandle* handle = http.For("/v1/models", "POST");
  std::atomic<bool> done = false;
  // Renders while the writers run: every snapshot must still be well formed.
  std::thread renderer([&] {
    while (!done.load()) EXPECT_TRUE(ExpositionProblems(registry.RenderText()).empty());
  });
  std::vector<std::thread> writers;
  writers.reserve(kThreads);
  for (int t = 0; t < kThreads; ++t) {
    writers.emplace_back([handle] {
      // Binary fractions, so the sum is exact whatever the order of additions.
      for (int i = 0; i < kRecordsPerThread; ++i) {
        HttpMetrics::Record(handle, i % 2 == 0 ? 201 : 503, i % 2 == 0 ? 0.5 : 0.25);
      }
    });
  }
  for (std::thread& w : writers) w.join();
  done = true;
  renderer.join();

  const std::string text = registry.RenderText();
  const std::string labels = "method=\"POST\",route=\"/v1/models\"";
  EXPECT_EQ(SampleValue(text, "mdpserve_http_requests_total{" + labels + ",status=\"201\"}"),
            "200000");
  EXPECT_EQ(SampleValue(text, "mdpserve_http_requests_total{" + labels + ",status=\"503\"}"),
            "200000");
  const std::string duration = "mdpserve_http_request_duration_seconds";
  EXPECT_EQ(SampleValue(text, duration + "_count{" + labels + "}"), "400000");
  EXPECT_EQ(SampleValue(text, duration + "_sum{" + labels + "}"), "150000");
  EXPECT_EQ(SampleValue(text, duration + "_bucket{" + labels + ",le=\"0.25\"}"), "200000");
  EXPECT_EQ(SampleValue(text, duration + "_bucket{" + labels + ",le=\"0.1\"}"), "0");
}

TEST(HttpMetricsTest, FullRenderFollowsTheGrammar) {
  MetricsRegistry registry;
  HttpMetrics http(&registry, DeclaredRoutes());
  registry.GetCounter("mdpserve_jobs_total", "Jobs.", {{"outcome", "time_limit"}})->Add(2);
  registry.GetGauge("mdpserve_cache_bytes", "Cache size, bytes.")->Set(1 << 20);
  registry.RegisterGaugeCallback("mdpserve_queue_depth", "Jobs waiting.", [] { return 4; });
  HttpMetrics::Record(http.For("/v1/models/{id}/policy", "GET"), 200, 0.003);
  HttpMetrics::Record(http.For("/v1/models", "POST"), 413, 12.0);
  const std::string text = registry.RenderText();
  EXPECT_EQ(ExpositionProblems(text), std::vector<std::string>{});
  EXPECT_EQ(SampleValue(text, "mdpserve_cache_bytes"), "1048576");
}

}  // namespace
}  // namespace mdp::server
