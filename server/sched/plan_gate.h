// Admission of plans to the planner machine's cores: at most `slots` plans compute at once
// (one per core), at most `max_waiting` more wait for a slot, and none waits past its own
// deadline. A plan that cannot be admitted gets ResourceExhausted at once rather than queueing
// forever. A running plan may borrow idle slots to split its rollouts over more cores.
// Thread-safe.
//
//   FORAY_ASSIGN_OR_RETURN(PlanGate::Ticket ticket, gate.Enter(deadline));
//   int threads = 1 + ticket.Borrow(gate.slots() - 1);   // idle cores this plan may use
#ifndef FORAY_SERVER_SCHED_PLAN_GATE_H_
#define FORAY_SERVER_SCHED_PLAN_GATE_H_

#include "absl/base/thread_annotations.h"
#include "absl/status/statusor.h"
#include "absl/synchronization/mutex.h"
#include "absl/time/time.h"

namespace foray::sched {

class PlanGate {
 public:
  // Holds one slot (plus any borrowed ones) until destroyed. Movable, not copyable.
  class Ticket {
   public:
    Ticket(Ticket&& other) noexcept : gate_(other.gate_), held_(other.held_) { other.gate_ = nullptr; }
    Ticket& operator=(Ticket&&) = delete;
    Ticket(const Ticket&) = delete;
    ~Ticket();
    // Takes up to `want` more slots that are idle now (never waits); returns how many.
    int Borrow(int want);

   private:
    friend class PlanGate;
    explicit Ticket(PlanGate* gate) : gate_(gate) {}
    PlanGate* gate_;
    int held_ = 1;
  };

  PlanGate(int slots, int max_waiting);
  PlanGate(const PlanGate&) = delete;
  PlanGate& operator=(const PlanGate&) = delete;

  // Waits for a slot until `deadline`. ResourceExhausted, with the figures, when max_waiting
  // plans are waiting already or no slot frees up before the deadline.
  absl::StatusOr<Ticket> Enter(absl::Time deadline);

  int slots() const { return slots_; }
  // Slots in use now.
  int busy() const;
  // Plans waiting for a slot now.
  int waiting() const;
  // Waits (at most `limit`) until fewer than all slots are busy; used by training between
  // epochs, so that plans go first.
  void WaitForIdleCore(absl::Duration limit) const;

 private:
  void Release(int count);

  const int slots_;
  const int max_waiting_;
  mutable absl::Mutex mu_;
  int busy_ ABSL_GUARDED_BY(mu_) = 0;
  int waiting_ ABSL_GUARDED_BY(mu_) = 0;
};

}  // namespace foray::sched

#endif  // FORAY_SERVER_SCHED_PLAN_GATE_H_
