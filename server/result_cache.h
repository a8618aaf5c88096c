// ResultCache: compiled models and solved tables held in memory under a byte budget, least
// recently used evicted first. Entries are shared_ptr<const T>, so an entry evicted while a
// query reads it stays alive until that query finishes. An entry larger than the whole
// budget is not kept. Thread-safe (one mutex; lookups are O(1)).
#ifndef MDP_SERVER_RESULT_CACHE_H_
#define MDP_SERVER_RESULT_CACHE_H_

#include <atomic>
#include <cstdint>
#include <list>
#include <memory>
#include <mutex>
#include <string>
#include <unordered_map>
#include <variant>
#include <vector>

#include "solver/model.h"
#include "solver/solution.h"

namespace mdp::server {

class ResultCache {
 public:
  explicit ResultCache(int64_t byte_budget) : budget_(byte_budget) {}

  // Null on a miss. Counts a hit or a miss.
  std::shared_ptr<const Model> GetModel(const std::string& model_id);
  std::shared_ptr<const Solution> GetSolution(const std::string& solution_id);
  void PutModel(const std::string& model_id, std::shared_ptr<const Model> model);
  void PutSolution(const std::string& solution_id, std::shared_ptr<const Solution> solution);
  void Erase(const std::string& key);

  int64_t hits() const { return hits_.load(std::memory_order_relaxed); }
  int64_t misses() const { return misses_.load(std::memory_order_relaxed); }
  int64_t evictions() const { return evictions_.load(std::memory_order_relaxed); }
  int64_t bytes() const;
  int64_t entries() const;

  // One line per cached entry, most recently used first: for /metrics.
  struct EntryBytes {
    bool model = false;  // A model; else a solution.
    std::string id;      // Model or solution id.
    int64_t bytes = 0;   // As accounted against the budget.
  };
  std::vector<EntryBytes> EntrySizes() const;
  int64_t budget() const { return budget_; }

 private:
  using Value = std::variant<std::shared_ptr<const Model>, std::shared_ptr<const Solution>>;
  struct Entry {
    std::string key;
    Value value;
    int64_t bytes;
  };

  // Key prefixes keep model and solution ids apart.
  template <typename T>
  std::shared_ptr<const T> Get(const std::string& key);
  void Put(const std::string& key, Value value, int64_t bytes);

  const int64_t budget_;
  mutable std::mutex mu_;
  std::list<Entry> lru_;  // Front = most recently used. GUARDED_BY(mu_)
  std::unordered_map<std::string, std::list<Entry>::iterator> index_;  // GUARDED_BY(mu_)
  int64_t bytes_ = 0;  // GUARDED_BY(mu_)
  std::atomic<int64_t> hits_{0}, misses_{0}, evictions_{0};
};

}  // namespace mdp::server

#endif  // MDP_SERVER_RESULT_CACHE_H_
