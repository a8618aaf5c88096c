// Store: where the service keeps models, solutions and job records so they survive a restart
// (and a kill -9). Implementations: SqliteStore (default; WAL mode, one transaction per
// change) and MemoryStore (tests). All methods are thread-safe; every call is one atomic
// change. Records are plain values; the caller owns what is returned.
// The model record format is described in model_store_codec.h, the solution blob format in
// solution_blob.h; the store keeps both as opaque bytes.
#ifndef MDP_SERVER_STORE_H_
#define MDP_SERVER_STORE_H_

#include <cstdint>
#include <limits>
#include <memory>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "solver/status.h"

namespace mdp::server {

struct ModelRecord {
  std::string id;            // Content hash of the canonical document.
  std::string name;
  int64_t states = 0;
  int64_t actions = 0;
  int64_t state_actions = 0;
  int64_t outcomes = 0;
  std::string warnings_json;  // JSON array of {pointer, message}.
  std::string created_at;     // RFC 3339 UTC.
  // The stored model: the binary form of model_store_codec.h, or in records written before
  // it, the canonical model document (JSON text). Empty in listings.
  std::string document;
};

struct SolutionRecord {
  std::string id;         // Hash of model id + canonical options.
  std::string model_id;
  std::string options_json;  // Canonical solve options.
  std::string report_json;   // The solution summary (no per-state tables).
  std::string created_at;
  std::string data;          // Solution blob (solution_blob.h); empty in listings.
};

enum class JobStatus { kQueued, kRunning, kSucceeded, kFailed, kCancelled };

struct JobRecord {
  std::string id;
  std::string kind;          // "solve" or "verify".
  std::string model_id;
  std::string request_json;  // The job's options / candidate, as submitted (canonical).
  JobStatus status = JobStatus::kQueued;
  std::string created_at, started_at, finished_at;  // RFC 3339 UTC; empty if not yet.
  std::string solution_id;   // Set when a solve succeeded.
  std::string result_json;   // Verify jobs: the report. Empty otherwise.
  std::string error;         // Plain words when failed or cancelled.
};

class Store {
 public:
  virtual ~Store() = default;

  // The largest model document or solution blob the store accepts, in bytes. PutModel and
  // PutSolution refuse a larger one with kResourceExhausted.
  virtual int64_t MaxValueBytes() = 0;

  // Inserts the model unless one with the same id exists. Sets *created to whether it was
  // inserted. Models are immutable: an existing record is left as it is.
  virtual Status PutModel(const ModelRecord& model, bool* created) = 0;
  // kNotFound if absent. `with_document` false leaves `document` empty.
  virtual Result<ModelRecord> GetModel(const std::string& id, bool with_document) = 0;
  // All models without documents, oldest first.
  virtual Result<std::vector<ModelRecord>> ListModels() = 0;
  // Deletes the model, its solutions and its jobs. kNotFound if absent.
  virtual Status DeleteModel(const std::string& id) = 0;

  // Inserts or replaces a solution; a replaced one lists as the newest.
  // kFailedPrecondition if `solution.model_id` names no stored model.
  virtual Status PutSolution(const SolutionRecord& solution) = 0;
  // kNotFound if absent. `with_data` false leaves `data` empty.
  virtual Result<SolutionRecord> GetSolution(const std::string& id, bool with_data) = 0;
  // Solutions of a model without data, newest first.
  virtual Result<std::vector<SolutionRecord>> ListSolutions(const std::string& model_id) = 0;

  // Inserts or replaces a job record (jobs change state; each write is the whole record).
  // An update keeps the job's place in listings. kFailedPrecondition if `job.model_id` names
  // no stored model (e.g. it was deleted while the job ran).
  virtual Status PutJob(const JobRecord& job) = 0;
  virtual Result<JobRecord> GetJob(const std::string& id) = 0;
  // Jobs, newest first; empty filters match all. At most `limit` records;
  // kInvalidArgument if `limit` is negative.
  virtual Result<std::vector<JobRecord>> ListJobs(const std::string& model_id,
                                                  std::optional<JobStatus> status,
                                                  int64_t limit) = 0;
};

// Opens (creating if needed) the SQLite store in `directory` (created if missing).
// `max_value_bytes` > 0 lowers the largest value it keeps (MaxValueBytes) to that.
Result<std::unique_ptr<Store>> OpenSqliteStore(const std::string& directory,
                                               int64_t max_value_bytes = 0);
// A store that lives in memory only; for tests. It refuses documents and blobs over
// `max_value_bytes` (by default no limit but memory).
std::unique_ptr<Store> NewMemoryStore(
    int64_t max_value_bytes = std::numeric_limits<int64_t>::max());

std::string_view JobStatusName(JobStatus status);  // "queued", "running", ...
std::optional<JobStatus> ParseJobStatus(std::string_view name);

}  // namespace mdp::server

#endif  // MDP_SERVER_STORE_H_
