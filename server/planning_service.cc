#include "server/planning_service.h"

#if defined(__GLIBC__)
#include <malloc.h>
#endif

#include <chrono>
#include <ctime>
#include <limits>
#include <random>
#include <utility>

#include "server/api_codec.h"
#include "server/canonical.h"
#include "server/json_codec.h"
#include "server/model_store_codec.h"
#include "server/solution_blob.h"

namespace mdp::server {

struct PlanningService::ActiveJob {
  std::mutex mu;
  JobRecord record;                  // GUARDED_BY(mu)
  std::optional<Progress> progress;  // GUARDED_BY(mu)
  std::string phase;                 // GUARDED_BY(mu)
  CancelToken cancel;
  bool stopped_by_shutdown = false;  // GUARDED_BY(mu)
  SolveOptions options;              // Solve jobs; constant after creation.
};

std::string NowRfc3339() {
  const auto now = std::chrono::system_clock::now();
  const std::time_t t = std::chrono::system_clock::to_time_t(now);
  const auto ms = std::chrono::duration_cast<std::chrono::milliseconds>(now.time_since_epoch()) %
                  1000;
  std::tm utc{};
  gmtime_r(&t, &utc);
  char buffer[80];
  std::snprintf(buffer, sizeof buffer, "%04d-%02d-%02dT%02d:%02d:%02d.%03dZ", utc.tm_year + 1900,
                utc.tm_mon + 1, utc.tm_mday, utc.tm_hour, utc.tm_min, utc.tm_sec,
                static_cast<int>(ms.count()));
  return buffer;
}

std::string CanonicalSolveOptions(const SolveOptions& options) {
  Json json = EncodeSolveOptions(options);
  json["method"] = std::string(MethodName(options.method));
  json.erase("threads");  // How many threads solve does not change the answer's meaning.
  return DumpJson(json);
}

namespace {

// Hands heap pages freed by large work back to the system. glibc keeps freed memory in its
// arenas (each worker thread has its own) and returns only the top of the main heap by
// itself. Measured with scripts/bench/service_memory.py (300,000 states x 4 x 8, SQLite
// store): resident memory after upload and solve fell from 296 MB to 204 MB, next to a cached
// model and solution of 170 MB. A no-op without glibc.
void ReturnFreedMemory() {
#if defined(__GLIBC__)
  malloc_trim(0);
#endif
}

// Calls ReturnFreedMemory() when it goes out of scope, if `enabled`: declared first in a
// function, after every other local of that function is destroyed.
class ReturnFreedMemoryAtExit {
 public:
  explicit ReturnFreedMemoryAtExit(bool enabled) : enabled_(enabled) {}
  ~ReturnFreedMemoryAtExit() {
    if (enabled_) ReturnFreedMemory();
  }
  ReturnFreedMemoryAtExit(const ReturnFreedMemoryAtExit&) = delete;
  ReturnFreedMemoryAtExit& operator=(const ReturnFreedMemoryAtExit&) = delete;

 private:
  const bool enabled_;
};

// Compiles a stored model record: the binary form (model_store_codec.h), or the canonical
// JSON text that records written before it hold. The record is released once decoded.
Result<Model> CompileStoredModel(const std::string& model_id, std::string record,
                                 const DecodeLimits& limits) {
  if (IsStoredModelText(record)) {
    ModelDecodeResult decoded = DecodeModel(record, limits);
    if (!decoded.ok()) return InternalError("stored model " + model_id + " no longer decodes");
    return std::move(*decoded.model);
  }
  Result<ModelSpec> spec = DecodeStoredModel(record);
  std::string().swap(record);
  if (!spec.ok()) return InternalError("model " + model_id + ": " + spec.status().message());
  Result<Model> model = BuildModel(*spec);
  if (!model.ok()) {
    return InternalError("stored model " + model_id + " no longer compiles: " +
                         model.status().message());
  }
  return model;
}

// Uploads from this size on are large enough for ReturnFreedMemory() to be worth its time.
constexpr size_t kTrimAfterUploadBytes = size_t{16} << 20;

std::string NewJobId() {
  static thread_local std::mt19937_64 rng(std::random_device{}() ^
                                          static_cast<uint64_t>(
                                              std::chrono::steady_clock::now()
                                                  .time_since_epoch()
                                                  .count()));
  static constexpr char kHex[] = "0123456789abcdef";
  std::string id = "j";
  for (int i = 0; i < 2; ++i) {
    uint64_t x = rng();
    for (int k = 0; k < 16; ++k, x >>= 4) id += kHex[x & 15];
  }
  return id;
}


// A solution's id: the hash of its model and its canonical options.
std::string SolutionIdFor(const std::string& model_id, const std::string& options_json) {
  return Sha256Hex(model_id + "\n" + options_json).substr(0, 32);
}

}  // namespace

PlanningService::PlanningService(Store& store, ServiceOptions options)
    : store_(store),
      options_(std::move(options)),
      cache_(options_.cache_bytes),
      queue_(std::make_unique<JobQueue>(options_.workers, options_.queue_capacity,
                                        options_.worker_niceness)) {}

PlanningService::~PlanningService() { Shutdown(0.0); }

Status PlanningService::Start() {
  Result<std::vector<JobRecord>> jobs =
      store_.ListJobs("", std::nullopt, std::numeric_limits<int64_t>::max());
  if (!jobs.ok()) return jobs.status();
  // Oldest first, so re-queued jobs keep their order.
  for (auto it = jobs->rbegin(); it != jobs->rend(); ++it) {
    JobRecord record = *it;
    if (record.status == JobStatus::kRunning) {
      record.status = JobStatus::kFailed;
      record.error = "the service stopped while this job was running; submit it again";
      record.finished_at = NowRfc3339();
      MDP_RETURN_IF_ERROR(store_.PutJob(record));
    } else if (record.status == JobStatus::kQueued) {
      auto job = std::make_shared<ActiveJob>();
      if (record.kind == "solve") {
        Result<SolveOptions> options = DecodeSolveOptionsText(record.request_json);
        if (!options.ok()) return options.status();
        job->options = *options;
      }
      job->record = record;
      std::lock_guard<std::mutex> lock(mu_);
      Status queued = Enqueue(job);
      if (!queued.ok()) {
        job->record.status = JobStatus::kFailed;
        job->record.error = "could not be queued again at restart: " + queued.message();
        job->record.finished_at = NowRfc3339();
        MDP_RETURN_IF_ERROR(store_.PutJob(job->record));
      }
    }
  }
  Result<std::vector<ModelRecord>> models = store_.ListModels();
  if (!models.ok()) return models.status();
  for (const ModelRecord& m : *models) {
    Result<std::vector<SolutionRecord>> solutions = store_.ListSolutions(m.id);
    if (!solutions.ok()) return solutions.status();
    if (!solutions->empty()) {
      std::lock_guard<std::mutex> lock(current_mu_);
      current_solution_[m.id] = solutions->front().id;
    }
  }
  return Status::Ok();
}

void PlanningService::Shutdown(double deadline_seconds) {
  accepting_.store(false, std::memory_order_release);
  const auto deadline = std::chrono::steady_clock::now() +
                        std::chrono::duration<double>(std::max(0.0, deadline_seconds));
  while (queue_->running() > 0 && std::chrono::steady_clock::now() < deadline) {
    std::this_thread::sleep_for(std::chrono::milliseconds(20));
  }
  {
    std::lock_guard<std::mutex> lock(mu_);
    for (auto& [id, job] : active_) {
      std::lock_guard<std::mutex> job_lock(job->mu);
      job->stopped_by_shutdown = true;
      job->cancel.Cancel();
    }
  }
  queue_->Shutdown();  // Joins the workers; queued jobs stay queued in the store.
}

Result<UploadResult> PlanningService::UploadModelOwned(std::string&& document) {
  std::string owned = std::move(document);
  return Upload(owned, [&owned] { std::string().swap(owned); });
}

Result<UploadResult> PlanningService::UploadModel(std::string_view document) {
  return Upload(document, nullptr);
}

Result<UploadResult> PlanningService::Upload(std::string_view document,
                                             const TextReleased& released) {
  if (!accepting()) return Status(StatusCode::kUnavailable, "the service is shutting down");
  const ReturnFreedMemoryAtExit trim(document.size() >= kTrimAfterUploadBytes);
  ModelDecodeResult decoded = DecodeModel(document, options_.limits, released);
  document = std::string_view();  // Possibly freed by `released`.
  UploadResult result;
  result.warnings = std::move(decoded.warnings);
  if (!decoded.ok()) {
    result.errors = std::move(decoded.errors);
    result.errors_not_listed = decoded.errors_not_listed;
    result.malformed = decoded.malformed;
    if (result.errors.empty()) result.errors.push_back({"", "the model is not valid"});
    return result;
  }
  ModelRecord record;
  record.id = CanonicalModelId(decoded.spec);
  Result<std::string> stored = EncodeStoredModel(decoded.spec);
  if (!stored.ok()) return stored.status();
  record.document = std::move(*stored);
  decoded.spec = ModelSpec();
  if (static_cast<int64_t>(record.document.size()) > store_.MaxValueBytes()) {
    result.too_large = "the model's stored form of " + std::to_string(record.document.size()) +
                       " bytes is over the store's limit of " +
                       std::to_string(store_.MaxValueBytes()) + " bytes";
    return result;
  }
  const Model& m = *decoded.model;
  record.name = m.name();
  record.states = m.num_states();
  record.actions = m.num_actions();
  record.state_actions = m.num_rows();
  record.outcomes = m.num_outcomes_in_document();
  record.warnings_json = DumpJson(EncodeIssues({}, result.warnings, 0)["warnings"]);
  record.created_at = NowRfc3339();
  MDP_RETURN_IF_ERROR(store_.PutModel(record, &result.created));
  if (result.created) {
    cache_.PutModel(record.id, std::make_shared<const Model>(std::move(*decoded.model)));
    record.document.clear();
    result.record = std::move(record);
  } else {
    Result<ModelRecord> existing = store_.GetModel(record.id, false);
    if (!existing.ok()) return existing.status();
    result.record = std::move(*existing);
  }
  return result;
}

Result<ModelRecord> PlanningService::GetModel(const std::string& id, bool with_document) {
  Result<ModelRecord> record = store_.GetModel(id, with_document);
  if (!record.ok() || !with_document || IsStoredModelText(record->document)) return record;
  // The store keeps the binary form; the canonical text is made again from it, byte for
  // byte the text the id was computed from (the round trip keeps every bit).
  Result<ModelSpec> spec = DecodeStoredModel(record->document);
  if (!spec.ok()) return InternalError("model " + id + ": " + spec.status().message());
  std::string().swap(record->document);
  record->document = EncodeCanonicalModel(*spec);
  return record;
}

Result<PlanningService::ModelDocument> PlanningService::GetModelDocument(const std::string& id) {
  Result<ModelRecord> record = store_.GetModel(id, true);
  if (!record.ok()) return record.status();
  ModelDocument out;
  if (IsStoredModelText(record->document)) {
    out.text = std::move(record->document);
    return out;
  }
  Result<ModelSpec> spec = DecodeStoredModel(record->document);
  if (!spec.ok()) return InternalError("model " + id + ": " + spec.status().message());
  out.spec = std::make_shared<const ModelSpec>(std::move(*spec));
  return out;
}

Result<std::vector<ModelRecord>> PlanningService::ListModels() { return store_.ListModels(); }

Status PlanningService::DeleteModel(const std::string& id) {
  if (!accepting()) return Status(StatusCode::kUnavailable, "the service is shutting down");
  Result<std::vector<SolutionRecord>> solutions = store_.ListSolutions(id);
  if (!solutions.ok()) return solutions.status();
  {
    std::lock_guard<std::mutex> lock(mu_);
    for (auto& [job_id, job] : active_) {
      std::lock_guard<std::mutex> job_lock(job->mu);
      if (job->record.model_id == id) job->cancel.Cancel();
    }
  }
  {
    std::lock_guard<std::mutex> lock(current_mu_);
    current_solution_.erase(id);
  }
  MDP_RETURN_IF_ERROR(store_.DeleteModel(id));
  cache_.Erase(id);
  for (const SolutionRecord& s : *solutions) cache_.Erase(s.id);
  return Status::Ok();
}

Result<SolveStart> PlanningService::StartSolve(const std::string& model_id,
                                               const SolveOptions& options) {
  if (!accepting()) return Status(StatusCode::kUnavailable, "the service is shutting down");
  MDP_RETURN_IF_ERROR(CheckSolveOptions(options));
  Result<ModelRecord> model = store_.GetModel(model_id, false);
  if (!model.ok()) return model.status();
  // A model still in the cache (as after its upload) tells its criterion for free: refuse a
  // method that does not apply now rather than in a failed job.
  if (auto cached = cache_.GetModel(model_id)) {
    MDP_RETURN_IF_ERROR(CheckMethod(cached->criterion().kind, options.method));
  }
  const std::string options_json = CanonicalSolveOptions(options);
  const std::string solution_id = SolutionIdFor(model_id, options_json);
  SolveStart start;
  if (store_.GetSolution(solution_id, false).ok()) {
    start.cached_solution_id = solution_id;
    return start;
  }
  std::lock_guard<std::mutex> lock(mu_);
  auto running = active_by_solution_.find(solution_id);
  if (running != active_by_solution_.end()) {
    start.job = ViewOf(*active_.at(running->second));
    return start;
  }
  auto job = NewQueuedJob("solve", model_id, options_json);
  job->options = options;
  MDP_RETURN_IF_ERROR(Enqueue(job));
  start.job = ViewOf(*job);
  return start;
}

// REQUIRES: mu_ held. Submits the job and records it; the worker waits on mu_ before it
// starts, so the "queued" record is written before any later one.
Status PlanningService::Enqueue(std::shared_ptr<ActiveJob> job) {
  MDP_RETURN_IF_ERROR(queue_->Submit([this, job] { RunJob(job); }));
  active_[job->record.id] = job;
  if (job->record.kind == "solve") {
    active_by_solution_[SolutionIdFor(job->record.model_id, job->record.request_json)] =
        job->record.id;
  }
  Persist(*job);
  return Status::Ok();
}

void PlanningService::Persist(ActiveJob& job) {
  JobRecord copy;
  {
    std::lock_guard<std::mutex> lock(job.mu);
    copy = job.record;
  }
  // A failed write leaves the previous record in place; the in-memory view stays right and
  // the next transition writes again. Nothing better can be done from a worker thread.
  (void)store_.PutJob(copy);
  if (options_.on_job_event) options_.on_job_event(copy);
}

int64_t PlanningService::CountActiveJobs(JobStatus status) const {
  int64_t count = 0;
  std::lock_guard<std::mutex> lock(mu_);
  for (const auto& [id, job] : active_) {
    std::lock_guard<std::mutex> job_lock(job->mu);
    count += job->record.status == status;
  }
  return count;
}

JobView PlanningService::ViewOf(ActiveJob& job) {
  std::lock_guard<std::mutex> lock(job.mu);
  JobView view{job.record, job.progress, job.phase};
  if (view.progress) view.progress->phase = view.phase;
  return view;
}

void PlanningService::RunJob(const std::shared_ptr<ActiveJob>& job) {
  { std::lock_guard<std::mutex> barrier(mu_); }
  bool skip = false;
  bool cancelled_in_queue = false;
  {
    std::lock_guard<std::mutex> lock(job->mu);
    cancelled_in_queue = job->record.status == JobStatus::kCancelled;
    skip = cancelled_in_queue || job->cancel.cancelled();
    if (!skip) {
      job->record.status = JobStatus::kRunning;
      job->record.started_at = NowRfc3339();
    }
  }
  if (cancelled_in_queue) {  // CancelJob ended, stored and counted it.
    Retire(*job);
    return;
  }
  Status status = Status(StatusCode::kCancelled, "cancelled before it started");
  const auto started = std::chrono::steady_clock::now();
  if (!skip) {
    Persist(*job);
    status = job->record.kind == "solve"      ? RunSolve(*job)
             : job->record.kind == "simulate" ? RunSimulation(*job)
                                              : RunVerify(*job);
    ReturnFreedMemory();  // The job's working memory is freed by now.
  }
  JobRecord final_record;
  bool stopped_by_shutdown = false;
  {
    std::lock_guard<std::mutex> lock(job->mu);
    final_record = job->record;
    stopped_by_shutdown = job->stopped_by_shutdown;
  }
  if (stopped_by_shutdown && status.code() == StatusCode::kCancelled) {
    final_record.status = JobStatus::kQueued;  // Runs again after the restart.
    final_record.started_at.clear();
  } else {
    if (status.code() == StatusCode::kCancelled) {
      final_record.status = JobStatus::kCancelled;
      final_record.error = "cancelled";
    } else if (!status.ok()) {
      final_record.status = JobStatus::kFailed;
      final_record.error = status.message();
    } else {
      final_record.status = JobStatus::kSucceeded;
    }
    final_record.finished_at = NowRfc3339();
    // Counted before GET shows the end, so that a client that sees a job end finds it in
    // mdpserve_jobs_finished_total and the duration histogram.
    if (options_.on_job_finished) {
      options_.on_job_finished(
          final_record,
          std::chrono::duration<double>(std::chrono::steady_clock::now() - started).count());
    }
  }
  {
    std::lock_guard<std::mutex> lock(job->mu);
    job->record = std::move(final_record);
  }
  Persist(*job);
  Retire(*job);
}

void PlanningService::Retire(const ActiveJob& job) {
  std::lock_guard<std::mutex> lock(mu_);
  active_.erase(job.record.id);
  for (auto it = active_by_solution_.begin(); it != active_by_solution_.end(); ++it) {
    if (it->second == job.record.id) {
      active_by_solution_.erase(it);
      break;
    }
  }
}

std::shared_ptr<PlanningService::ActiveJob> PlanningService::NewQueuedJob(
    const std::string& kind, const std::string& model_id, std::string request_json) {
  auto job = std::make_shared<ActiveJob>();
  job->record.id = NewJobId();
  job->record.kind = kind;
  job->record.model_id = model_id;
  job->record.request_json = std::move(request_json);
  job->record.status = JobStatus::kQueued;
  job->record.created_at = NowRfc3339();
  return job;
}

ProgressFn PlanningService::ProgressInto(ActiveJob& job) {
  return [&job](const Progress& p) {
    std::lock_guard<std::mutex> lock(job.mu);
    job.progress = p;
    job.phase = std::string(p.phase);
  };
}

Status PlanningService::RunSolve(ActiveJob& job) {
  Result<std::shared_ptr<const Model>> model = LoadModel(job.record.model_id);
  if (!model.ok()) return model.status();
  ProgressFn progress = ProgressInto(job);
  SolveOptions options = job.options;
  options.threads = options_.solver_threads;
  Result<Solution> solved = Solve(**model, options, &progress, &job.cancel);
  if (!solved.ok()) return solved.status();
  if (solved->outcome == SolveOutcome::kCancelled) {
    return Status(StatusCode::kCancelled, "cancelled");
  }
  auto solution = std::make_shared<const Solution>(std::move(*solved));
  SolutionRecord record;
  record.id = SolutionIdFor(job.record.model_id, job.record.request_json);
  record.model_id = job.record.model_id;
  record.options_json = job.record.request_json;
  record.report_json = DumpJson(EncodeSolutionReport(**model, *solution, record.id));
  record.created_at = NowRfc3339();
  record.data = EncodeSolutionBlob(*solution);
  MDP_RETURN_IF_ERROR(store_.PutSolution(record));
  cache_.PutSolution(record.id, solution);
  {
    std::lock_guard<std::mutex> lock(current_mu_);
    current_solution_[record.model_id] = record.id;
  }
  std::lock_guard<std::mutex> job_lock(job.mu);
  job.record.solution_id = record.id;
  return Status::Ok();
}

Status PlanningService::RunVerify(ActiveJob& job) {
  Result<VerifyStart> done = VerifyNow(job.record.model_id, job.record.request_json);
  if (!done.ok()) return done.status();
  if (!done->errors.empty()) return InvalidArgumentError(done->errors.front().message);
  std::lock_guard<std::mutex> lock(job.mu);
  job.record.result_json = std::move(done->report_json);
  return Status::Ok();
}

Result<SimulateStart> PlanningService::StartSimulation(const std::string& model_id,
                                                      std::string_view body) {
  if (!accepting()) return Status(StatusCode::kUnavailable, "the service is shutting down");
  Result<std::shared_ptr<const Model>> model = LoadModel(model_id);
  if (!model.ok()) return model.status();
  Decoded<SimulateRequest> request = DecodeSimulateRequest(**model, body);
  SimulateStart start;
  if (!request.ok()) {
    start.errors = std::move(request.errors);
    return start;
  }
  if (!request.value.policy) {
    Result<Plan> plan = GetPlan(model_id, request.value.solution_id);
    if (!plan.ok()) return plan.status();
  }
  auto job = NewQueuedJob("simulate", model_id, std::string(body));
  std::lock_guard<std::mutex> lock(mu_);
  MDP_RETURN_IF_ERROR(Enqueue(job));
  start.job = ViewOf(*job);
  return start;
}

Status PlanningService::RunSimulation(ActiveJob& job) {
  Result<std::shared_ptr<const Model>> model = LoadModel(job.record.model_id);
  if (!model.ok()) return model.status();
  Decoded<SimulateRequest> request = DecodeSimulateRequest(**model, job.record.request_json);
  if (!request.ok()) return InvalidArgumentError(request.errors.front().message);
  ProgressFn progress = ProgressInto(job);
  Result<SimulationReport> report = [&]() -> Result<SimulationReport> {
    if (request.value.policy) {
      return Simulate(**model, *request.value.policy, request.value.options, &progress,
                      &job.cancel);
    }
    // The solution itself, so a finite-horizon run follows its per-stage decisions.
    Result<Plan> plan = GetPlan(job.record.model_id, request.value.solution_id);
    if (!plan.ok()) return plan.status();
    return Simulate(**model, *plan->solution, request.value.options, &progress, &job.cancel);
  }();
  if (!report.ok()) return report.status();
  if (report->outcome == SimulationOutcome::kCancelled) {
    return Status(StatusCode::kCancelled, "cancelled");
  }
  std::string result = DumpJson(
      EncodeSimulation(**model, request.value.options, *report, request.value.listed_states));
  std::lock_guard<std::mutex> lock(job.mu);
  job.record.result_json = std::move(result);
  return Status::Ok();
}

Result<JobView> PlanningService::GetJob(const std::string& id) {
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto it = active_.find(id);
    if (it != active_.end()) return ViewOf(*it->second);
  }
  Result<JobRecord> record = store_.GetJob(id);
  if (!record.ok()) return record.status();
  return JobView{std::move(*record), std::nullopt, ""};
}

Result<std::vector<JobView>> PlanningService::ListJobs(const std::string& model_id,
                                                       std::optional<JobStatus> status,
                                                       int64_t limit) {
  Result<std::vector<JobRecord>> records = store_.ListJobs(model_id, status, limit);
  if (!records.ok()) return records.status();
  std::vector<JobView> views;
  std::lock_guard<std::mutex> lock(mu_);
  for (JobRecord& r : *records) {
    auto it = active_.find(r.id);
    views.push_back(it != active_.end() ? ViewOf(*it->second)
                                        : JobView{std::move(r), std::nullopt, ""});
  }
  return views;
}

Result<JobView> PlanningService::CancelJob(const std::string& id) {
  std::shared_ptr<ActiveJob> job;
  {
    std::lock_guard<std::mutex> lock(mu_);
    auto it = active_.find(id);
    if (it != active_.end()) job = it->second;
  }
  if (job == nullptr) {
    Result<JobRecord> record = store_.GetJob(id);
    if (!record.ok()) return record.status();
    return FailedPreconditionError("job " + id + " has already finished (" +
                                   std::string(JobStatusName(record->status)) + ")");
  }
  job->cancel.Cancel();
  bool was_queued = false;
  {
    std::lock_guard<std::mutex> lock(job->mu);
    if (job->record.status == JobStatus::kQueued) {
      job->record.status = JobStatus::kCancelled;
      job->record.error = "cancelled";
      job->record.finished_at = NowRfc3339();
      if (options_.on_job_finished) options_.on_job_finished(job->record, 0.0);
      was_queued = true;
    }
  }
  if (was_queued) Persist(*job);
  return ViewOf(*job);
}

std::string PlanningService::CurrentSolution(const std::string& model_id) {
  std::lock_guard<std::mutex> lock(current_mu_);
  auto it = current_solution_.find(model_id);
  return it == current_solution_.end() ? std::string() : it->second;
}

namespace {

// Bytes a model and its solution will take in the cache, from the record's counts, rounded
// up: a 1M x 4 x 8 model took 504 MB and its solution 57 MB, estimated 688 MB.
int64_t EstimatedCachedBytes(const ModelRecord& record) {
  return record.outcomes * 16 + record.state_actions * 32 + record.states * 48;
}

}  // namespace

PlanningService::WarmUpResult PlanningService::WarmUp() {
  WarmUpResult out;
  Result<std::vector<ModelRecord>> models = store_.ListModels();  // Oldest first.
  if (!models.ok()) return out;
  for (auto it = models->rbegin(); it != models->rend() && accepting(); ++it) {
    if (CurrentSolution(it->id).empty()) continue;
    if (EstimatedCachedBytes(*it) > cache_.budget() - cache_.bytes()) {
      ++out.skipped;
      continue;
    }
    if (GetPlan(it->id, "").ok()) {
      ++out.models;
    } else {
      ++out.failed;
    }
  }
  return out;
}

Result<std::shared_ptr<const Model>> PlanningService::LoadModel(const std::string& model_id) {
  if (auto model = cache_.GetModel(model_id)) return model;
  // Concurrent misses share one read and compilation (single_flight.h).
  return model_loads_.Do(model_id, [&]() -> Result<std::shared_ptr<const Model>> {
    Result<ModelRecord> record = store_.GetModel(model_id, true);
    if (!record.ok()) return record.status();
    Result<Model> compiled =
        CompileStoredModel(model_id, std::move(record->document), options_.limits);
    if (!compiled.ok()) return compiled.status();
    auto model = std::make_shared<const Model>(std::move(*compiled));
    cache_.PutModel(model_id, model);
    return model;
  });
}

Result<std::shared_ptr<const Solution>> PlanningService::LoadSolution(
    const std::string& solution_id, const Model& model) {
  if (auto solution = cache_.GetSolution(solution_id)) return solution;
  return solution_loads_.Do(solution_id, [&]() -> Result<std::shared_ptr<const Solution>> {
    Result<SolutionRecord> record = store_.GetSolution(solution_id, true);
    if (!record.ok()) return record.status();
    Result<Solution> decoded =
        DecodeSolutionBlob(record->data, model.num_states(), model.num_rows());
    if (!decoded.ok()) return decoded.status();
    auto solution = std::make_shared<const Solution>(std::move(*decoded));
    cache_.PutSolution(solution_id, solution);
    return solution;
  });
}

Result<Plan> PlanningService::GetPlan(const std::string& model_id,
                                      const std::string& solution_id) {
  Plan plan;
  plan.model_id = model_id;
  plan.solution_id = solution_id.empty() ? CurrentSolution(model_id) : solution_id;
  if (plan.solution_id.empty()) {
    Result<ModelRecord> exists = store_.GetModel(model_id, false);
    if (!exists.ok()) return exists.status();
    return FailedPreconditionError("model " + model_id +
                                   " has no solution yet; start a solve job first");
  }
  Result<std::shared_ptr<const Model>> model = LoadModel(model_id);
  if (!model.ok()) return model.status();
  if (!solution_id.empty()) {
    Result<SolutionRecord> record = store_.GetSolution(solution_id, false);
    if (!record.ok() || record->model_id != model_id) {
      return NotFoundError("model " + model_id + " has no solution " + solution_id);
    }
  }
  Result<std::shared_ptr<const Solution>> solution = LoadSolution(plan.solution_id, **model);
  if (!solution.ok()) return solution.status();
  plan.model = std::move(*model);
  plan.solution = std::move(*solution);
  return plan;
}

Result<std::vector<SolutionRecord>> PlanningService::ListSolutions(const std::string& model_id) {
  Result<ModelRecord> exists = store_.GetModel(model_id, false);
  if (!exists.ok()) return exists.status();
  return store_.ListSolutions(model_id);
}

Result<SolutionRecord> PlanningService::GetSolutionRecord(const std::string& model_id,
                                                          const std::string& solution_id) {
  Result<SolutionRecord> record = store_.GetSolution(solution_id, false);
  if (!record.ok() || record->model_id != model_id) {
    return NotFoundError("model " + model_id + " has no solution " + solution_id);
  }
  return record;
}

Result<ComparisonReport> PlanningService::Compare(const std::string& model_a,
                                                 const std::string& solution_a,
                                                 const std::string& model_b,
                                                 const std::string& solution_b) {
  Result<Plan> a = GetPlan(model_a, solution_a);
  if (!a.ok()) return a.status();
  Result<Plan> b = GetPlan(model_b, solution_b);
  if (!b.ok()) return b.status();
  return CompareSolutions(*a->model, *a->solution, *b->model, *b->solution, CompareOptions{});
}

Result<VerifyStart> PlanningService::Verify(const std::string& model_id, std::string_view body) {
  Result<std::shared_ptr<const Model>> loaded = LoadModel(model_id);
  if (!loaded.ok()) return loaded.status();
  if ((*loaded)->num_rows() <= options_.sync_verify_max_rows) return VerifyNow(model_id, body);
  Result<VerifyRequest> request = DecodeVerifyRequest(body);
  if (!request.ok()) return request.status();
  if (!accepting()) return Status(StatusCode::kUnavailable, "the service is shutting down");
  auto job = NewQueuedJob("verify", model_id, std::string(body));
  std::lock_guard<std::mutex> lock(mu_);
  MDP_RETURN_IF_ERROR(Enqueue(job));
  VerifyStart out;
  out.job = ViewOf(*job);
  return out;
}

Result<VerifyStart> PlanningService::VerifyNow(const std::string& model_id,
                                               std::string_view body) {
  Result<VerifyRequest> request = DecodeVerifyRequest(body);
  if (!request.ok()) return request.status();
  Result<std::shared_ptr<const Model>> loaded = LoadModel(model_id);
  if (!loaded.ok()) return loaded.status();
  const Model& m = **loaded;
  VerifyStart out;
  VerifyOptions verify;
  verify.tolerance = request->tolerance;
  verify.worst_k = request->worst;
  if (request->kind == "values") {
    Decoded<std::vector<double>> values = DecodeValues(m, body);
    if (!values.ok()) {
      out.errors = std::move(values.errors);
      return out;
    }
    // Under total reward and a finite horizon the candidate is measured against a solution
    // (its goal-reaching states, its exact stage-0 values); see solver/verify.h.
    const CriterionKind kind = m.criterion().kind;
    Result<ValuesReport> report = ValuesReport{};
    if (kind == CriterionKind::kTotal || kind == CriterionKind::kFiniteHorizon) {
      Result<Plan> plan = GetPlan(model_id, request->solution_id);
      if (!plan.ok()) return plan.status();
      report = VerifyValues(m, values.value, *plan->solution, verify);
    } else {
      report = VerifyValues(m, values.value, verify);
    }
    if (!report.ok()) return report.status();
    out.passed = report->pass;
    out.report_json = DumpJson(EncodeValuesReport(m, *report));
    return out;
  }
  Decoded<Policy> policy = DecodePolicy(m, body);
  if (!policy.ok()) {
    out.errors = std::move(policy.errors);
    return out;
  }
  Result<Plan> plan = GetPlan(model_id, request->solution_id);
  if (!plan.ok()) return plan.status();
  Result<PolicyReport> report = VerifyPolicy(m, policy.value, *plan->solution, verify);
  if (!report.ok()) return report.status();
  out.passed = report->pass;
  out.report_json = DumpJson(EncodePolicyReport(m, *report));
  return out;
}


}  // namespace mdp::server
