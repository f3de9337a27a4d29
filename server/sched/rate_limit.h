// Per-robot rate limits: a token bucket per key that refills at `rate` units per second up to
// `burst` units. A request is admitted while its bucket is not in debt and then takes all it
// needs, even into debt, so a batch larger than the burst still passes on a full bucket and the
// average rate holds. A rate of 0 turns the limit off. Thread-safe.

#ifndef FORAY_SERVER_SCHED_RATE_LIMIT_H_
#define FORAY_SERVER_SCHED_RATE_LIMIT_H_

#include <string>

#include "absl/base/thread_annotations.h"
#include "absl/container/flat_hash_map.h"
#include "absl/synchronization/mutex.h"
#include "absl/time/time.h"

namespace foray::sched {

class RateLimit {
 public:
  // rate: units per second (0: no limit); burst: units a full bucket holds.
  RateLimit(double rate, double burst) : rate_(rate), burst_(burst) {}
  RateLimit(const RateLimit&) = delete;
  RateLimit& operator=(const RateLimit&) = delete;

  // Takes `units` from `key`'s bucket at `now`; false (nothing taken) while the bucket is in
  // debt from earlier requests.
  bool Take(const std::string& key, double units, absl::Time now);

  double rate() const { return rate_; }

 private:
  struct Bucket {
    double tokens = 0.0;
    absl::Time at;
  };
  const double rate_;
  const double burst_;
  absl::Mutex mu_;
  absl::flat_hash_map<std::string, Bucket> buckets_ ABSL_GUARDED_BY(mu_);
};

}  // namespace foray::sched

#endif  // FORAY_SERVER_SCHED_RATE_LIMIT_H_
