// MemoryStore: the Store in maps under one mutex, for tests. It keeps the SQLite store's
// semantics exactly (see sqlite_store.cc): an insertion sequence orders the listings, a
// replaced solution lists as the newest, an updated job keeps its place, deleting a model
// deletes its solutions and jobs.
#include <algorithm>
#include <cstdint>
#include <map>
#include <memory>
#include <mutex>
#include <new>
#include <optional>
#include <string>
#include <string_view>
#include <utility>
#include <vector>

#include "server/store.h"

namespace mdp::server {
namespace {

// Runs `body`, turning a failed allocation (copying a document or blob of hundreds of MB)
// into kResourceExhausted so that no exception leaves the store.
template <typename Body>
auto NoThrow(std::string_view operation, Body&& body) -> decltype(body()) {
  try {
    return body();
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("store: " + std::string(operation) + ": out of memory");
  }
}

// A stored record: its insertion sequence, its small fields, and its big one (document or
// data) apart, so that listings never copy the big one.
template <typename Record>
struct Entry {
  int64_t seq = 0;
  Record record;  // With the big field empty.
  std::string blob;
};

class MemoryStore final : public Store {
 public:
  explicit MemoryStore(int64_t max_value_bytes) : max_value_bytes_(max_value_bytes) {}

  int64_t MaxValueBytes() override { return max_value_bytes_; }
  Status PutModel(const ModelRecord& model, bool* created) override;
  Result<ModelRecord> GetModel(const std::string& id, bool with_document) override;
  Result<std::vector<ModelRecord>> ListModels() override;
  Status DeleteModel(const std::string& id) override;
  Status PutSolution(const SolutionRecord& solution) override;
  Result<SolutionRecord> GetSolution(const std::string& id, bool with_data) override;
  Result<std::vector<SolutionRecord>> ListSolutions(const std::string& model_id) override;
  Status PutJob(const JobRecord& job) override;
  Result<JobRecord> GetJob(const std::string& id) override;
  Result<std::vector<JobRecord>> ListJobs(const std::string& model_id,
                                          std::optional<JobStatus> status, int64_t limit) override;

 private:
  // REQUIRES mu_ held.
  Status RequireModel(const std::string& model_id, std::string_view operation) const;
  // kResourceExhausted iff `blob` is over max_value_bytes_.
  Status CheckSize(std::string_view blob, std::string_view operation) const;

  const int64_t max_value_bytes_;

  mutable std::mutex mu_;
  int64_t next_seq_ = 1;                                    // GUARDED_BY(mu_).
  std::map<std::string, Entry<ModelRecord>> models_;        // GUARDED_BY(mu_).
  std::map<std::string, Entry<SolutionRecord>> solutions_;  // GUARDED_BY(mu_).
  std::map<std::string, Entry<JobRecord>> jobs_;            // GUARDED_BY(mu_). Blob unused.
};

// Pointers to the entries of `map` that pass `keep`, in ascending `seq`, or descending if
// `newest_first`.
template <typename Record, typename Keep>
std::vector<const Entry<Record>*> Ordered(const std::map<std::string, Entry<Record>>& map,
                                          bool newest_first, Keep&& keep) {
  std::vector<const Entry<Record>*> entries;
  for (const auto& [id, entry] : map) {
    if (keep(entry.record)) entries.push_back(&entry);
  }
  std::sort(entries.begin(), entries.end(), [newest_first](const auto* a, const auto* b) {
    return newest_first ? a->seq > b->seq : a->seq < b->seq;
  });
  return entries;
}

Status MemoryStore::RequireModel(const std::string& model_id, std::string_view operation) const {
  if (models_.count(model_id) != 0) return Status::Ok();
  return FailedPreconditionError("store: " + std::string(operation) + ": model " + model_id +
                                 " is not stored");
}

Status MemoryStore::CheckSize(std::string_view blob, std::string_view operation) const {
  if (static_cast<int64_t>(blob.size()) <= max_value_bytes_) return Status::Ok();
  return ResourceExhaustedError("store: " + std::string(operation) + ": " +
                                std::to_string(blob.size()) + " bytes is over the store's limit of " +
                                std::to_string(max_value_bytes_));
}

Status MemoryStore::PutModel(const ModelRecord& model, bool* created) {
  MDP_RETURN_IF_ERROR(CheckSize(model.document, "put model " + model.id));
  return NoThrow("put model " + model.id, [&]() -> Status {
    std::lock_guard<std::mutex> lock(mu_);
    *created = models_.count(model.id) == 0;
    if (!*created) return Status::Ok();
    Entry<ModelRecord> entry{next_seq_++, model, {}};
    entry.blob.swap(entry.record.document);
    models_.emplace(model.id, std::move(entry));
    return Status::Ok();
  });
}

Result<ModelRecord> MemoryStore::GetModel(const std::string& id, bool with_document) {
  return NoThrow("get model " + id, [&]() -> Result<ModelRecord> {
    std::lock_guard<std::mutex> lock(mu_);
    auto it = models_.find(id);
    if (it == models_.end()) return NotFoundError("store: model " + id + " not found");
    ModelRecord model = it->second.record;
    if (with_document) model.document = it->second.blob;
    return model;
  });
}

Result<std::vector<ModelRecord>> MemoryStore::ListModels() {
  std::lock_guard<std::mutex> lock(mu_);
  std::vector<ModelRecord> models;
  for (const auto* entry : Ordered(models_, false, [](const auto&) { return true; })) {
    models.push_back(entry->record);
  }
  return models;
}

Status MemoryStore::DeleteModel(const std::string& id) {
  std::lock_guard<std::mutex> lock(mu_);
  if (models_.erase(id) == 0) return NotFoundError("store: model " + id + " not found");
  std::erase_if(solutions_, [&](const auto& item) { return item.second.record.model_id == id; });
  std::erase_if(jobs_, [&](const auto& item) { return item.second.record.model_id == id; });
  return Status::Ok();
}

Status MemoryStore::PutSolution(const SolutionRecord& solution) {
  const std::string operation = "put solution " + solution.id;
  MDP_RETURN_IF_ERROR(CheckSize(solution.data, operation));
  return NoThrow(operation, [&]() -> Status {
    std::lock_guard<std::mutex> lock(mu_);
    MDP_RETURN_IF_ERROR(RequireModel(solution.model_id, operation));
    // A replaced solution takes a new sequence number: it lists as the newest.
    Entry<SolutionRecord> entry{next_seq_++, solution, {}};
    entry.blob.swap(entry.record.data);
    solutions_.insert_or_assign(solution.id, std::move(entry));
    return Status::Ok();
  });
}

Result<SolutionRecord> MemoryStore::GetSolution(const std::string& id, bool with_data) {
  return NoThrow("get solution " + id, [&]() -> Result<SolutionRecord> {
    std::lock_guard<std::mutex> lock(mu_);
    auto it = solutions_.find(id);
    if (it == solutions_.end()) return NotFoundError("store: solution " + id + " not found");
    SolutionRecord solution = it->second.record;
    if (with_data) solution.data = it->second.blob;
    return solution;
  });
}

Result<std::vector<SolutionRecord>> MemoryStore::ListSolutions(const std::string& model_id) {
  std::lock_guard<std::mutex> lock(mu_);
  std::vector<SolutionRecord> solutions;
  for (const auto* entry : Ordered(solutions_, true, [&](const SolutionRecord& solution) {
         return solution.model_id == model_id;
       })) {
    solutions.push_back(entry->record);
  }
  return solutions;
}

Status MemoryStore::PutJob(const JobRecord& job) {
  std::lock_guard<std::mutex> lock(mu_);
  MDP_RETURN_IF_ERROR(RequireModel(job.model_id, "put job " + job.id));
  // An update keeps the job's sequence number: its place is its submission.
  auto it = jobs_.find(job.id);
  if (it != jobs_.end()) {
    it->second.record = job;
  } else {
    jobs_.emplace(job.id, Entry<JobRecord>{next_seq_++, job, {}});
  }
  return Status::Ok();
}

Result<JobRecord> MemoryStore::GetJob(const std::string& id) {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = jobs_.find(id);
  if (it == jobs_.end()) return NotFoundError("store: job " + id + " not found");
  return it->second.record;
}

Result<std::vector<JobRecord>> MemoryStore::ListJobs(const std::string& model_id,
                                                     std::optional<JobStatus> status,
                                                     int64_t limit) {
  if (limit < 0) {
    return InvalidArgumentError("store: list jobs: limit " + std::to_string(limit) +
                                " is negative");
  }
  std::lock_guard<std::mutex> lock(mu_);
  std::vector<JobRecord> jobs;
  for (const auto* entry : Ordered(jobs_, true, [&](const JobRecord& job) {
         return (model_id.empty() || job.model_id == model_id) &&
                (!status || job.status == *status);
       })) {
    if (static_cast<int64_t>(jobs.size()) == limit) break;
    jobs.push_back(entry->record);
  }
  return jobs;
}

}  // namespace

std::unique_ptr<Store> NewMemoryStore(int64_t max_value_bytes) {
  return std::make_unique<MemoryStore>(max_value_bytes);
}

}  // namespace mdp::server
