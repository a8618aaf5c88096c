// Names of job states as they appear in the API and in the store.
#include "server/store.h"

namespace mdp::server {

std::string_view JobStatusName(JobStatus status) {
  switch (status) {
    case JobStatus::kQueued:
      return "queued";
    case JobStatus::kRunning:
      return "running";
    case JobStatus::kSucceeded:
      return "succeeded";
    case JobStatus::kFailed:
      return "failed";
    case JobStatus::kCancelled:
      return "cancelled";
  }
  return "unknown";
}

std::optional<JobStatus> ParseJobStatus(std::string_view name) {
  for (JobStatus status : {JobStatus::kQueued, JobStatus::kRunning, JobStatus::kSucceeded,
                           JobStatus::kFailed, JobStatus::kCancelled}) {
    if (JobStatusName(status) == name) return status;
  }
  return std::nullopt;
}

}  // namespace mdp::server
