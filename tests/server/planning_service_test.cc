// Tests server/planning_service.{h,cc} without HTTP, on a memory store: uploads, solve jobs,
// caching of solutions, the full queue, cancellation, recovery after a restart, cache
// eviction with reload from the store, deletion and verification.
#include "server/planning_service.h"

#include <gtest/gtest.h>

#include <atomic>
#include <chrono>
#include <mutex>
#include <optional>
#include <thread>
#include <vector>

#include "server/api_codec.h"
#include "server/canonical.h"
#include "server/model_codec.h"
#include "server/model_store_codec.h"
#include "tests/testing/documents.h"

namespace mdp::server {
namespace {

using test_documents::kGreenhouse;

// A random model document big enough that value iteration at discount 0.9999 runs for a
// while (seconds), to have a job in the running state.
std::string SlowModel(int states, uint64_t seed) {
  std::string doc = R"({"format":"mdpserve/model@1","name":"slow","objective":"maximize",)"
                    R"("criterion":{"kind":"discounted","discount":0.9999},"actions":["a","b"],)"
                    R"("states":[)";
  uint64_t x = seed;
  auto next = [&] {
    x = x * 6364136223846793005ULL + 1442695040888963407ULL;
    return static_cast<int>((x >> 33) % states);
  };
  for (int s = 0; s < states; ++s) {
    doc += std::string(s ? "," : "") + R"({"name":"s)" + std::to_string(s) + R"(","actions":[)";
    for (int a = 0; a < 2; ++a) {
      doc += std::string(a ? "," : "") + R"({"action":")" + (a ? "b" : "a") +
             R"(","outcomes":[{"next":"s)" + std::to_string(next()) +
             R"(","probability":0.5,"reward":1},{"next":"s)" + std::to_string(next()) +
             R"(","probability":0.5,"reward":)" + std::to_string(a) + "}]}";
    }
    doc += "]}";
  }
  return doc + "]}";
}

// Value iteration to `tolerance`: on SlowModel, a solve that runs until cancelled.
SolveOptions SlowValueIteration(double tolerance) {
  SolveOptions o;
  o.method = Method::kValueIteration;
  o.tolerance = tolerance;
  return o;
}

JobView WaitForEnd(PlanningService& service, const std::string& job_id, double seconds = 30) {
  const auto end = std::chrono::steady_clock::now() + std::chrono::duration<double>(seconds);
  for (;;) {
    Result<JobView> job = service.GetJob(job_id);
    EXPECT_TRUE(job.ok());
    const JobStatus s = job->record.status;
    if (s == JobStatus::kSucceeded || s == JobStatus::kFailed || s == JobStatus::kCancelled ||
        std::chrono::steady_clock::now() > end) {
      return *job;
    }
    std::this_thread::sleep_for(std::chrono::milliseconds(5));
  }
}

void WaitForStatus(PlanningService& service, const std::string& job_id, JobStatus status) {
  for (int i = 0; i < 2000; ++i) {
    if (service.GetJob(job_id)->record.status == status) return;
    std::this_thread::sleep_for(std::chrono::milliseconds(5));
  }
  FAIL() << "job " << job_id << " never reached " << JobStatusName(status);
}

class PlanningServiceTest : public ::testing::Test {
 protected:
  std::unique_ptr<Store> store_ = NewMemoryStore();
};

TEST_F(PlanningServiceTest, UploadSolveQueryAndCachedSolve) {
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  Result<UploadResult> up = service.UploadModel(kGreenhouse);
  ASSERT_TRUE(up.ok());
  ASSERT_TRUE(up->errors.empty());
  EXPECT_TRUE(up->created);
  EXPECT_EQ(up->record.states, 4);
  Result<UploadResult> again = service.UploadModel(kGreenhouse);
  EXPECT_FALSE(again->created);
  EXPECT_EQ(again->record.id, up->record.id);

  const std::string id = up->record.id;
  EXPECT_EQ(service.GetPlan(id, "").status().code(), StatusCode::kFailedPrecondition);
  Result<SolveStart> start = service.StartSolve(id, SolveOptions{});
  ASSERT_TRUE(start.ok());
  ASSERT_TRUE(start->job.has_value());
  const JobView done = WaitForEnd(service, start->job->record.id);
  ASSERT_EQ(done.record.status, JobStatus::kSucceeded) << done.record.error;
  Result<Plan> plan = service.GetPlan(id, "");
  ASSERT_TRUE(plan.ok());
  EXPECT_EQ(plan->solution_id, done.record.solution_id);
  // By hand (tests/testing/documents.h): V(dry) = 4, V(wet) = 10, V(seedling) = 4.
  EXPECT_NEAR(plan->solution->values[*plan->model->FindState("dry")], 4.0, 1e-9);
  EXPECT_NEAR(plan->solution->values[*plan->model->FindState("wet")], 10.0, 1e-9);

  Result<SolveStart> cached = service.StartSolve(id, SolveOptions{});
  ASSERT_TRUE(cached.ok());
  EXPECT_FALSE(cached->job.has_value());
  EXPECT_EQ(cached->cached_solution_id, done.record.solution_id);
  // Different options, different solution.
  SolveOptions vi;
  vi.method = Method::kValueIteration;
  Result<SolveStart> other = service.StartSolve(id, vi);
  ASSERT_TRUE(other->job.has_value());
  EXPECT_EQ(WaitForEnd(service, other->job->record.id).record.status, JobStatus::kSucceeded);
  EXPECT_EQ(service.ListSolutions(id)->size(), 2u);
}

TEST_F(PlanningServiceTest, InvalidModelsReportEveryErrorAndStoreNothing) {
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  std::string bad(kGreenhouse);
  bad.replace(bad.find("\"discount\": 0.5"), 15, "\"discount\": 1.5");
  bad.replace(bad.find("\"reward\": -1"), 12, "\"reward\": \"x\"");
  Result<UploadResult> up = service.UploadModel(bad);
  ASSERT_TRUE(up.ok());
  EXPECT_EQ(up->errors.size(), 2u);
  EXPECT_TRUE(service.ListModels()->empty());
}

TEST_F(PlanningServiceTest, AnUploadThatTakesItsTextOverStoresTheSameModel) {
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  Result<UploadResult> owned = service.UploadModelOwned(std::string(kGreenhouse));
  ASSERT_TRUE(owned.ok());
  ASSERT_TRUE(owned->errors.empty());
  EXPECT_TRUE(owned->created);
  Result<UploadResult> viewed = service.UploadModel(kGreenhouse);
  ASSERT_TRUE(viewed.ok());
  EXPECT_FALSE(viewed->created);
  EXPECT_EQ(viewed->record.id, owned->record.id);
  EXPECT_EQ(service.GetModel(owned->record.id, true)->document,
            service.GetModel(viewed->record.id, true)->document);

  std::string bad(kGreenhouse);
  bad.replace(bad.find("\"discount\": 0.5"), 15, "\"discount\": 1.5");
  Result<UploadResult> refused = service.UploadModelOwned(std::string(bad));
  ASSERT_TRUE(refused.ok());
  ASSERT_EQ(refused->errors.size(), 1u);
  EXPECT_EQ(refused->errors[0].pointer, service.UploadModel(bad)->errors[0].pointer);
  EXPECT_EQ(service.ListModels()->size(), 1u);
}

TEST_F(PlanningServiceTest, FullQueueRefusesAndCancelStopsARunningSolve) {
  ServiceOptions options;
  options.workers = 1;
  options.queue_capacity = 1;
  PlanningService service(*store_, options);
  ASSERT_TRUE(service.Start().ok());
  Result<UploadResult> up = service.UploadModel(SlowModel(20000, 1));
  ASSERT_TRUE(up.ok() && up->errors.empty());
  SolveOptions slow = SlowValueIteration(1e-12);
  Result<SolveStart> first = service.StartSolve(up->record.id, slow);
  ASSERT_TRUE(first.ok());
  WaitForStatus(service, first->job->record.id, JobStatus::kRunning);
  slow.tolerance = 1e-11;
  Result<SolveStart> second = service.StartSolve(up->record.id, slow);
  ASSERT_TRUE(second.ok());  // Waits in the queue.
  slow.tolerance = 1e-10;
  Result<SolveStart> third = service.StartSolve(up->record.id, slow);
  EXPECT_EQ(third.status().code(), StatusCode::kResourceExhausted);
  // The same request as the running one joins it instead of queueing again.
  slow.tolerance = 1e-12;
  Result<SolveStart> same = service.StartSolve(up->record.id, slow);
  ASSERT_TRUE(same.ok());
  EXPECT_EQ(same->job->record.id, first->job->record.id);

  ASSERT_TRUE(service.CancelJob(second->job->record.id).ok());
  EXPECT_EQ(service.GetJob(second->job->record.id)->record.status, JobStatus::kCancelled);
  ASSERT_TRUE(service.CancelJob(first->job->record.id).ok());
  const JobView ended = WaitForEnd(service, first->job->record.id);
  EXPECT_EQ(ended.record.status, JobStatus::kCancelled);
  EXPECT_EQ(service.CancelJob(first->job->record.id).status().code(),
            StatusCode::kFailedPrecondition);
  EXPECT_EQ(service.GetPlan(up->record.id, "").status().code(), StatusCode::kFailedPrecondition);
}

// The gauges and the finished-job callback agree with the job views at every moment: a job
// whose view says it ended is counted as finished and no longer as queued or running, even
// while its worker is still storing it (the slow on_job_event widens that window).
TEST_F(PlanningServiceTest, MetricsAgreeWithJobViewsWhenJobsEnd) {
  ServiceOptions options;
  options.workers = 1;
  options.queue_capacity = 1;
  std::mutex mu;
  std::vector<std::pair<std::string, JobStatus>> finished;
  options.on_job_finished = [&](const JobRecord& job, double) {
    std::lock_guard<std::mutex> lock(mu);
    finished.emplace_back(job.id, job.status);
  };
  options.on_job_event = [](const JobRecord& job) {
    if (job.status == JobStatus::kCancelled) {
      std::this_thread::sleep_for(std::chrono::milliseconds(200));
    }
  };
  auto finished_now = [&] {
    std::lock_guard<std::mutex> lock(mu);
    return finished;
  };
  PlanningService service(*store_, options);
  ASSERT_TRUE(service.Start().ok());
  const std::string model = service.UploadModel(SlowModel(20000, 3))->record.id;
  const std::string first = service.StartSolve(model, SlowValueIteration(1e-12))->job->record.id;
  WaitForStatus(service, first, JobStatus::kRunning);
  const std::string second =
      service.StartSolve(model, SlowValueIteration(1e-11))->job->record.id;
  EXPECT_EQ(service.queued_jobs(), 1);
  EXPECT_EQ(service.running_jobs(), 1);

  // Cancelled while queued: it ends at once, though it stays in the worker queue.
  ASSERT_TRUE(service.CancelJob(second).ok());
  EXPECT_EQ(service.GetJob(second)->record.status, JobStatus::kCancelled);
  EXPECT_EQ(service.queued_jobs(), 0);
  EXPECT_EQ(finished_now(), (std::vector<std::pair<std::string, JobStatus>>{
                                {second, JobStatus::kCancelled}}));

  // Cancelled while running: the first view that says so finds it counted.
  ASSERT_TRUE(service.CancelJob(first).ok());
  const auto end = std::chrono::steady_clock::now() + std::chrono::seconds(30);
  while (service.GetJob(first)->record.status == JobStatus::kRunning &&
         std::chrono::steady_clock::now() < end) {
    std::this_thread::yield();
  }
  ASSERT_EQ(service.GetJob(first)->record.status, JobStatus::kCancelled);
  EXPECT_EQ(service.running_jobs(), 0);
  EXPECT_EQ(finished_now().size(), 2u);
  EXPECT_EQ(finished_now().back(), std::make_pair(first, JobStatus::kCancelled));
}

TEST_F(PlanningServiceTest, RestartFailsInterruptedJobsAndRequeuesWaitingOnes) {
  std::string model_id;
  {
    PlanningService service(*store_, ServiceOptions{});
    ASSERT_TRUE(service.Start().ok());
    model_id = service.UploadModel(kGreenhouse)->record.id;
  }
  JobRecord running{"jdead", "solve", model_id, CanonicalSolveOptions(SolveOptions{}),
                    JobStatus::kRunning, NowRfc3339(), NowRfc3339(), "", "", "", ""};
  SolveOptions vi;
  vi.method = Method::kValueIteration;
  JobRecord waiting{"jwait", "solve", model_id, CanonicalSolveOptions(vi),
                    JobStatus::kQueued, NowRfc3339(), "", "", "", "", ""};
  ASSERT_TRUE(store_->PutJob(running).ok());
  ASSERT_TRUE(store_->PutJob(waiting).ok());
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  const JobView dead = *service.GetJob("jdead");
  EXPECT_EQ(dead.record.status, JobStatus::kFailed);
  EXPECT_NE(dead.record.error.find("stopped while this job was running"), std::string::npos);
  const JobView rerun = WaitForEnd(service, "jwait");
  EXPECT_EQ(rerun.record.status, JobStatus::kSucceeded);
  EXPECT_TRUE(service.GetPlan(model_id, "").ok());
}

TEST_F(PlanningServiceTest, ShutdownDuringASolvePutsItBackInTheQueueForNextStart) {
  std::string model_id, job_id;
  const SolveOptions slow = SlowValueIteration(1e-12);
  {
    PlanningService service(*store_, ServiceOptions{});
    ASSERT_TRUE(service.Start().ok());
    model_id = service.UploadModel(SlowModel(20000, 2))->record.id;
    job_id = service.StartSolve(model_id, slow)->job->record.id;
    WaitForStatus(service, job_id, JobStatus::kRunning);
    service.Shutdown(0.0);
    EXPECT_FALSE(service.accepting());
    EXPECT_EQ(service.StartSolve(model_id, SolveOptions{}).status().code(),
              StatusCode::kUnavailable);
  }
  EXPECT_EQ(store_->GetJob(job_id)->status, JobStatus::kQueued);
}

TEST_F(PlanningServiceTest, EvictedSolutionsAreReloadedFromTheStore) {
  ServiceOptions options;
  options.cache_bytes = 0;  // Nothing stays cached.
  PlanningService service(*store_, options);
  ASSERT_TRUE(service.Start().ok());
  const std::string id = service.UploadModel(kGreenhouse)->record.id;
  const std::string job = service.StartSolve(id, SolveOptions{})->job->record.id;
  ASSERT_EQ(WaitForEnd(service, job).record.status, JobStatus::kSucceeded);
  EXPECT_EQ(service.cache().entries(), 0);
  Result<Plan> plan = service.GetPlan(id, "");
  ASSERT_TRUE(plan.ok());
  EXPECT_NEAR(plan->solution->values[*plan->model->FindState("wet")], 10.0, 1e-9);
  std::string a, b;
  AppendBestAction(a, *plan, 0);
  AppendBestAction(b, *service.GetPlan(id, ""), 0);
  EXPECT_EQ(a, b);
}

// A store that counts the reads that return a model's document or a solution's data.
class CountingStore : public Store {
 public:
  explicit CountingStore(Store& inner) : inner_(inner) {}
  int64_t MaxValueBytes() override { return inner_.MaxValueBytes(); }
  Status PutModel(const ModelRecord& m, bool* created) override {
    return inner_.PutModel(m, created);
  }
  Result<ModelRecord> GetModel(const std::string& id, bool with_document) override {
    if (with_document) ++model_reads;
    std::this_thread::sleep_for(std::chrono::milliseconds(with_document ? 100 : 0));
    return inner_.GetModel(id, with_document);
  }
  Result<std::vector<ModelRecord>> ListModels() override { return inner_.ListModels(); }
  Status DeleteModel(const std::string& id) override { return inner_.DeleteModel(id); }
  Status PutSolution(const SolutionRecord& s) override { return inner_.PutSolution(s); }
  Result<SolutionRecord> GetSolution(const std::string& id, bool with_data) override {
    if (with_data) ++solution_reads;
    std::this_thread::sleep_for(std::chrono::milliseconds(with_data ? 100 : 0));
    return inner_.GetSolution(id, with_data);
  }
  Result<std::vector<SolutionRecord>> ListSolutions(const std::string& model_id) override {
    return inner_.ListSolutions(model_id);
  }
  Status PutJob(const JobRecord& job) override { return inner_.PutJob(job); }
  Result<JobRecord> GetJob(const std::string& id) override { return inner_.GetJob(id); }
  Result<std::vector<JobRecord>> ListJobs(const std::string& model_id,
                                          std::optional<JobStatus> status,
                                          int64_t limit) override {
    return inner_.ListJobs(model_id, status, limit);
  }
  std::atomic<int> model_reads{0};
  std::atomic<int> solution_reads{0};

 private:
  Store& inner_;
};

TEST_F(PlanningServiceTest, ConcurrentQueriesOfAColdModelReadItOnce) {
  std::string id;
  {
    PlanningService first(*store_, ServiceOptions{});
    ASSERT_TRUE(first.Start().ok());
    id = first.UploadModel(kGreenhouse)->record.id;
    const std::string job = first.StartSolve(id, SolveOptions{})->job->record.id;
    ASSERT_EQ(WaitForEnd(first, job).record.status, JobStatus::kSucceeded);
  }
  // A restart: a new service on the same store, nothing cached. Each store read of a
  // document takes 100 ms here, so the 6 queries all arrive while the first read runs.
  CountingStore counting(*store_);
  PlanningService service(counting, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  std::vector<std::thread> queries;
  std::atomic<int> answered{0};
  for (int i = 0; i < 6; ++i) {
    queries.emplace_back([&] {
      Result<Plan> plan = service.GetPlan(id, "");
      if (plan.ok() && static_cast<StateId>(plan->solution->values.size()) ==
                           plan->model->num_states()) {
        ++answered;
      }
    });
  }
  for (std::thread& t : queries) t.join();
  EXPECT_EQ(answered.load(), 6);
  EXPECT_EQ(counting.model_reads.load(), 1);
  EXPECT_EQ(counting.solution_reads.load(), 1);
}

TEST_F(PlanningServiceTest, WarmUpLoadsSolvedModelsThatFitTheCacheBudget) {
  auto renamed = [](const std::string& name) {
    std::string doc(kGreenhouse);
    doc.replace(doc.find("\"Greenhouse\""), 12, "\"" + name + "\"");
    return doc;
  };
  std::vector<std::string> solved;
  {
    PlanningService first(*store_, ServiceOptions{});
    ASSERT_TRUE(first.Start().ok());
    for (const char* name : {"Greenhouse A", "Greenhouse B"}) {
      const std::string id = first.UploadModel(renamed(name))->record.id;
      const std::string job = first.StartSolve(id, SolveOptions{})->job->record.id;
      ASSERT_EQ(WaitForEnd(first, job).record.status, JobStatus::kSucceeded);
      solved.push_back(id);
    }
    ASSERT_TRUE(first.UploadModel(renamed("Greenhouse unsolved")).ok());
  }
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  const PlanningService::WarmUpResult warmed = service.WarmUp();
  EXPECT_EQ(warmed.models, 2);  // The unsolved model is not loaded.
  EXPECT_EQ(warmed.skipped, 0);
  EXPECT_EQ(warmed.failed, 0);
  EXPECT_EQ(service.cache().entries(), 4);  // 2 models and their solutions.
  const int64_t misses = service.cache().misses();
  for (const std::string& id : solved) ASSERT_TRUE(service.GetPlan(id, "").ok());
  EXPECT_EQ(service.cache().misses(), misses);  // The queries found everything cached.

  // A budget below the models' estimated size: nothing is loaded (nothing to evict for).
  ServiceOptions small;
  small.cache_bytes = 100;
  PlanningService tight(*store_, small);
  ASSERT_TRUE(tight.Start().ok());
  const PlanningService::WarmUpResult none = tight.WarmUp();
  EXPECT_EQ(none.models, 0);
  EXPECT_EQ(none.skipped, 2);
  EXPECT_EQ(tight.cache().entries(), 0);
}

TEST_F(PlanningServiceTest, DeleteRemovesModelSolutionsAndJobs) {
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  const std::string id = service.UploadModel(kGreenhouse)->record.id;
  const std::string job = service.StartSolve(id, SolveOptions{})->job->record.id;
  ASSERT_EQ(WaitForEnd(service, job).record.status, JobStatus::kSucceeded);
  ASSERT_TRUE(service.DeleteModel(id).ok());
  EXPECT_EQ(service.GetPlan(id, "").status().code(), StatusCode::kNotFound);
  EXPECT_EQ(service.GetModel(id, false).status().code(), StatusCode::kNotFound);
  EXPECT_EQ(service.GetJob(job).status().code(), StatusCode::kNotFound);
  EXPECT_EQ(service.DeleteModel(id).code(), StatusCode::kNotFound);
}

TEST_F(PlanningServiceTest, VerifiesValuesAndPoliciesSynchronouslyForSmallModels) {
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  const std::string id = service.UploadModel(kGreenhouse)->record.id;
  ASSERT_EQ(WaitForEnd(service, service.StartSolve(id, SolveOptions{})->job->record.id)
                .record.status,
            JobStatus::kSucceeded);
  Result<VerifyStart> good = service.Verify(
      id, R"({"values": {"dry": 4, "wet": 10, "seedling": 4}, "tolerance": 1e-6})");
  ASSERT_TRUE(good.ok());
  EXPECT_TRUE(good->passed);
  Result<VerifyStart> bad = service.Verify(id, R"({"policy": {"dry": "wait", "wet": "harvest",
                                                   "seedling": "grow"}})");
  ASSERT_TRUE(bad.ok());
  EXPECT_FALSE(bad->passed);
  const Json report = Json::parse(bad->report_json);
  EXPECT_EQ(report["suboptimal_states"][0]["state"], "dry");
  Result<VerifyStart> unknown = service.Verify(id, R"({"values": {"attic": 1}})");
  ASSERT_TRUE(unknown.ok());
  EXPECT_FALSE(unknown->errors.empty());
  EXPECT_FALSE(service.Verify(id, R"({"values": {}, "policy": {}})").ok());
}

TEST_F(PlanningServiceTest, LargeModelsVerifyAsAJob) {
  ServiceOptions options;
  options.sync_verify_max_rows = 2;
  PlanningService service(*store_, options);
  ASSERT_TRUE(service.Start().ok());
  const std::string id = service.UploadModel(kGreenhouse)->record.id;
  Result<VerifyStart> v =
      service.Verify(id, R"({"values": {"dry": 4, "wet": 10, "seedling": 4}})");
  ASSERT_TRUE(v.ok());
  ASSERT_TRUE(v->job.has_value());
  const JobView done = WaitForEnd(service, v->job->record.id);
  ASSERT_EQ(done.record.status, JobStatus::kSucceeded) << done.record.error;
  EXPECT_EQ(Json::parse(done.record.result_json)["verdict"], "pass");
}

// The store keeps the binary form (model_store_codec.h); the document route still gets the
// canonical text the id was computed from.
TEST_F(PlanningServiceTest, StoresTheBinaryFormAndServesTheCanonicalText) {
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  Result<UploadResult> up = service.UploadModel(kGreenhouse);
  ASSERT_TRUE(up.ok() && up->errors.empty());
  Result<ModelRecord> raw = store_->GetModel(up->record.id, true);
  ASSERT_TRUE(raw.ok());
  EXPECT_FALSE(IsStoredModelText(raw->document));
  EXPECT_TRUE(DecodeStoredModel(raw->document).ok());
  Result<ModelRecord> served = service.GetModel(up->record.id, true);
  ASSERT_TRUE(served.ok());
  ModelDecodeResult decoded = DecodeModel(kGreenhouse);
  ASSERT_TRUE(decoded.ok());
  EXPECT_EQ(served->document, EncodeCanonicalModel(decoded.spec));
  EXPECT_EQ(ModelId(served->document), up->record.id);
  // The document route's form: the decoded model, whose pieces make the same text.
  Result<PlanningService::ModelDocument> document = service.GetModelDocument(up->record.id);
  ASSERT_TRUE(document.ok());
  ASSERT_NE(document->spec, nullptr);
  EXPECT_TRUE(document->text.empty());
  std::string joined;
  EXPECT_TRUE(WriteCanonicalModelPieces(*document->spec, 256, [&](std::string_view piece) {
    joined += piece;
    return true;
  }));
  EXPECT_EQ(joined, served->document);
  EXPECT_EQ(service.GetModelDocument("nope").status().code(), StatusCode::kNotFound);
}

// A record written before the binary form holds the canonical JSON text: it still solves,
// and its document is served as it is.
TEST_F(PlanningServiceTest, OldTextRecordsStillLoad) {
  ModelDecodeResult decoded = DecodeModel(kGreenhouse);
  ASSERT_TRUE(decoded.ok());
  ModelRecord old;
  old.document = EncodeCanonicalModel(decoded.spec);
  old.id = ModelId(old.document);
  old.name = decoded.spec.name;
  old.warnings_json = "[]";
  bool created = false;
  ASSERT_TRUE(store_->PutModel(old, &created).ok());
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  EXPECT_EQ(service.GetModel(old.id, true)->document, old.document);
  Result<PlanningService::ModelDocument> document = service.GetModelDocument(old.id);
  ASSERT_TRUE(document.ok());
  EXPECT_EQ(document->spec, nullptr);
  EXPECT_EQ(document->text, old.document);
  Result<SolveStart> start = service.StartSolve(old.id, SolveOptions{});
  ASSERT_TRUE(start.ok() && start->job.has_value());
  const JobView done = WaitForEnd(service, start->job->record.id);
  ASSERT_EQ(done.record.status, JobStatus::kSucceeded) << done.record.error;
  Result<Plan> plan = service.GetPlan(old.id, "");
  ASSERT_TRUE(plan.ok());
  // By hand (tests/testing/documents.h): V(wet) = 10.
  EXPECT_NEAR(plan->solution->values[*plan->model->FindState("wet")], 10.0, 1e-9);
  // Uploading the same model now finds the old record under the same id.
  Result<UploadResult> again = service.UploadModel(kGreenhouse);
  ASSERT_TRUE(again.ok());
  EXPECT_FALSE(again->created);
  EXPECT_EQ(again->record.id, old.id);
}

TEST_F(PlanningServiceTest, CorruptRecordsAreReportedNotCrashedOn) {
  PlanningService service(*store_, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  ModelRecord bad;
  bad.id = "corrupt";
  bad.warnings_json = "[]";
  Result<UploadResult> up = service.UploadModel(kGreenhouse);
  ASSERT_TRUE(up.ok());
  bad.document = store_->GetModel(up->record.id, true)->document;
  bad.document[bad.document.size() / 2] ^= 0x10;
  bool created = false;
  ASSERT_TRUE(store_->PutModel(bad, &created).ok());
  Result<ModelRecord> served = service.GetModel("corrupt", true);
  EXPECT_EQ(served.status().code(), StatusCode::kInternal);
  EXPECT_NE(served.status().message().find("checksum"), std::string::npos)
      << served.status().message();
  Result<SolveStart> start = service.StartSolve("corrupt", SolveOptions{});
  ASSERT_TRUE(start.ok() && start->job.has_value());
  const JobView done = WaitForEnd(service, start->job->record.id);
  EXPECT_EQ(done.record.status, JobStatus::kFailed);
  EXPECT_NE(done.record.error.find("corrupt"), std::string::npos) << done.record.error;
}

// A valid model whose stored form is over the store's largest value is refused as too large
// (413 at the HTTP layer), not as a full queue, and nothing is stored.
TEST(PlanningServiceLimitsTest, ModelsOverTheStoresLimitAreTooLarge) {
  std::unique_ptr<Store> store = NewMemoryStore(64);
  PlanningService service(*store, ServiceOptions{});
  ASSERT_TRUE(service.Start().ok());
  Result<UploadResult> up = service.UploadModel(kGreenhouse);
  ASSERT_TRUE(up.ok()) << up.status().ToString();
  EXPECT_TRUE(up->errors.empty());
  EXPECT_NE(up->too_large.find("over the store's limit of 64 bytes"), std::string::npos)
      << up->too_large;
  EXPECT_TRUE(service.ListModels()->empty());
}

}  // namespace
}  // namespace mdp::server
