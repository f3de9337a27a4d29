#include "server/sched/plan_scheduler.h"

#include <algorithm>
#include <utility>

#include "absl/strings/str_format.h"

namespace foray::sched {

PlanScheduler::PlanScheduler(PlanGate* gate, HelperPool* helpers, double plans_per_s)
    : gate_(gate), helpers_(helpers), plan_limit_(plans_per_s, 2.0 * std::max(1.0, plans_per_s)) {}

absl::StatusOr<robot::PlanOutcome> PlanScheduler::Plan(robot::RobotRuntime& runtime,
                                                       robot::PlanInput input) {
  if (!plan_limit_.Take(runtime.robot_id(), 1.0, absl::Now())) {
    return absl::ResourceExhaustedError(absl::StrFormat(
        "robot \"%s\" asks for more than %g plans per second (forayd --robot_plans_per_s)",
        runtime.config().name, plan_limit_.rate()));
  }
  runtime.AddPlansWaiting(1);
  absl::StatusOr<PlanGate::Ticket> ticket = gate_->Enter(input.deadline);
  runtime.AddPlansWaiting(-1);
  if (!ticket.ok()) return ticket.status();
  // Idle cores join this plan: its rollouts are split over them (none without helpers to run
  // them, so that no core is held idle).
  const int threads = helpers_ != nullptr ? 1 + ticket->Borrow(gate_->slots() - 1) : 1;
  if (threads > 1) {
    input.context.tasks = threads;
    input.context.parallel = helpers_->ParallelFor();
  }
  return runtime.Plan(std::move(input));
}

}  // namespace foray::sched
