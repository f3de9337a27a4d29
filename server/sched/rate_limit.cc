#include "server/sched/rate_limit.h"

#include <algorithm>

namespace foray::sched {

bool RateLimit::Take(const std::string& key, double units, absl::Time now) {
  if (rate_ <= 0.0) return true;
  absl::MutexLock lock(&mu_);
  auto [it, fresh] = buckets_.try_emplace(key);
  Bucket& b = it->second;
  if (fresh) {
    b.tokens = burst_;
  } else {
    b.tokens = std::min(burst_, b.tokens + rate_ * absl::ToDoubleSeconds(std::max(absl::ZeroDuration(), now - b.at)));
  }
  b.at = now;
  if (b.tokens <= 0.0) return false;
  b.tokens -= units;
  return true;
}

}  // namespace foray::sched
