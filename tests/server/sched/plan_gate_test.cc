// Plan admission: slots, a bounded wait, deadlines, borrowing idle cores.
#include "server/sched/plan_gate.h"

#include <thread>

#include "gtest/gtest.h"

namespace foray::sched {
namespace {

absl::Time Soon() { return absl::Now() + absl::Seconds(5); }

TEST(PlanGateTest, AdmitsOnePlanPerSlotAndRefusesBeyondTheWaitingRoom) {
  PlanGate gate(2, /*max_waiting=*/0);
  auto a = gate.Enter(Soon());
  auto b = gate.Enter(Soon());
  ASSERT_TRUE(a.ok() && b.ok());
  EXPECT_EQ(gate.busy(), 2);
  auto c = gate.Enter(Soon());
  EXPECT_EQ(c.status().code(), absl::StatusCode::kResourceExhausted);
  EXPECT_NE(c.status().message().find("2 of 2 cores planning and 0 plans waiting"), std::string::npos);
  { auto released = std::move(*a); }
  EXPECT_EQ(gate.busy(), 1);
  EXPECT_TRUE(gate.Enter(Soon()).ok());
}

TEST(PlanGateTest, AWaitingPlanGetsTheNextFreeSlot) {
  PlanGate gate(1, /*max_waiting=*/1);
  auto first = gate.Enter(Soon());
  ASSERT_TRUE(first.ok());
  // The first ticket is released only once the second plan is seen waiting (the queue depth
  // that /metrics reports), so the check does not depend on timing.
  int seen_waiting = 0;
  std::thread releaser([&gate, &seen_waiting, t = std::move(*first)]() mutable {
    for (int i = 0; i < 5000 && gate.waiting() == 0; ++i) absl::SleepFor(absl::Milliseconds(1));
    seen_waiting = gate.waiting();
    auto gone = std::move(t);
  });
  auto second = gate.Enter(Soon());
  releaser.join();
  EXPECT_TRUE(second.ok());
  EXPECT_EQ(seen_waiting, 1);
  EXPECT_EQ(gate.waiting(), 0);
}

TEST(PlanGateTest, NoPlanWaitsPastItsDeadline) {
  PlanGate gate(1, /*max_waiting=*/4);
  auto first = gate.Enter(Soon());
  ASSERT_TRUE(first.ok());
  auto late = gate.Enter(absl::Now() + absl::Milliseconds(30));
  EXPECT_EQ(late.status().code(), absl::StatusCode::kResourceExhausted);
  EXPECT_NE(late.status().message().find("before the plan's deadline"), std::string::npos);
}

TEST(PlanGateTest, BorrowTakesOnlyIdleSlotsAndGivesThemBack) {
  PlanGate gate(4, 0);
  auto other = gate.Enter(Soon());
  {
    auto mine = gate.Enter(Soon());
    ASSERT_TRUE(mine.ok());
    EXPECT_EQ(mine->Borrow(5), 2);
    EXPECT_EQ(gate.busy(), 4);
  }
  EXPECT_EQ(gate.busy(), 1);
}

}  // namespace
}  // namespace foray::sched
