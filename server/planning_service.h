// PlanningService: the service layer behind the HTTP API, testable without HTTP. It accepts
// model documents (validated, stored under a content id), runs solve and verify jobs on a
// JobQueue, keeps solved tables in a ResultCache (reloading from the Store on a miss), and
// hands out Plans (a model and one of its solutions) that answer policy queries.
// Thread-safe: any number of threads may call any method concurrently. The Store must
// outlive the service.
#ifndef MDP_SERVER_PLANNING_SERVICE_H_
#define MDP_SERVER_PLANNING_SERVICE_H_

#include <atomic>
#include <cstdint>
#include <functional>
#include <map>
#include <memory>
#include <mutex>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "server/job_queue.h"
#include "server/model_codec.h"
#include "server/result_cache.h"
#include "server/single_flight.h"
#include "server/store.h"
#include "solver/solver.h"

namespace mdp::server {

struct ServiceOptions {
  int workers = 1;                         // Solve worker threads.
  int64_t queue_capacity = 64;             // Jobs waiting at most; more get kResourceExhausted.
  int64_t cache_bytes = int64_t{2} << 30;  // Byte budget of the model/solution cache.
  int solver_threads = 0;                  // Threads each solve uses for its sweeps; 0 = automatic.
  int worker_niceness = 0;  // Added to the workers' nice value (JobQueue), 0 to 19.
  int64_t sync_verify_max_rows = 200'000;  // Larger models verify as a job.
  DecodeLimits limits;                     // Caps on uploaded documents.
  // Called when a job ends, with its final record and the seconds it ran (0 for a job
  // cancelled while queued), before the end shows in its view; for metrics. Not called for a
  // job stopped by shutdown, which is queued again. Must be quick and thread-safe.
  std::function<void(const JobRecord&, double)> on_job_finished;
  // Called whenever a job record changes state (queued, running, finished); for logs.
  std::function<void(const JobRecord&)> on_job_event;
};

struct UploadResult {
  bool created = false;                // False if the same model was already stored.
  ModelRecord record;                  // Without the document.
  std::vector<DocumentIssue> errors;   // Non-empty: the document is not a valid model.
  int64_t errors_not_listed = 0;
  bool malformed = false;              // With errors: the body is not JSON at all.
  std::vector<DocumentIssue> warnings;
  // Non-empty: the model is valid but its stored form is over the store's size limit; says
  // by how much. Nothing was stored.
  std::string too_large;
};

// A job as seen by callers: the record plus live progress while it runs.
struct JobView {
  JobRecord record;
  std::optional<Progress> progress;  // Set while running (and after, if it ran).
  std::string phase;                 // Copy of progress->phase (the view outlives it).
};

// The answer to "solve this": a new or already running job, or an existing solution.
struct SolveStart {
  std::optional<JobView> job;      // Set unless the solution already existed.
  std::string cached_solution_id;  // Set iff the same model and options were solved before.
};

// What answers queries: a model and one solution of it. Both are shared and immutable.
struct Plan {
  std::string model_id;
  std::string solution_id;
  std::shared_ptr<const Model> model;
  std::shared_ptr<const Solution> solution;
};

// A verification: finished (report JSON) or running as a job.
struct VerifyStart {
  std::string report_json;      // Set when verified synchronously.
  bool passed = false;          // With report_json.
  std::optional<JobView> job;   // Set when the model is large enough to verify as a job.
  std::vector<DocumentIssue> errors;  // Non-empty: the candidate is not valid for the model.
};

// A simulation request accepted as a job, or the errors that refuse it.
struct SimulateStart {
  std::optional<JobView> job;
  std::vector<DocumentIssue> errors;  // Non-empty: the request does not fit the model.
};

class PlanningService {
 public:
  PlanningService(Store& store, ServiceOptions options);
  ~PlanningService();  // Calls Shutdown(0).
  PlanningService(const PlanningService&) = delete;
  PlanningService& operator=(const PlanningService&) = delete;

  // Recovers after a restart: jobs that were running are marked failed (their process died
  // under them), queued ones are queued again; each model's newest solution becomes current.
  Status Start();

  struct WarmUpResult {
    int64_t models = 0;   // Loaded, each with its current solution.
    int64_t skipped = 0;  // Would not have fitted in what the cache budget had left.
    int64_t failed = 0;   // Could not be loaded (the query will say why).
  };
  // Loads the stored models that have a solution, with their current solutions, into the
  // cache, newest first, each only if its estimated size fits in what the budget has left
  // (nothing is evicted for it); stops once the service stops accepting. For a thread of its
  // own after Start() (serve.cc): a query of a model being loaded waits for that load
  // instead of starting another (single_flight.h), so the first queries after a restart do
  // not each wait for the store.
  WarmUpResult WarmUp();
  // Stops accepting work, lets running jobs finish for up to `deadline_seconds`, then cancels
  // them (they go back to queued, and run again at the next Start()). Idempotent.
  void Shutdown(double deadline_seconds);
  // Refuses new work (503) and reports not ready, without stopping running jobs: the first
  // step of a graceful stop, so load balancers can drain.
  void StopAccepting() { accepting_.store(false, std::memory_order_release); }
  bool accepting() const { return accepting_.load(std::memory_order_acquire); }

  // Models.
  Result<UploadResult> UploadModel(std::string_view document);
  // The same, taking the text over: it is freed as soon as it has been read, before the
  // model is validated, compiled and stored, so a large upload does not hold its text and
  // its compiled model at once.
  Result<UploadResult> UploadModelOwned(std::string&& document);
  // `with_document`: `document` is the canonical model text (canonical.h), whatever form
  // the store keeps it in; kInternal if the stored record is corrupt.
  Result<ModelRecord> GetModel(const std::string& id, bool with_document);
  // The canonical text of a model, for sending: `text` holds it whole for records stored as
  // text by earlier builds; otherwise `spec` is the decoded model, whose text
  // WriteCanonicalModelPieces (canonical.h) writes a piece at a time. kNotFound if absent,
  // kInternal if the stored record is corrupt.
  struct ModelDocument {
    std::string text;
    std::shared_ptr<const ModelSpec> spec;
  };
  Result<ModelDocument> GetModelDocument(const std::string& id);
  Result<std::vector<ModelRecord>> ListModels();
  Status DeleteModel(const std::string& id);

  // Solves. kResourceExhausted when the queue is full; kNotFound for an unknown model.
  Result<SolveStart> StartSolve(const std::string& model_id, const SolveOptions& options);
  Result<JobView> GetJob(const std::string& id);
  Result<std::vector<JobView>> ListJobs(const std::string& model_id,
                                        std::optional<JobStatus> status, int64_t limit);
  // kFailedPrecondition if the job already finished.
  Result<JobView> CancelJob(const std::string& id);

  // Solutions and queries. An empty solution_id means the model's current (newest)
  // solution; kFailedPrecondition if it has none yet.
  Result<Plan> GetPlan(const std::string& model_id, const std::string& solution_id);
  Result<std::vector<SolutionRecord>> ListSolutions(const std::string& model_id);
  Result<SolutionRecord> GetSolutionRecord(const std::string& model_id,
                                           const std::string& solution_id);

  // Compares two solutions (current ones when the ids are empty), e.g. of two revisions.
  Result<ComparisonReport> Compare(const std::string& model_a, const std::string& solution_a,
                                   const std::string& model_b, const std::string& solution_b);

  // Queues a Monte Carlo simulation job (api_codec.h DecodeSimulateRequest for the body);
  // its result is the simulation document. kFailedPrecondition if no policy is given and the
  // model has no solution yet.
  Result<SimulateStart> StartSimulation(const std::string& model_id, std::string_view body);

  // Verifies a candidate (a values or policy document, optionally with "tolerance").
  Result<VerifyStart> Verify(const std::string& model_id, std::string_view body);

  // Gauges for /metrics: the jobs whose views say queued or running now, so that the gauges
  // never disagree with GET /v1/jobs/{id} (a cancelled job may wait in the queue, or be
  // unwinding on its worker, after its view says cancelled).
  int64_t queued_jobs() const { return CountActiveJobs(JobStatus::kQueued); }
  int64_t running_jobs() const { return CountActiveJobs(JobStatus::kRunning); }
  const ResultCache& cache() const { return cache_; }

 private:
  struct ActiveJob;

  int64_t CountActiveJobs(JobStatus status) const;
  // Forgets an ended (or re-queued) job: later views of it come from the store.
  void Retire(const ActiveJob& job);

  // UploadModel's work; `released` as for DecodeModel.
  Result<UploadResult> Upload(std::string_view document, const TextReleased& released);

  Result<std::shared_ptr<const Model>> LoadModel(const std::string& model_id);
  Result<std::shared_ptr<const Solution>> LoadSolution(const std::string& solution_id,
                                                       const Model& model);
  static std::shared_ptr<ActiveJob> NewQueuedJob(const std::string& kind,
                                                 const std::string& model_id,
                                                 std::string request_json);
  static ProgressFn ProgressInto(ActiveJob& job);  // Records progress in the job's view.
  Status Enqueue(std::shared_ptr<ActiveJob> job);
  void RunJob(const std::shared_ptr<ActiveJob>& job);
  Status RunSolve(ActiveJob& job);
  Status RunVerify(ActiveJob& job);
  Status RunSimulation(ActiveJob& job);
  Result<VerifyStart> VerifyNow(const std::string& model_id, std::string_view body);
  void Persist(ActiveJob& job);
  JobView ViewOf(ActiveJob& job);
  std::string CurrentSolution(const std::string& model_id);

  Store& store_;
  const ServiceOptions options_;
  ResultCache cache_;
  std::atomic<bool> accepting_{true};

  SingleFlight<std::shared_ptr<const Model>> model_loads_;
  SingleFlight<std::shared_ptr<const Solution>> solution_loads_;
  mutable std::mutex mu_;
  std::map<std::string, std::shared_ptr<ActiveJob>> active_;  // By job id. GUARDED_BY(mu_)
  std::map<std::string, std::string> active_by_solution_;     // Solution id -> job id.
  // Model id -> its current solution id. Its own lock: queries read it on the hot path and
  // must not wait behind job bookkeeping (which writes to the store under mu_).
  std::mutex current_mu_;
  std::map<std::string, std::string> current_solution_;  // GUARDED_BY(current_mu_)

  std::unique_ptr<JobQueue> queue_;  // Last: its workers use the members above.
};

// Canonical JSON of solve options (what a solution id is a hash of).
std::string CanonicalSolveOptions(const SolveOptions& options);
// The current time as RFC 3339 UTC with milliseconds.
std::string NowRfc3339();

}  // namespace mdp::server

#endif  // MDP_SERVER_PLANNING_SERVICE_H_
