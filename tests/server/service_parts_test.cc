// Tests the service's building blocks: server/canonical (canonical text and ids),
// server/solution_blob (stored solutions), server/result_cache (LRU under a byte budget),
// server/job_queue (bounded queue, workers) and server/problem (status -> RFC 9457).
#include <gtest/gtest.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <limits>
#include <mutex>
#include <thread>
#include <vector>

#include "server/canonical.h"
#include "server/job_queue.h"
#include "server/log_budget.h"
#include "server/model_codec.h"
#include "server/problem.h"
#include "server/result_cache.h"
#include "server/single_flight.h"
#include "server/solution_blob.h"
#include "server/thread_setup.h"
#include "solver/solver.h"
#include "tests/testing/test_models.h"

namespace mdp::server {
namespace {

constexpr std::string_view kDoc = R"({"format": "mdpserve/model@1", "name": "Shelf",
  "objective": "maximize", "criterion": {"kind": "discounted", "discount": 0.5},
  "actions": ["restock", "wait"],
  "states": [{"name": "empty", "actions": [
      {"action": "restock", "reward": -1, "outcomes": [{"next": "full", "probability": 1}]},
      {"action": "wait", "outcomes": [{"next": "empty", "probability": 1}]}]},
    {"name": "full", "actions": [{"action": "wait", "outcomes": [
      {"next": "empty", "probability": 0.50, "reward": 4}, {"next": "full", "probability": 0.5,
       "reward": 4}]}]}]})";

// The same model said differently: key order, whitespace, "0.5" for "0.50", explicit
// defaults (terminal false, reward 0).
constexpr std::string_view kSameDoc = R"({"states": [{"actions": [
      {"outcomes": [{"probability": 1, "next": "full"}], "reward": -1, "action": "restock"},
      {"action": "wait", "reward": 0, "outcomes": [{"next": "empty", "probability": 1.0,
       "reward": 0}]}], "terminal": false, "name": "empty"},
    {"name": "full", "actions": [{"action": "wait", "outcomes": [
      {"next": "empty", "probability": 0.5, "reward": 4}, {"next": "full", "probability": 0.5,
       "reward": 4}]}]}], "actions": ["restock", "wait"],
  "criterion": {"discount": 0.5, "kind": "discounted"}, "objective": "maximize",
  "name": "Shelf", "format": "mdpserve/model@1"})";

std::string CanonicalOf(std::string_view doc) {
  ModelDecodeResult decoded = DecodeModel(doc);
  EXPECT_TRUE(decoded.ok());
  return EncodeCanonicalModel(decoded.spec);
}

TEST(CanonicalTest, SameModelSameTextAndId) {
  const std::string a = CanonicalOf(kDoc);
  const std::string b = CanonicalOf(kSameDoc);
  EXPECT_EQ(a, b);
  EXPECT_EQ(ModelId(a), ModelId(b));
  EXPECT_EQ(ModelId(a).size(), 32u);
  // A changed probability is a different model.
  std::string changed(kDoc);
  changed.replace(changed.find("0.50"), 4, "0.25");
  changed.replace(changed.find("\"probability\": 0.5,"), 19, "\"probability\": 0.75,");
  EXPECT_NE(ModelId(CanonicalOf(changed)), ModelId(a));
}

TEST(CanonicalTest, CanonicalTextDecodesToTheSameModel) {
  const std::string text = CanonicalOf(kDoc);
  ModelDecodeResult again = DecodeModel(text);
  ASSERT_TRUE(again.ok());
  EXPECT_EQ(EncodeCanonicalModel(again.spec), text);
}

TEST(CanonicalTest, Sha256OfKnownInput) {
  // FIPS 180-2, appendix B.1: SHA-256("abc").
  EXPECT_EQ(Sha256Hex("abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad");
}

TEST(CanonicalTest, JsonStringEscapes) {
  std::string out;
  AppendJsonString(out, std::string("a\"b\\c\n\x01", 7));
  EXPECT_EQ(out, "\"a\\\"b\\\\c\\n\\u0001\"");
  out.clear();
  AppendJsonNumber(out, 0.1);
  EXPECT_EQ(out, "0.1");
  out.clear();
  AppendJsonNumber(out, -0.0);
  EXPECT_EQ(out, "0");
}

TEST(SolutionBlobTest, RoundTripsEveryField) {
  const Model m = testing::MustBuild(testing::RandomSpec(3, {}));
  SolveOptions options;
  options.method = Method::kModifiedPolicyIteration;
  options.evaluation_sweeps = 7;
  options.tie_tolerance = 1e-7;
  Result<Solution> s = Solve(m, options);
  ASSERT_TRUE(s.ok());
  const std::string blob = EncodeSolutionBlob(*s);
  Result<Solution> back = DecodeSolutionBlob(blob, m.num_states(), m.num_rows());
  ASSERT_TRUE(back.ok()) << back.status().ToString();
  EXPECT_EQ(back->method, s->method);
  EXPECT_EQ(back->outcome, s->outcome);
  EXPECT_EQ(back->iterations, s->iterations);
  EXPECT_EQ(back->value_error_bound, s->value_error_bound);
  EXPECT_EQ(back->options.evaluation_sweeps, 7);
  EXPECT_EQ(back->options.tie_tolerance, 1e-7);
  EXPECT_EQ(back->values, s->values);
  EXPECT_EQ(back->q, s->q);
  EXPECT_EQ(back->best_row, s->best_row);
  EXPECT_EQ(back->optimal_row, s->optimal_row);
  ASSERT_EQ(back->action_gap.size(), s->action_gap.size());
  for (size_t i = 0; i < s->action_gap.size(); ++i) {
    EXPECT_TRUE(back->action_gap[i] == s->action_gap[i] ||
                (std::isnan(back->action_gap[i]) && std::isnan(s->action_gap[i])));
  }
}

TEST(SolutionBlobTest, RefusesTruncatedForeignOrMismatchedBlobs) {
  const Model m = testing::MustBuild(testing::RandomSpec(4, {}));
  Result<Solution> s = Solve(m, SolveOptions{});
  ASSERT_TRUE(s.ok());
  const std::string blob = EncodeSolutionBlob(*s);
  EXPECT_FALSE(DecodeSolutionBlob(blob.substr(0, blob.size() - 1), m.num_states(), m.num_rows()).ok());
  EXPECT_FALSE(DecodeSolutionBlob(blob + "x", m.num_states(), m.num_rows()).ok());
  EXPECT_FALSE(DecodeSolutionBlob(blob, m.num_states() + 1, m.num_rows()).ok());
  std::string foreign = blob;
  foreign[0] = 'X';
  EXPECT_FALSE(DecodeSolutionBlob(foreign, m.num_states(), m.num_rows()).ok());
  EXPECT_FALSE(DecodeSolutionBlob("", m.num_states(), m.num_rows()).ok());
}

// The decoder caps the stage values at (horizon + 1) * states; with a horizon this large the
// product passed int64 (signed overflow, found by tests/fuzz/stored_records_fuzz under UBSan)
// and, where it wrapped negative, a blob our own encoder wrote was refused.
TEST(SolutionBlobTest, ReadsBackAnyHorizonItsEncoderWrites) {
  const Model m = testing::MustBuild(testing::RandomSpec(4, {}));
  Result<Solution> s = Solve(m, SolveOptions{});
  ASSERT_TRUE(s.ok());
  for (int64_t horizon : {int64_t{3} << 60, std::numeric_limits<int64_t>::max() - 1,
                          std::numeric_limits<int64_t>::max()}) {
    Solution with = *s;
    with.horizon = horizon;
    Result<Solution> back = DecodeSolutionBlob(EncodeSolutionBlob(with), m.num_states(),
                                               m.num_rows());
    ASSERT_TRUE(back.ok()) << horizon << ": " << back.status().ToString();
    EXPECT_EQ(back->horizon, horizon);
    EXPECT_EQ(back->values, s->values);
  }
}

std::shared_ptr<const Solution> SolutionOfSize(size_t states) {
  auto s = std::make_shared<Solution>();
  s->values.assign(states, 1.0);
  return s;
}

TEST(ResultCacheTest, EvictsLeastRecentlyUsedWithinBudget) {
  const int64_t one = SolutionByteSize(*SolutionOfSize(1000));
  ResultCache cache(3 * one);
  cache.PutSolution("a", SolutionOfSize(1000));
  cache.PutSolution("b", SolutionOfSize(1000));
  cache.PutSolution("c", SolutionOfSize(1000));
  EXPECT_EQ(cache.entries(), 3);
  EXPECT_NE(cache.GetSolution("a"), nullptr);  // "a" is now the most recent.
  cache.PutSolution("d", SolutionOfSize(1000));  // Evicts "b", the least recent.
  EXPECT_EQ(cache.GetSolution("b"), nullptr);
  EXPECT_NE(cache.GetSolution("a"), nullptr);
  EXPECT_NE(cache.GetSolution("c"), nullptr);
  EXPECT_NE(cache.GetSolution("d"), nullptr);
  EXPECT_LE(cache.bytes(), cache.budget());
  EXPECT_EQ(cache.evictions(), 1);
  EXPECT_EQ(cache.misses(), 1);
  EXPECT_EQ(cache.hits(), 4);
}

TEST(ResultCacheTest, OversizedEntriesAreNotKeptAndEvictedEntriesStayUsable) {
  const int64_t one = SolutionByteSize(*SolutionOfSize(1000));
  ResultCache cache(one);
  std::shared_ptr<const Solution> held = SolutionOfSize(1000);
  cache.PutSolution("a", held);
  std::shared_ptr<const Solution> reader = cache.GetSolution("a");
  cache.PutSolution("big", SolutionOfSize(100000));
  EXPECT_EQ(cache.GetSolution("big"), nullptr);
  cache.PutSolution("b", SolutionOfSize(1000));  // Evicts "a" while `reader` holds it.
  EXPECT_EQ(cache.GetSolution("a"), nullptr);
  ASSERT_NE(reader, nullptr);
  EXPECT_EQ(reader->values.size(), 1000u);
  cache.Erase("b");
  EXPECT_EQ(cache.entries(), 0);
  EXPECT_EQ(cache.bytes(), 0);
}

TEST(JobQueueTest, RunsEverythingSubmittedOnWorkerThreads) {
  JobQueue queue(2, 100);
  std::atomic<int> done{0};
  const auto caller = std::this_thread::get_id();
  std::atomic<bool> ran_on_caller{false};
  for (int i = 0; i < 50; ++i) {
    ASSERT_TRUE(queue.Submit([&] {
      if (std::this_thread::get_id() == caller) ran_on_caller = true;
      ++done;
    }).ok());
  }
  for (int i = 0; i < 500 && done < 50; ++i) std::this_thread::sleep_for(std::chrono::milliseconds(10));
  EXPECT_EQ(done.load(), 50);
  EXPECT_FALSE(ran_on_caller.load());
}

TEST(JobQueueTest, FullQueueRefusesAndShutdownDropsTheWaiting) {
  JobQueue queue(1, 2);
  std::atomic<bool> release{false};
  std::atomic<int> started{0};
  auto blocker = [&] {
    ++started;
    while (!release) std::this_thread::sleep_for(std::chrono::milliseconds(1));
  };
  ASSERT_TRUE(queue.Submit(blocker).ok());
  while (started == 0) std::this_thread::sleep_for(std::chrono::milliseconds(1));
  EXPECT_TRUE(queue.Submit(blocker).ok());
  EXPECT_TRUE(queue.Submit(blocker).ok());
  const Status full = queue.Submit(blocker);
  EXPECT_EQ(full.code(), StatusCode::kResourceExhausted);
  EXPECT_EQ(queue.queued(), 2);
  EXPECT_EQ(queue.running(), 1);
  release = true;
  const int64_t dropped = queue.Shutdown();
  EXPECT_LE(dropped, 2);
  EXPECT_EQ(queue.Submit(blocker).code(), StatusCode::kUnavailable);
}

TEST(JobQueueTest, WorkersAndTheThreadsTheyStartRunAtTheRaisedNiceValue) {
  const int base = ThisThreadNiceness();
  const int expected = std::min(19, base + 3);
  JobQueue queue(1, 10, 3);
  std::mutex mu;
  std::vector<int> seen;  // The worker's nice value, then its OpenMP team's.
  std::atomic<bool> done{false};
  auto record = [&] {
    {
      std::lock_guard<std::mutex> lock(mu);
      seen.push_back(ThisThreadNiceness());
    }
#pragma omp parallel num_threads(3)
    {
      std::lock_guard<std::mutex> lock(mu);
      seen.push_back(ThisThreadNiceness());
    }
    done = true;
  };
  ASSERT_TRUE(queue.Submit(record).ok());
  for (int i = 0; i < 500 && !done; ++i) std::this_thread::sleep_for(std::chrono::milliseconds(10));
  ASSERT_TRUE(done.load());
  ASSERT_EQ(seen.size(), 4u);
  for (int nice : seen) EXPECT_EQ(nice, expected);
  EXPECT_EQ(ThisThreadNiceness(), base);  // The caller's own priority is untouched.
  // A queue without an increment leaves its workers at the caller's value.
  JobQueue plain(1, 10);
  std::atomic<int> plain_nice{-100};
  ASSERT_TRUE(plain.Submit([&] { plain_nice = ThisThreadNiceness(); }).ok());
  for (int i = 0; i < 500 && plain_nice == -100; ++i) {
    std::this_thread::sleep_for(std::chrono::milliseconds(10));
  }
  EXPECT_EQ(plain_nice.load(), base);
}

TEST(SingleFlightTest, ConcurrentCallsForOneKeyShareOneLoad) {
  SingleFlight<int> flight;
  std::atomic<int> loads{0};
  auto slow = [&]() -> Result<int> {
    ++loads;
    std::this_thread::sleep_for(std::chrono::milliseconds(200));
    return 42;
  };
  std::vector<std::thread> callers;
  std::vector<int> got(8, 0);
  for (int i = 0; i < 8; ++i) {
    callers.emplace_back([&, i] {
      Result<int> r = flight.Do("model", slow);
      got[i] = r.ok() ? *r : -1;
    });
  }
  for (std::thread& t : callers) t.join();
  // All 8 start within the 200 ms the first load takes; the others wait for it.
  EXPECT_EQ(loads.load(), 1);
  for (int v : got) EXPECT_EQ(v, 42);
  // Results are not kept: the next call loads again.
  EXPECT_EQ(*flight.Do("model", slow), 42);
  EXPECT_EQ(loads.load(), 2);
}

TEST(SingleFlightTest, DifferentKeysLoadAtOnceAndErrorsAreSharedNotKept) {
  SingleFlight<int> flight;
  std::atomic<int> inside{0};
  std::atomic<int> most_inside{0};
  auto load = [&]() -> Result<int> {
    const int now = ++inside;
    int seen = most_inside.load();
    while (now > seen && !most_inside.compare_exchange_weak(seen, now)) {
    }
    std::this_thread::sleep_for(std::chrono::milliseconds(100));
    --inside;
    return NotFoundError("no such model");
  };
  std::vector<Status> statuses(4, Status::Ok());
  std::vector<std::thread> callers;
  for (int i = 0; i < 4; ++i) {
    callers.emplace_back([&, i] { statuses[i] = flight.Do(i < 2 ? "a" : "b", load).status(); });
  }
  for (std::thread& t : callers) t.join();
  EXPECT_EQ(most_inside.load(), 2);  // "a" and "b" at the same time, never two of one key.
  for (const Status& st : statuses) EXPECT_EQ(st.code(), StatusCode::kNotFound);
}

TEST(ThreadSetupTest, NicenessIsCappedAt19AndIncrementsAreChecked) {
  std::vector<int> after;
  Status first = Status::Ok();
  Status second = Status::Ok();
  Status bad = Status::Ok();
  std::thread t([&] {
    first = RaiseThisThreadNiceness(15);
    after.push_back(ThisThreadNiceness());
    second = RaiseThisThreadNiceness(15);
    after.push_back(ThisThreadNiceness());
    bad = RaiseThisThreadNiceness(20);
    after.push_back(ThisThreadNiceness());
  });
  t.join();
  EXPECT_TRUE(first.ok()) << first.message();
  EXPECT_TRUE(second.ok()) << second.message();
  EXPECT_EQ(bad.code(), StatusCode::kInvalidArgument);
  ASSERT_EQ(after.size(), 3u);
  EXPECT_EQ(after[0], std::min(19, ThisThreadNiceness() + 15));
  EXPECT_EQ(after[1], 19);
  EXPECT_EQ(after[2], 19);
  EXPECT_TRUE(CheckThreadNiceness(5).ok());
  EXPECT_EQ(CheckThreadNiceness(-1).code(), StatusCode::kInvalidArgument);
}

// Per-thread time slices (Linux 6.12 and later). Where the kernel reports a slice for this
// thread (earlier kernels report 0 for the fair policies), setting one must take effect on
// the calling thread alone and keep its nice value; where it reports none, the request must
// be refused as unavailable rather than pass for done. Out-of-range requests are refused
// either way and change nothing.
TEST(ThreadSetupTest, TimeSlicesArePerThreadAndChecked) {
  const int64_t before = ThisThreadSliceMicroseconds();
  Status set = Status::Ok();
  Status too_short = Status::Ok();
  Status too_long = Status::Ok();
  int64_t after_set = -1;
  int64_t after_bad = -1;
  int nice_before = -100;
  int nice_after = -100;
  std::thread t([&] {
    (void)RaiseThisThreadNiceness(3);
    nice_before = ThisThreadNiceness();
    set = SetThisThreadSlice(250);
    after_set = ThisThreadSliceMicroseconds();
    nice_after = ThisThreadNiceness();
    too_short = SetThisThreadSlice(kMinSliceMicroseconds - 1);
    too_long = SetThisThreadSlice(kMaxSliceMicroseconds + 1);
    after_bad = ThisThreadSliceMicroseconds();
  });
  t.join();
  EXPECT_EQ(too_short.code(), StatusCode::kInvalidArgument);
  EXPECT_EQ(too_long.code(), StatusCode::kInvalidArgument);
  EXPECT_EQ(CheckThreadSlice(50).code(), StatusCode::kInvalidArgument);
  EXPECT_EQ(ThisThreadSliceMicroseconds(), before);  // Only the thread that asked changed.
  if (before > 0) {
    EXPECT_TRUE(set.ok()) << set.message();
    EXPECT_EQ(after_set, 250);
    EXPECT_EQ(after_bad, 250);
    EXPECT_EQ(nice_after, nice_before);
    EXPECT_NE(before, 250);  // Else the check above could not tell a change from none.
    EXPECT_TRUE(CheckThreadSlice(kMinSliceMicroseconds).ok());
  } else {
    EXPECT_EQ(set.code(), StatusCode::kUnavailable) << set.message();
    EXPECT_EQ(CheckThreadSlice(kMinSliceMicroseconds).code(), StatusCode::kUnavailable);
  }
}

TEST(LogBudgetTest, AllowsABurstThenARateAndCountsWhatItLeftOut) {
  using std::chrono::milliseconds;
  LogBudget budget(/*per_second=*/10.0, /*burst=*/3.0);
  const LogBudget::Clock::time_point t0 = LogBudget::Clock::time_point{} + std::chrono::hours(1);
  int64_t left_out = -1;
  for (int i = 0; i < 3; ++i) {
    EXPECT_TRUE(budget.Take(t0, &left_out)) << i;
    EXPECT_EQ(left_out, 0);
  }
  for (int i = 0; i < 5; ++i) EXPECT_FALSE(budget.Take(t0, &left_out)) << i;
  EXPECT_FALSE(budget.Take(t0 + milliseconds(50), &left_out));  // Half a line's worth.
  EXPECT_TRUE(budget.Take(t0 + milliseconds(150), &left_out));  // One and a half.
  EXPECT_EQ(left_out, 6);
  EXPECT_FALSE(budget.Take(t0 + milliseconds(150), &left_out));
  // An earlier time than one already seen (another thread's clock reading) adds nothing.
  EXPECT_FALSE(budget.Take(t0, &left_out));
  // A long quiet spell refills up to the burst, no further.
  for (int i = 0; i < 3; ++i) {
    EXPECT_TRUE(budget.Take(t0 + std::chrono::hours(1), &left_out)) << i;
    EXPECT_EQ(left_out, i == 0 ? 2 : 0);
  }
  EXPECT_FALSE(budget.Take(t0 + std::chrono::hours(1), &left_out));
}

TEST(ProblemTest, MapsStatusesToHttpAndRfc9457Bodies) {
  struct Case {
    Status status;
    ProblemKind kind;
    int http;
    const char* type;
  };
  const Case cases[] = {
      {InvalidArgumentError("x"), ProblemKind::kFromStatus, 400, "invalid-request"},
      {NotFoundError("x"), ProblemKind::kFromStatus, 404, "not-found"},
      {FailedPreconditionError("x"), ProblemKind::kFromStatus, 409, "conflict"},
      {ResourceExhaustedError("x"), ProblemKind::kFromStatus, 429, "too-many-requests"},
      {Status(StatusCode::kUnavailable, "x"), ProblemKind::kFromStatus, 503, "unavailable"},
      {InternalError("x"), ProblemKind::kFromStatus, 500, "internal"},
      {InvalidArgumentError("x"), ProblemKind::kInvalidModel, 422, "invalid-model"},
      {InvalidArgumentError("x"), ProblemKind::kUnsupportedMediaType, 415,
       "unsupported-media-type"},
      {InvalidArgumentError("x"), ProblemKind::kPayloadTooLarge, 413, "payload-too-large"},
      {InvalidArgumentError("x"), ProblemKind::kUnauthorized, 401, "unauthorized"},
  };
  for (const Case& c : cases) {
    const Problem p = MakeProblem(c.status, c.kind, {{"/states/0", "bad"}}, 3);
    EXPECT_EQ(p.status, c.http) << c.type;
    const Json body = Json::parse(p.body);
    EXPECT_EQ(body["type"], std::string("urn:mdpserve:problem:") + c.type);
    EXPECT_EQ(body["status"], c.http);
    EXPECT_EQ(body["detail"], "x");
    EXPECT_EQ(body["errors"][0]["pointer"], "/states/0");
    EXPECT_EQ(body["truncated"], 3);
    EXPECT_EQ(p.retry_after > 0, c.http == 429 || c.http == 503) << c.type;
  }
}

}  // namespace
}  // namespace mdp::server
