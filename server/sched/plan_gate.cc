#include "server/sched/plan_gate.h"

#include <algorithm>

#include "absl/strings/str_format.h"

namespace foray::sched {

PlanGate::PlanGate(int slots, int max_waiting)
    : slots_(std::max(1, slots)), max_waiting_(std::max(0, max_waiting)) {}

PlanGate::Ticket::~Ticket() {
  if (gate_ != nullptr) gate_->Release(held_);
}

int PlanGate::Ticket::Borrow(int want) {
  absl::MutexLock lock(&gate_->mu_);
  const int got = std::max(0, std::min(want, gate_->slots_ - gate_->busy_));
  gate_->busy_ += got;
  held_ += got;
  return got;
}

absl::StatusOr<PlanGate::Ticket> PlanGate::Enter(absl::Time deadline) {
  absl::MutexLock lock(&mu_);
  if (busy_ >= slots_) {
    if (waiting_ >= max_waiting_) {
      return absl::ResourceExhaustedError(absl::StrFormat(
          "the planner is busy: %d of %d cores planning and %d plans waiting; retry later", busy_,
          slots_, waiting_));
    }
    ++waiting_;
    auto free = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) { return busy_ < slots_; };
    const bool admitted = mu_.AwaitWithDeadline(absl::Condition(&free), deadline);
    --waiting_;
    if (!admitted) {
      return absl::ResourceExhaustedError(absl::StrFormat(
          "the planner is busy: no core freed up before the plan's deadline (%d of %d cores "
          "planning)",
          busy_, slots_));
    }
  }
  ++busy_;
  return Ticket(this);
}

int PlanGate::busy() const {
  absl::MutexLock lock(&mu_);
  return busy_;
}

int PlanGate::waiting() const {
  absl::MutexLock lock(&mu_);
  return waiting_;
}

void PlanGate::WaitForIdleCore(absl::Duration limit) const {
  absl::MutexLock lock(&mu_);
  auto idle = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) { return busy_ < slots_; };
  mu_.AwaitWithTimeout(absl::Condition(&idle), limit);
}

void PlanGate::Release(int count) {
  absl::MutexLock lock(&mu_);
  busy_ -= count;
}

}  // namespace foray::sched
