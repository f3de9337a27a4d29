// The background trainer: one thread that visits the robots in turn (round robin, so that no
// robot starves another) and runs a training round for each whose policy asks for one. Plans
// never wait for it: they run on the rpc threads with the published model version, and
// training steps aside between epochs while they need every core. While no plan computes, a
// minibatch step may also split its members over the helper pool (checked at every step, so
// that a plan that arrives gets its core back within one step).
// Thread-safe; Stop() joins the thread (a round in progress finishes first).
#ifndef FORAY_SERVER_SCHED_TRAINING_LOOP_H_
#define FORAY_SERVER_SCHED_TRAINING_LOOP_H_

#include <functional>
#include <memory>
#include <thread>
#include <vector>

#include "absl/base/thread_annotations.h"
#include "absl/synchronization/mutex.h"
#include "absl/time/time.h"
#include "core/util/parallel.h"
#include "server/robot/runtime.h"
#include "server/sched/helper_pool.h"
#include "server/sched/plan_gate.h"

namespace foray::sched {

// How a training step may split its members: over `helpers` (with the caller) while no plan
// holds a slot of `gate`, on the caller's thread alone otherwise or when `helpers` is null.
// Checked at every step, so a plan that arrives gets its core back within one step.
ParallelFor TrainingSplit(const PlanGate* gate, HelperPool* helpers);

class TrainingLoop {
 public:
  // `robots` lists the current runtimes; it is called on every pass.
  using RobotSource = std::function<std::vector<std::shared_ptr<robot::RobotRuntime>>()>;

  // Not copyable or movable (owns a thread). `gate` (may be null; must outlive the loop) is
  // the plans' admission: between epochs training waits while every core is planning (at most
  // `max_pause` per epoch, so that training still makes progress under constant load).
  // `helpers` (may be null; must outlive the loop) lends its threads to steps taken while no
  // plan holds a slot of `gate`.
  TrainingLoop(RobotSource robots, const PlanGate* gate, HelperPool* helpers = nullptr,
               absl::Duration idle_poll = absl::Milliseconds(50),
               absl::Duration max_pause = absl::Seconds(1));
  TrainingLoop(const TrainingLoop&) = delete;
  TrainingLoop& operator=(const TrainingLoop&) = delete;
  ~TrainingLoop();

  void Start();
  void Stop();

 private:
  void Run();

  const RobotSource robots_;
  const PlanGate* const gate_;
  const ParallelFor split_;  // TrainingSplit(gate_, helpers)
  const absl::Duration idle_poll_;
  const absl::Duration max_pause_;
  mutable absl::Mutex mu_;
  bool stopping_ ABSL_GUARDED_BY(mu_) = false;
  std::thread thread_;
};

}  // namespace foray::sched

#endif  // FORAY_SERVER_SCHED_TRAINING_LOOP_H_
