// What one robot's planner keeps between plans: the warm start for the next plan (the last
// plan's distribution, shifted), the plan count that seeds each plan, and the latencies of the
// last kRing plans with the deadline misses. Not thread-safe: the robot runtime holds it under
// its mutex.
#ifndef FORAY_SERVER_ROBOT_PLAN_STATE_H_
#define FORAY_SERVER_ROBOT_PLAN_STATE_H_

#include <algorithm>
#include <cstddef>
#include <cstdint>
#include <optional>
#include <vector>

#include "core/plan/cem.h"

namespace foray::robot {

class PlanState {
 public:
  static constexpr size_t kRing = 1000;

  // Counts a plan that starts now; returns its number (1 for the first).
  uint64_t Start() { return ++plans_; }
  uint64_t plans() const { return plans_; }

  const std::optional<plan::CemWarmStart>& warm_start() const { return warm_start_; }
  void set_warm_start(plan::CemWarmStart warm) { warm_start_ = std::move(warm); }
  void ForgetWarmStart() { warm_start_.reset(); }

  // Records a finished plan's latency and whether it missed its deadline.
  void Finish(double compute_ms, bool missed) {
    if (latencies_ms_.size() < kRing) {
      latencies_ms_.push_back(compute_ms);
    } else {
      latencies_ms_[plans_ % kRing] = compute_ms;
    }
    deadline_misses_ += missed ? 1 : 0;
  }
  uint64_t deadline_misses() const { return deadline_misses_; }

  struct Latency {
    double p50_ms = 0, p90_ms = 0, p99_ms = 0;  // 0 before the first plan
  };
  Latency Percentiles() const {
    Latency out;
    if (latencies_ms_.empty()) return out;
    std::vector<double> sorted = latencies_ms_;
    std::sort(sorted.begin(), sorted.end());
    auto at = [&](double q) { return sorted[static_cast<size_t>(q * (sorted.size() - 1) + 0.5)]; };
    out.p50_ms = at(0.5);
    out.p90_ms = at(0.9);
    out.p99_ms = at(0.99);
    return out;
  }

 private:
  uint64_t plans_ = 0;
  std::optional<plan::CemWarmStart> warm_start_;
  std::vector<double> latencies_ms_;  // ring of the last kRing
  uint64_t deadline_misses_ = 0;
};

}  // namespace foray::robot

#endif  // FORAY_SERVER_ROBOT_PLAN_STATE_H_
