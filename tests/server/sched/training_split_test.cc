// The training step's split over threads: the helper pool joins while no plan computes, and a
// plan that holds a core keeps the step on the trainer's own thread.

#include <chrono>
#include <set>
#include <thread>
#include <vector>

#include "gtest/gtest.h"
#include "server/sched/helper_pool.h"
#include "server/sched/plan_gate.h"
#include "server/sched/training_loop.h"

namespace foray::sched {
namespace {

// Runs 6 tasks of 20 ms through `split`; the threads they ran on.
std::set<std::thread::id> ThreadsOfOneStep(const ParallelFor& split) {
  std::vector<std::thread::id> ran(6);
  split(static_cast<int>(ran.size()), [&ran](int i) {
    ran[i] = std::this_thread::get_id();
    std::this_thread::sleep_for(std::chrono::milliseconds(20));
  });
  return {ran.begin(), ran.end()};
}

TEST(TrainingSplitTest, UsesThePoolOnlyWhileNoPlanComputes) {
  PlanGate gate(/*slots=*/2, /*max_waiting=*/4);
  HelperPool helpers(gate.slots() - 1);
  const ParallelFor split = TrainingSplit(&gate, &helpers);

  // Idle: the helper wakes well within the 120 ms of the step and takes tasks of its own.
  EXPECT_EQ(ThreadsOfOneStep(split).size(), 2u);

  // A plan holds a slot: the step stays on the caller's thread.
  auto ticket = gate.Enter(absl::Now() + absl::Seconds(1));
  ASSERT_TRUE(ticket.ok());
  const std::set<std::thread::id> busy = ThreadsOfOneStep(split);
  EXPECT_EQ(busy, std::set<std::thread::id>{std::this_thread::get_id()});

  // Without a pool, always the caller's thread.
  EXPECT_EQ(ThreadsOfOneStep(TrainingSplit(nullptr, nullptr)),
            std::set<std::thread::id>{std::this_thread::get_id()});
}

}  // namespace
}  // namespace foray::sched
