// Tests server/store.{h,cc}, server/memory_store.cc and server/sqlite_store.cc: one contract
// run against both stores, then what only the SQLite store promises (reopening, WAL mode, the
// schema version, committed writes surviving kill -9). SQLite stores live in a fresh
// temporary directory that is removed afterwards.
#include "server/store.h"

#include <gtest/gtest.h>
#include <signal.h>
#include <sqlite3.h>
#include <stdlib.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cerrno>
#include <cstdint>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <memory>
#include <optional>
#include <string>
#include <thread>
#include <tuple>
#include <type_traits>
#include <utility>
#include <vector>

#include "server/canonical.h"
#include "server/model_store_codec.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp::server {
namespace {

// A fresh directory under the system temporary directory, removed with everything in it.
class TempDir {
 public:
  TempDir() {
    std::string pattern =
        (std::filesystem::temp_directory_path() / "mdpserve-store-test-XXXXXX").string();
    if (::mkdtemp(pattern.data()) == nullptr) {
      ADD_FAILURE() << "mkdtemp: " << std::strerror(errno);
      return;
    }
    path_ = pattern;
  }
  ~TempDir() {
    std::error_code ignored;
    if (!path_.empty()) std::filesystem::remove_all(path_, ignored);
  }
  TempDir(const TempDir&) = delete;
  TempDir& operator=(const TempDir&) = delete;

  const std::string& path() const { return path_; }

 private:
  std::string path_;
};

ModelRecord MakeModel(const std::string& id, std::string document = "{\"states\": []}") {
  ModelRecord model;
  model.id = id;
  model.name = "model " + id;
  model.states = 3;
  model.actions = 2;
  model.state_actions = 5;
  model.outcomes = 9;
  model.warnings_json = R"([{"pointer": "/states/1", "message": "unreachable"}])";
  model.created_at = "2024-05-01T10:00:00Z";
  model.document = std::move(document);
  return model;
}

SolutionRecord MakeSolution(const std::string& id, const std::string& model_id,
                            std::string data = "blob") {
  SolutionRecord solution;
  solution.id = id;
  solution.model_id = model_id;
  solution.options_json = R"({"tolerance": 1e-8})";
  solution.report_json = R"({"outcome": "converged", "of": ")" + id + "\"}";
  solution.created_at = "2024-05-01T10:00:01Z";  // Equal for all: order is by insertion.
  solution.data = std::move(data);
  return solution;
}

JobRecord MakeJob(const std::string& id, const std::string& model_id,
                  JobStatus status = JobStatus::kQueued) {
  JobRecord job;
  job.id = id;
  job.kind = "solve";
  job.model_id = model_id;
  job.request_json = R"({"method": "value_iteration", "job": ")" + id + "\"}";
  job.status = status;
  job.created_at = "2024-05-01T10:00:02Z";  // Equal for all: order is by insertion.
  return job;
}

// A job moved on to its end, every field set.
JobRecord Finished(JobRecord job) {
  job.status = JobStatus::kSucceeded;
  job.started_at = "2024-05-01T10:00:03Z";
  job.finished_at = "2024-05-01T10:00:04Z";
  job.solution_id = "solution-of-" + job.id;
  job.result_json = R"({"ok": true})";
  job.error = "none";
  return job;
}

// The fields compared field by field; the big ones (document, data) are compared apart so
// that a failure does not print megabytes.
auto Fields(const ModelRecord& m) {
  return std::tie(m.id, m.name, m.states, m.actions, m.state_actions, m.outcomes, m.warnings_json,
                  m.created_at);
}
auto Fields(const SolutionRecord& s) {
  return std::tie(s.id, s.model_id, s.options_json, s.report_json, s.created_at);
}
auto Fields(const JobRecord& j) {
  return std::tie(j.id, j.kind, j.model_id, j.request_json, j.status, j.created_at, j.started_at,
                  j.finished_at, j.solution_id, j.result_json, j.error);
}

template <typename Record>
std::vector<std::string> Ids(const std::vector<Record>& records) {
  std::vector<std::string> ids;
  ids.reserve(records.size());
  for (const Record& record : records) ids.push_back(record.id);
  return ids;
}

// `size` bytes that run through every byte value, NUL included, in no simple pattern.
std::string EveryByte(size_t size) {
  std::string bytes(size, '\0');
  uint32_t x = 12345;
  for (size_t i = 0; i < size; ++i) {
    x = x * 1664525u + 1013904223u;  // Numerical Recipes' LCG.
    bytes[i] = static_cast<char>(i < 256 ? i : x >> 24);
  }
  return bytes;
}

// The contract, run against each store. Each factory opens a new, empty store.
struct MemoryStoreFactory {
  Result<std::unique_ptr<Store>> Open() { return NewMemoryStore(); }
};
struct SqliteStoreFactory {
  Result<std::unique_ptr<Store>> Open() { return OpenSqliteStore(dir.path()); }
  TempDir dir;
};

template <typename Factory>
class StoreContractTest : public ::testing::Test {
 protected:
  void SetUp() override {
    Result<std::unique_ptr<Store>> store = factory_.Open();
    ASSERT_OK(store);
    store_ = *std::move(store);
  }

  // Puts a model that must be new.
  void PutNewModel(const ModelRecord& model) {
    bool created = false;
    ASSERT_OK(store_->PutModel(model, &created));
    ASSERT_TRUE(created) << model.id;
  }

  Factory factory_;
  std::unique_ptr<Store> store_;
};

struct StoreNames {
  template <typename Factory>
  static std::string GetName(int) {
    return std::is_same_v<Factory, MemoryStoreFactory> ? "Memory" : "Sqlite";
  }
};
using StoreFactories = ::testing::Types<MemoryStoreFactory, SqliteStoreFactory>;
TYPED_TEST_SUITE(StoreContractTest, StoreFactories, StoreNames);

TYPED_TEST(StoreContractTest, PutModelCreatesOnceAndLeavesTheFirstRecord) {
  bool created = false;
  ASSERT_OK(this->store_->PutModel(MakeModel("m1"), &created));
  EXPECT_TRUE(created);
  ModelRecord changed = MakeModel("m1", "other document");
  changed.name = "changed";
  ASSERT_OK(this->store_->PutModel(changed, &created));
  EXPECT_FALSE(created);

  Result<ModelRecord> stored = this->store_->GetModel("m1", /*with_document=*/true);
  ASSERT_OK(stored);
  EXPECT_EQ(Fields(*stored), Fields(MakeModel("m1")));
  EXPECT_EQ(stored->document, MakeModel("m1").document);
}

TYPED_TEST(StoreContractTest, GetModelLeavesTheDocumentOutWhenAsked) {
  this->PutNewModel(MakeModel("m1"));
  Result<ModelRecord> stored = this->store_->GetModel("m1", /*with_document=*/false);
  ASSERT_OK(stored);
  EXPECT_EQ(Fields(*stored), Fields(MakeModel("m1")));
  EXPECT_TRUE(stored->document.empty());
}

TYPED_TEST(StoreContractTest, FiveMegabyteDocumentRoundTripsByteExact) {
  const std::string document = EveryByte(size_t{5} * 1024 * 1024);
  this->PutNewModel(MakeModel("big", document));
  Result<ModelRecord> stored = this->store_->GetModel("big", /*with_document=*/true);
  ASSERT_OK(stored);
  ASSERT_EQ(stored->document.size(), document.size());
  EXPECT_TRUE(stored->document == document) << "the document's bytes changed";
}

TYPED_TEST(StoreContractTest, ListModelsIsOldestFirstWithoutDocuments) {
  // Ids out of alphabetical order and equal timestamps: only insertion order can explain
  // the listing.
  for (const char* id : {"m-b", "m-c", "m-a"}) this->PutNewModel(MakeModel(id));
  Result<std::vector<ModelRecord>> models = this->store_->ListModels();
  ASSERT_OK(models);
  EXPECT_EQ(Ids(*models), (std::vector<std::string>{"m-b", "m-c", "m-a"}));
  for (const ModelRecord& model : *models) {
    EXPECT_EQ(Fields(model), Fields(MakeModel(model.id)));
    EXPECT_TRUE(model.document.empty()) << model.id;
  }
}

TYPED_TEST(StoreContractTest, MissingIdsAreNotFound) {
  EXPECT_EQ(this->store_->GetModel("nope", true).status().code(), StatusCode::kNotFound);
  EXPECT_EQ(this->store_->DeleteModel("nope").code(), StatusCode::kNotFound);
  EXPECT_EQ(this->store_->GetSolution("nope", true).status().code(), StatusCode::kNotFound);
  EXPECT_EQ(this->store_->GetJob("nope").status().code(), StatusCode::kNotFound);
  Result<std::vector<ModelRecord>> models = this->store_->ListModels();
  ASSERT_OK(models);
  EXPECT_TRUE(models->empty());
  Result<std::vector<SolutionRecord>> solutions = this->store_->ListSolutions("nope");
  ASSERT_OK(solutions);
  EXPECT_TRUE(solutions->empty());
  Result<std::vector<JobRecord>> jobs = this->store_->ListJobs("nope", std::nullopt, 10);
  ASSERT_OK(jobs);
  EXPECT_TRUE(jobs->empty());
}

TYPED_TEST(StoreContractTest, DeleteModelTakesItsSolutionsAndJobsAlong) {
  this->PutNewModel(MakeModel("gone"));
  this->PutNewModel(MakeModel("kept"));
  ASSERT_OK(this->store_->PutSolution(MakeSolution("s-gone", "gone")));
  ASSERT_OK(this->store_->PutSolution(MakeSolution("s-kept", "kept")));
  ASSERT_OK(this->store_->PutJob(MakeJob("j-gone", "gone")));
  ASSERT_OK(this->store_->PutJob(MakeJob("j-kept", "kept")));

  ASSERT_OK(this->store_->DeleteModel("gone"));

  EXPECT_EQ(this->store_->GetModel("gone", false).status().code(), StatusCode::kNotFound);
  EXPECT_EQ(this->store_->GetSolution("s-gone", false).status().code(), StatusCode::kNotFound);
  EXPECT_EQ(this->store_->GetJob("j-gone").status().code(), StatusCode::kNotFound);
  EXPECT_EQ(this->store_->DeleteModel("gone").code(), StatusCode::kNotFound);
  Result<std::vector<ModelRecord>> models = this->store_->ListModels();
  ASSERT_OK(models);
  EXPECT_EQ(Ids(*models), std::vector<std::string>{"kept"});
  Result<std::vector<JobRecord>> jobs = this->store_->ListJobs("", std::nullopt, 10);
  ASSERT_OK(jobs);
  EXPECT_EQ(Ids(*jobs), std::vector<std::string>{"j-kept"});
  EXPECT_OK(this->store_->GetSolution("s-kept", false));
}

TYPED_TEST(StoreContractTest, SolutionDataRoundTripsByteExactAndIsLeftOutWhenAsked) {
  this->PutNewModel(MakeModel("m1"));
  const std::string data = EveryByte(70000);  // NUL bytes included.
  ASSERT_OK(this->store_->PutSolution(MakeSolution("s1", "m1", data)));

  Result<SolutionRecord> with_data = this->store_->GetSolution("s1", /*with_data=*/true);
  ASSERT_OK(with_data);
  EXPECT_EQ(Fields(*with_data), Fields(MakeSolution("s1", "m1")));
  ASSERT_EQ(with_data->data.size(), data.size());
  EXPECT_TRUE(with_data->data == data) << "the solution data's bytes changed";

  Result<SolutionRecord> without = this->store_->GetSolution("s1", /*with_data=*/false);
  ASSERT_OK(without);
  EXPECT_EQ(Fields(*without), Fields(MakeSolution("s1", "m1")));
  EXPECT_TRUE(without->data.empty());
}

TYPED_TEST(StoreContractTest, EmptySolutionDataStaysEmpty) {
  this->PutNewModel(MakeModel("m1"));
  ASSERT_OK(this->store_->PutSolution(MakeSolution("s1", "m1", "")));
  Result<SolutionRecord> stored = this->store_->GetSolution("s1", true);
  ASSERT_OK(stored);
  EXPECT_TRUE(stored->data.empty());
}

TYPED_TEST(StoreContractTest, PutSolutionReplacesAndTheReplacementListsNewest) {
  this->PutNewModel(MakeModel("m1"));
  this->PutNewModel(MakeModel("m2"));
  for (const char* id : {"s1", "s2", "s3"}) {
    ASSERT_OK(this->store_->PutSolution(MakeSolution(id, "m1")));
  }
  ASSERT_OK(this->store_->PutSolution(MakeSolution("other", "m2")));
  Result<std::vector<SolutionRecord>> listed = this->store_->ListSolutions("m1");
  ASSERT_OK(listed);
  EXPECT_EQ(Ids(*listed), (std::vector<std::string>{"s3", "s2", "s1"}));

  SolutionRecord replacement = MakeSolution("s1", "m1", "new data");
  replacement.report_json = R"({"outcome": "time_limit"})";
  ASSERT_OK(this->store_->PutSolution(replacement));
  Result<SolutionRecord> stored = this->store_->GetSolution("s1", true);
  ASSERT_OK(stored);
  EXPECT_EQ(Fields(*stored), Fields(replacement));
  EXPECT_EQ(stored->data, "new data");

  listed = this->store_->ListSolutions("m1");
  ASSERT_OK(listed);
  EXPECT_EQ(Ids(*listed), (std::vector<std::string>{"s1", "s3", "s2"}));
  for (const SolutionRecord& solution : *listed) EXPECT_TRUE(solution.data.empty());
}

TYPED_TEST(StoreContractTest, SolutionsAndJobsNeedAStoredModel) {
  EXPECT_EQ(this->store_->PutSolution(MakeSolution("s1", "absent")).code(),
            StatusCode::kFailedPrecondition);
  EXPECT_EQ(this->store_->PutJob(MakeJob("j1", "absent")).code(), StatusCode::kFailedPrecondition);
  EXPECT_EQ(this->store_->GetSolution("s1", false).status().code(), StatusCode::kNotFound);
  EXPECT_EQ(this->store_->GetJob("j1").status().code(), StatusCode::kNotFound);
}

TYPED_TEST(StoreContractTest, PutJobUpdatesTheWholeRecordInPlace) {
  this->PutNewModel(MakeModel("m1"));
  ASSERT_OK(this->store_->PutJob(MakeJob("j1", "m1")));
  ASSERT_OK(this->store_->PutJob(MakeJob("j2", "m1")));
  Result<JobRecord> queued = this->store_->GetJob("j1");
  ASSERT_OK(queued);
  EXPECT_EQ(Fields(*queued), Fields(MakeJob("j1", "m1")));

  ASSERT_OK(this->store_->PutJob(Finished(MakeJob("j1", "m1"))));
  Result<JobRecord> finished = this->store_->GetJob("j1");
  ASSERT_OK(finished);
  EXPECT_EQ(Fields(*finished), Fields(Finished(MakeJob("j1", "m1"))));

  // The update kept j1's place: j2 is still the newer job.
  Result<std::vector<JobRecord>> jobs = this->store_->ListJobs("", std::nullopt, 10);
  ASSERT_OK(jobs);
  EXPECT_EQ(Ids(*jobs), (std::vector<std::string>{"j2", "j1"}));
}

TYPED_TEST(StoreContractTest, ListJobsFiltersNewestFirstUpToTheLimit) {
  this->PutNewModel(MakeModel("a"));
  this->PutNewModel(MakeModel("b"));
  // a1 queued, b1 running, a2 running, b2 queued, a3 running.
  ASSERT_OK(this->store_->PutJob(MakeJob("a1", "a", JobStatus::kQueued)));
  ASSERT_OK(this->store_->PutJob(MakeJob("b1", "b", JobStatus::kRunning)));
  ASSERT_OK(this->store_->PutJob(MakeJob("a2", "a", JobStatus::kRunning)));
  ASSERT_OK(this->store_->PutJob(MakeJob("b2", "b", JobStatus::kQueued)));
  ASSERT_OK(this->store_->PutJob(MakeJob("a3", "a", JobStatus::kRunning)));
  using Names = std::vector<std::string>;
  auto list = [&](const std::string& model_id, std::optional<JobStatus> status, int64_t limit) {
    Result<std::vector<JobRecord>> jobs = this->store_->ListJobs(model_id, status, limit);
    EXPECT_OK(jobs);
    return jobs.ok() ? Ids(*jobs) : Names{"(failed)"};
  };

  EXPECT_EQ(list("", std::nullopt, 100), (Names{"a3", "b2", "a2", "b1", "a1"}));
  EXPECT_EQ(list("a", std::nullopt, 100), (Names{"a3", "a2", "a1"}));
  EXPECT_EQ(list("", JobStatus::kRunning, 100), (Names{"a3", "a2", "b1"}));
  EXPECT_EQ(list("b", JobStatus::kQueued, 100), (Names{"b2"}));
  EXPECT_EQ(list("b", JobStatus::kFailed, 100), Names{});
  EXPECT_EQ(list("", std::nullopt, 2), (Names{"a3", "b2"}));
  EXPECT_EQ(list("a", JobStatus::kRunning, 1), (Names{"a3"}));
  EXPECT_EQ(list("", std::nullopt, 0), Names{});
  EXPECT_EQ(this->store_->ListJobs("", std::nullopt, -1).status().code(),
            StatusCode::kInvalidArgument);

  Result<std::vector<JobRecord>> all = this->store_->ListJobs("", std::nullopt, 100);
  ASSERT_OK(all);
  for (const JobRecord& job : *all) {
    EXPECT_EQ(Fields(job), Fields(MakeJob(job.id, job.model_id, job.status)));
  }
}

TYPED_TEST(StoreContractTest, ConcurrentWritersAllLand) {
  this->PutNewModel(MakeModel("m1"));
  constexpr int kThreads = 4;
  constexpr int kJobsEach = 10;
  std::vector<std::thread> threads;
  threads.reserve(kThreads);
  for (int t = 0; t < kThreads; ++t) {
    threads.emplace_back([this, t] {
      for (int i = 0; i < kJobsEach; ++i) {
        const std::string id = "t" + std::to_string(t) + "-" + std::to_string(i);
        EXPECT_OK(this->store_->PutJob(MakeJob(id, "m1")));
      }
    });
  }
  for (std::thread& thread : threads) thread.join();
  Result<std::vector<JobRecord>> jobs = this->store_->ListJobs("m1", std::nullopt, 1000);
  ASSERT_OK(jobs);
  EXPECT_EQ(jobs->size(), static_cast<size_t>(kThreads * kJobsEach));
}

TEST(StoreJobStatusTest, NamesParseBack) {
  for (JobStatus status : {JobStatus::kQueued, JobStatus::kRunning, JobStatus::kSucceeded,
                           JobStatus::kFailed, JobStatus::kCancelled}) {
    EXPECT_EQ(ParseJobStatus(JobStatusName(status)), status) << JobStatusName(status);
  }
  EXPECT_EQ(JobStatusName(JobStatus::kSucceeded), "succeeded");
  EXPECT_EQ(ParseJobStatus("Queued"), std::nullopt);
  EXPECT_EQ(ParseJobStatus(""), std::nullopt);
}

// ---- What only the SQLite store promises. ----

// Runs `sql` on the database file directly; returns the first column of its first row, ""
// if it answers no row, or "(... failed: why)".
std::string QueryDatabase(const std::string& path, const char* sql) {
  sqlite3* db = nullptr;
  std::string answer;
  if (sqlite3_open_v2(path.c_str(), &db, SQLITE_OPEN_READWRITE, nullptr) != SQLITE_OK) {
    answer = std::string("(open failed: ") + sqlite3_errmsg(db) + ")";
  } else {
    sqlite3_stmt* stmt = nullptr;
    const int rc = sqlite3_prepare_v2(db, sql, -1, &stmt, nullptr) == SQLITE_OK ? sqlite3_step(stmt)
                                                                                : SQLITE_ERROR;
    if (rc == SQLITE_ROW) {
      answer = reinterpret_cast<const char*>(sqlite3_column_text(stmt, 0));
    } else if (rc != SQLITE_DONE) {
      answer = std::string("(query failed: ") + sqlite3_errmsg(db) + ")";
    }
    sqlite3_finalize(stmt);
  }
  sqlite3_close_v2(db);
  return answer;
}

class SqliteStoreTest : public ::testing::Test {
 protected:
  std::unique_ptr<Store> Open() {
    Result<std::unique_ptr<Store>> store = OpenSqliteStore(dir_.path());
    EXPECT_OK(store);
    return store.ok() ? *std::move(store) : nullptr;
  }
  std::string DatabasePath() const { return dir_.path() + "/mdpserve.db"; }

  TempDir dir_;
};

TEST_F(SqliteStoreTest, RecordsSurviveClosingAndReopening) {
  const std::string data = EveryByte(1000);
  {
    std::unique_ptr<Store> store = Open();
    ASSERT_NE(store, nullptr);
    bool created = false;
    ASSERT_OK(store->PutModel(MakeModel("m1"), &created));
    ASSERT_OK(store->PutSolution(MakeSolution("s1", "m1", data)));
    ASSERT_OK(store->PutJob(Finished(MakeJob("j1", "m1"))));
  }
  std::unique_ptr<Store> store = Open();
  ASSERT_NE(store, nullptr);
  Result<ModelRecord> model = store->GetModel("m1", true);
  ASSERT_OK(model);
  EXPECT_EQ(Fields(*model), Fields(MakeModel("m1")));
  EXPECT_EQ(model->document, MakeModel("m1").document);
  Result<SolutionRecord> solution = store->GetSolution("s1", true);
  ASSERT_OK(solution);
  EXPECT_EQ(Fields(*solution), Fields(MakeSolution("s1", "m1")));
  EXPECT_TRUE(solution->data == data);
  Result<JobRecord> job = store->GetJob("j1");
  ASSERT_OK(job);
  EXPECT_EQ(Fields(*job), Fields(Finished(MakeJob("j1", "m1"))));
  bool created = true;
  ASSERT_OK(store->PutModel(MakeModel("m1"), &created));
  EXPECT_FALSE(created);
}

TEST_F(SqliteStoreTest, DatabaseIsInWalModeAtSchemaVersionOne) {
  ASSERT_NE(Open(), nullptr);
  ASSERT_NE(Open(), nullptr);  // Reopening an up-to-date database migrates nothing.
  EXPECT_EQ(QueryDatabase(DatabasePath(), "PRAGMA journal_mode"), "wal");
  EXPECT_EQ(QueryDatabase(DatabasePath(), "PRAGMA user_version"), "1");
}

// A model in the binary stored form (model_store_codec.h) goes in and comes back through a
// closed and reopened database byte for byte, and decodes to the spec it was made from.
TEST_F(SqliteStoreTest, BinaryModelRecordSurvivesReopening) {
  testing::RandomModelOptions options;
  options.states = 300;
  const ModelSpec spec = testing::RandomSpec(5, options);
  Result<std::string> encoded = EncodeStoredModel(spec);
  ASSERT_OK(encoded);
  ModelRecord model = MakeModel(CanonicalModelId(spec), *encoded);
  {
    std::unique_ptr<Store> store = Open();
    ASSERT_NE(store, nullptr);
    bool created = false;
    ASSERT_OK(store->PutModel(model, &created));
    EXPECT_TRUE(created);
  }
  std::unique_ptr<Store> store = Open();
  ASSERT_NE(store, nullptr);
  Result<ModelRecord> stored = store->GetModel(model.id, true);
  ASSERT_OK(stored);
  EXPECT_EQ(Fields(*stored), Fields(model));
  ASSERT_TRUE(stored->document == *encoded) << "the record's bytes changed";
  Result<ModelSpec> back = DecodeStoredModel(stored->document);
  ASSERT_OK(back);
  EXPECT_EQ(EncodeCanonicalModel(*back), EncodeCanonicalModel(spec));
  EXPECT_EQ(back->outcome_probability, spec.outcome_probability);
}

// Debian's SQLite: strings and BLOBs up to 1e9 bytes (SQLITE_MAX_LENGTH).
TEST_F(SqliteStoreTest, ReportsSqlitesLargestValue) {
  std::unique_ptr<Store> store = Open();
  ASSERT_NE(store, nullptr);
  EXPECT_EQ(store->MaxValueBytes(), 999'999'999);
}

TEST(MemoryStoreTest, RefusesValuesOverItsLimit) {
  std::unique_ptr<Store> store = NewMemoryStore(10);
  EXPECT_EQ(store->MaxValueBytes(), 10);
  bool created = false;
  EXPECT_OK(store->PutModel(MakeModel("fits", std::string(10, 'x')), &created));
  EXPECT_TRUE(created);
  const Status over = store->PutModel(MakeModel("over", std::string(11, 'x')), &created);
  EXPECT_EQ(over.code(), StatusCode::kResourceExhausted) << over.ToString();
  EXPECT_EQ(store->GetModel("over", false).status().code(), StatusCode::kNotFound);
  EXPECT_EQ(store->PutSolution(MakeSolution("s", "fits", std::string(11, 'x'))).code(),
            StatusCode::kResourceExhausted);
}

TEST_F(SqliteStoreTest, RefusesADatabaseFromANewerBuild) {
  ASSERT_NE(Open(), nullptr);
  ASSERT_EQ(QueryDatabase(DatabasePath(), "PRAGMA user_version = 99"), "");
  Result<std::unique_ptr<Store>> store = OpenSqliteStore(dir_.path());
  ASSERT_FALSE(store.ok());
  EXPECT_EQ(store.status().code(), StatusCode::kFailedPrecondition);
  EXPECT_NE(store.status().message().find("99"), std::string::npos) << store.status().message();
}

TEST_F(SqliteStoreTest, OpenReportsADirectoryThatCannotBeMade) {
  const std::string file = dir_.path() + "/plain-file";
  std::ofstream(file) << "not a directory";
  Result<std::unique_ptr<Store>> store = OpenSqliteStore(file + "/store");
  ASSERT_FALSE(store.ok());
  EXPECT_EQ(store.status().code(), StatusCode::kInternal);
  EXPECT_NE(store.status().message().find("plain-file"), std::string::npos)
      << store.status().message();
}

// The crash test's jobs: job `i`, first queued, then finished, with a request big enough
// (64 KiB) that each write spans many pages and a kill lands inside writes.
JobRecord CrashJob(int64_t i, bool finished) {
  JobRecord job = MakeJob("job-" + std::to_string(i), "m1");
  job.request_json.assign(size_t{64} * 1024, static_cast<char>('a' + i % 26));
  return finished ? Finished(std::move(job)) : job;
}

// Child process body: writes crash jobs until killed, reporting each finished job's index on
// `report_fd` after its commit. Never returns.
[[noreturn]] void WriteJobsUntilKilled(const std::string& directory, int report_fd) {
  Result<std::unique_ptr<Store>> store = OpenSqliteStore(directory);
  if (!store.ok()) ::_exit(2);
  for (int64_t i = 0;; ++i) {
    if (!(*store)->PutJob(CrashJob(i, false)).ok()) ::_exit(3);
    if (!(*store)->PutJob(CrashJob(i, true)).ok()) ::_exit(3);
    if (::write(report_fd, &i, sizeof i) != sizeof i) ::_exit(4);
  }
}

// Reads one index from `fd`; nullopt at end of file.
std::optional<int64_t> ReadIndex(int fd) {
  int64_t value = 0;
  size_t got = 0;
  while (got < sizeof value) {
    const ssize_t n = ::read(fd, reinterpret_cast<char*>(&value) + got, sizeof value - got);
    if (n < 0 && errno == EINTR) continue;
    if (n <= 0) return std::nullopt;
    got += static_cast<size_t>(n);
  }
  return value;
}

TEST_F(SqliteStoreTest, CommittedJobsSurviveSigkillMidWrite) {
  {
    std::unique_ptr<Store> store = Open();  // Closed before the fork: no shared connection.
    ASSERT_NE(store, nullptr);
    bool created = false;
    ASSERT_OK(store->PutModel(MakeModel("m1"), &created));
  }
  int fds[2];
  ASSERT_EQ(::pipe(fds), 0) << std::strerror(errno);
  const pid_t child = ::fork();
  ASSERT_GE(child, 0) << std::strerror(errno);
  if (child == 0) {
    ::close(fds[0]);
    WriteJobsUntilKilled(dir_.path(), fds[1]);
  }
  ::close(fds[1]);

  constexpr int64_t kJobsBeforeKill = 20;
  int64_t last_reported = -1;
  while (last_reported + 1 < kJobsBeforeKill) {
    std::optional<int64_t> index = ReadIndex(fds[0]);
    if (!index) break;
    last_reported = *index;
  }
  ::kill(child, SIGKILL);
  int wait_status = 0;
  ::waitpid(child, &wait_status, 0);
  // Whatever the child reported before it died was committed too.
  while (std::optional<int64_t> index = ReadIndex(fds[0])) last_reported = *index;
  ::close(fds[0]);
  ASSERT_TRUE(WIFSIGNALED(wait_status) && WTERMSIG(wait_status) == SIGKILL)
      << "the child stopped by itself (status " << wait_status << ") after job " << last_reported;
  ASSERT_GE(last_reported + 1, kJobsBeforeKill);

  EXPECT_EQ(QueryDatabase(DatabasePath(), "PRAGMA integrity_check"), "ok");
  std::unique_ptr<Store> store = Open();
  ASSERT_NE(store, nullptr);
  for (int64_t i = 0; i <= last_reported; ++i) {
    Result<JobRecord> job = store->GetJob(CrashJob(i, true).id);
    ASSERT_OK(job);
    EXPECT_EQ(Fields(*job), Fields(CrashJob(i, true))) << "job " << i;
  }
  // The job in flight at the kill is absent or one of its two writes, whole.
  Result<JobRecord> in_flight = store->GetJob(CrashJob(last_reported + 1, false).id);
  if (in_flight.ok()) {
    const bool finished = in_flight->status == JobStatus::kSucceeded;
    EXPECT_EQ(Fields(*in_flight), Fields(CrashJob(last_reported + 1, finished)));
  } else {
    EXPECT_EQ(in_flight.status().code(), StatusCode::kNotFound);
  }
  Result<std::vector<JobRecord>> jobs = store->ListJobs("m1", std::nullopt, 1 << 20);
  ASSERT_OK(jobs);
  EXPECT_LE(static_cast<int64_t>(jobs->size()), last_reported + 2);
}

}  // namespace
}  // namespace mdp::server
