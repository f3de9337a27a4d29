// Runs a robot's plan on the planner machine's cores: the robot's plan rate limit, a core from
// the plan gate before the plan's deadline, the idle cores it may borrow to split its rollouts,
// and the count of the robot's plans waiting for a core. The deadline is one absolute time from
// the rpc's arrival to the planner: time spent waiting for a core is the plan's own.
// Thread-safe.
//
//   PlanScheduler scheduler(&gate, &helpers, /*plans_per_s=*/20);
//   input.deadline = arrived + absl::Milliseconds(100);
//   FORAY_ASSIGN_OR_RETURN(robot::PlanOutcome plan, scheduler.Plan(runtime, std::move(input)));
#ifndef FORAY_SERVER_SCHED_PLAN_SCHEDULER_H_
#define FORAY_SERVER_SCHED_PLAN_SCHEDULER_H_

#include "absl/status/statusor.h"
#include "absl/time/time.h"
#include "server/robot/runtime.h"
#include "server/sched/helper_pool.h"
#include "server/sched/plan_gate.h"
#include "server/sched/rate_limit.h"

namespace foray::sched {

class PlanScheduler {
 public:
  // `gate` and `helpers` (may be null: plans then run on their rpc's thread alone) must outlive
  // the scheduler. plans_per_s: each robot's limit (0: none),
  // with two seconds' worth of burst.
  PlanScheduler(PlanGate* gate, HelperPool* helpers, double plans_per_s);
  PlanScheduler(const PlanScheduler&) = delete;
  PlanScheduler& operator=(const PlanScheduler&) = delete;

  // Plans for `runtime` once admitted: ResourceExhausted, naming the limit, when the robot asks
  // for more plans per second than allowed, when the gate's waiting room is full, or when no
  // core frees up before input.deadline. input.context's threads are set here.
  absl::StatusOr<robot::PlanOutcome> Plan(robot::RobotRuntime& runtime, robot::PlanInput input);

  const PlanGate& gate() const { return *gate_; }

 private:
  PlanGate* const gate_;
  HelperPool* const helpers_;
  RateLimit plan_limit_;
};

}  // namespace foray::sched

#endif  // FORAY_SERVER_SCHED_PLAN_SCHEDULER_H_
