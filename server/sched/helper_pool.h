// Threads that join a plan's rollouts when the plan gate lends it idle cores, and a training
// step while no plan computes (sched/training_loop.h). Started once and kept: a plan's
// optimiser hands out its rollouts once per iteration, and starting threads each time costs
// more than the split saves on a small plan (measured in tests/bench).
// Run(tasks, task) is the planner's ParallelFor: the caller and the pool's threads take task
// indices from a shared counter until none is left, so a Run never waits for a pool thread that
// is busy elsewhere (the caller does the work itself), and it returns when every task finished.
// Thread-safe: plans on several rpc threads may Run at once.
//
//   HelperPool pool(gate.slots() - 1);
//   context.parallel = pool.ParallelFor();
#ifndef FORAY_SERVER_SCHED_HELPER_POOL_H_
#define FORAY_SERVER_SCHED_HELPER_POOL_H_

#include <deque>
#include <functional>
#include <memory>
#include <thread>
#include <vector>

#include "absl/base/thread_annotations.h"
#include "absl/synchronization/mutex.h"
#include "core/util/parallel.h"

namespace foray::sched {

class HelperPool {
 public:
  // `threads` >= 0 helper threads (0: Run does everything on the caller's thread).
  explicit HelperPool(int threads);
  HelperPool(const HelperPool&) = delete;
  HelperPool& operator=(const HelperPool&) = delete;
  ~HelperPool();  // joins the threads; no Run may be in progress

  // Runs task(i) for every i in [0, tasks) on the caller and the pool; returns when all ran.
  void Run(int tasks, const std::function<void(int)>& task);

  // Run as a ParallelFor, for plan::PlanContext::parallel or a training step. The pool must
  // outlive it.
  ::foray::ParallelFor ParallelFor();

 private:
  struct Batch;
  void Work();
  // Runs tasks of `batch` until none is left to start; true when this call finished the last.
  static bool Drain(Batch* batch);

  absl::Mutex mu_;
  std::deque<std::shared_ptr<Batch>> queue_ ABSL_GUARDED_BY(mu_);
  bool stopping_ ABSL_GUARDED_BY(mu_) = false;
  std::vector<std::thread> threads_;
};

}  // namespace foray::sched

#endif  // FORAY_SERVER_SCHED_HELPER_POOL_H_
