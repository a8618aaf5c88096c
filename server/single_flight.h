// SingleFlight: at most one load per key at a time. The first caller for a key runs its
// load; callers for the same key that arrive meanwhile wait for that result instead of
// running their own. Used for models and solutions read from the store into the cache: after
// a restart, six concurrent queries of a cold 500,000-state model each decoded it (peak
// resident memory 1.40 GB against 0.76 GB for one). Results are shared, not kept: a call
// after the load has finished runs a new one (the cache is what keeps them). Thread-safe.
#ifndef MDP_SERVER_SINGLE_FLIGHT_H_
#define MDP_SERVER_SINGLE_FLIGHT_H_

#include <functional>
#include <future>
#include <map>
#include <mutex>
#include <new>
#include <string>
#include <utility>

#include "solver/status.h"

namespace mdp::server {

template <class T>
class SingleFlight {
 public:
  // Returns load()'s result, or that of the load already running for `key`.
  Result<T> Do(const std::string& key, const std::function<Result<T>()>& load) {
    std::promise<Result<T>> promise;
    std::shared_future<Result<T>> result;
    bool leader = false;
    {
      std::lock_guard<std::mutex> lock(mu_);
      auto it = running_.find(key);
      if (it != running_.end()) {
        result = it->second;
      } else {
        result = promise.get_future().share();
        running_.emplace(key, result);
        leader = true;
      }
    }
    if (!leader) return result.get();
    Result<T> loaded = Run(load);
    promise.set_value(loaded);
    std::lock_guard<std::mutex> lock(mu_);
    running_.erase(key);
    return loaded;
  }

 private:
  // load() must not throw; out of memory is the one exception it cannot rule out.
  static Result<T> Run(const std::function<Result<T>()>& load) {
    try {
      return load();
    } catch (const std::bad_alloc&) {
      return ResourceExhaustedError("out of memory while loading");
    }
  }

  std::mutex mu_;
  std::map<std::string, std::shared_future<Result<T>>> running_;  // GUARDED_BY(mu_)
};

}  // namespace mdp::server

#endif  // MDP_SERVER_SINGLE_FLIGHT_H_
