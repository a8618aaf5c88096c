#include "server/result_cache.h"

#include "server/solution_blob.h"

namespace mdp::server {

template <typename T>
std::shared_ptr<const T> ResultCache::Get(const std::string& key) {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = index_.find(key);
  if (it == index_.end()) {
    misses_.fetch_add(1, std::memory_order_relaxed);
    return nullptr;
  }
  lru_.splice(lru_.begin(), lru_, it->second);
  hits_.fetch_add(1, std::memory_order_relaxed);
  return std::get<std::shared_ptr<const T>>(it->second->value);
}

std::shared_ptr<const Model> ResultCache::GetModel(const std::string& model_id) {
  return Get<Model>("m/" + model_id);
}

std::shared_ptr<const Solution> ResultCache::GetSolution(const std::string& solution_id) {
  return Get<Solution>("s/" + solution_id);
}

void ResultCache::PutModel(const std::string& model_id, std::shared_ptr<const Model> model) {
  const int64_t bytes = model->ByteSize();
  Put("m/" + model_id, std::move(model), bytes);
}

void ResultCache::PutSolution(const std::string& solution_id,
                              std::shared_ptr<const Solution> solution) {
  const int64_t bytes = SolutionByteSize(*solution);
  Put("s/" + solution_id, std::move(solution), bytes);
}

void ResultCache::Put(const std::string& key, Value value, int64_t bytes) {
  std::lock_guard<std::mutex> lock(mu_);
  auto it = index_.find(key);
  if (it != index_.end()) {
    bytes_ -= it->second->bytes;
    lru_.erase(it->second);
    index_.erase(it);
  }
  if (bytes > budget_) return;
  while (bytes_ + bytes > budget_ && !lru_.empty()) {
    bytes_ -= lru_.back().bytes;
    index_.erase(lru_.back().key);
    lru_.pop_back();
    evictions_.fetch_add(1, std::memory_order_relaxed);
  }
  lru_.push_front(Entry{key, std::move(value), bytes});
  index_[key] = lru_.begin();
  bytes_ += bytes;
}

void ResultCache::Erase(const std::string& key) {
  std::lock_guard<std::mutex> lock(mu_);
  for (const std::string& k : {"m/" + key, "s/" + key}) {
    auto it = index_.find(k);
    if (it == index_.end()) continue;
    bytes_ -= it->second->bytes;
    lru_.erase(it->second);
    index_.erase(it);
  }
}

int64_t ResultCache::bytes() const {
  std::lock_guard<std::mutex> lock(mu_);
  return bytes_;
}

std::vector<ResultCache::EntryBytes> ResultCache::EntrySizes() const {
  std::lock_guard<std::mutex> lock(mu_);
  std::vector<EntryBytes> out;
  out.reserve(lru_.size());
  for (const Entry& e : lru_) out.push_back({e.key.rfind("m/", 0) == 0, e.key.substr(2), e.bytes});
  return out;
}

int64_t ResultCache::entries() const {
  std::lock_guard<std::mutex> lock(mu_);
  return static_cast<int64_t>(lru_.size());
}

}  // namespace mdp::server
