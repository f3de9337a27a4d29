// The plan scheduler forayd runs every plan through (server/sched/plan_scheduler.h): a robot
// over its plans per second is refused with the limit named, a plan that finds no core before
// its deadline or no room to wait is refused, a waiting plan is counted in the robot's
// progress, and an admitted plan runs (without a model: one draw of the optimiser's prior).

#include "server/sched/plan_scheduler.h"

#include <filesystem>
#include <memory>
#include <string>
#include <thread>

#include "absl/strings/match.h"
#include "absl/time/clock.h"
#include "gtest/gtest.h"
#include "server/store/store.h"
#include "tests/server/cart_config.h"

namespace foray::sched {
namespace {

class PlanSchedulerTest : public ::testing::Test {
 protected:
  void SetUp() override {
    const std::string dir = ::testing::TempDir() + "/foray-plan-scheduler-" +
                            ::testing::UnitTest::GetInstance()->current_test_info()->name();
    std::filesystem::remove_all(dir);
    std::filesystem::create_directories(dir);
    auto store = store::Store::Open(dir + "/foray.db");
    ASSERT_TRUE(store.ok()) << store.status();
    store_ = *std::move(store);
    store::RobotRecord record;
    record.robot_id = "r-0123456789abcdef";
    record.token_hash = std::string(64, '0');
    record.created_at = absl::Now();
    ASSERT_TRUE(store_->InsertRobot(record).ok());
    robot::RobotConfig config = test_configs::CartConfig("scheduled-cart");
    config.planner.set_horizon(4);
    runtime_ = std::make_unique<robot::RobotRuntime>(record.robot_id, config, store_.get());
    ASSERT_TRUE(runtime_->Load().ok());
  }

  robot::PlanInput Input(absl::Duration budget) const {
    robot::PlanInput input;
    input.state = Eigen::Vector2f(0.1f, -0.2f);
    input.deadline = absl::Now() + budget;
    input.planner = runtime_->config().planner;
    input.objective = runtime_->config().objective;
    return input;
  }

  std::unique_ptr<store::Store> store_;
  std::unique_ptr<robot::RobotRuntime> runtime_;
};

TEST_F(PlanSchedulerTest, AnAdmittedPlanRunsAndOneOverTheRateIsRefusedNamingTheLimit) {
  PlanGate gate(/*slots=*/1, /*max_waiting=*/1);
  // 1 plan per second with two seconds' burst: two plans at once pass, and a third while the
  // bucket still holds the moment's refill (the bucket may go into debt once); then refusal.
  PlanScheduler scheduler(&gate, /*helpers=*/nullptr, /*plans_per_s=*/1.0);
  int admitted = 0;
  absl::Status refused;
  for (int i = 0; i < 10 && refused.ok(); ++i) {
    absl::StatusOr<robot::PlanOutcome> plan = scheduler.Plan(*runtime_, Input(absl::Seconds(5)));
    if (!plan.ok()) {
      refused = plan.status();
      break;
    }
    ++admitted;
    EXPECT_TRUE(plan->from_prior);
    EXPECT_EQ(plan->result.actions.rows(), 4);
  }
  EXPECT_GE(admitted, 2);
  EXPECT_LE(admitted, 3);
  ASSERT_EQ(refused.code(), absl::StatusCode::kResourceExhausted);
  EXPECT_TRUE(absl::StrContains(refused.message(), "scheduled-cart")) << refused;
  EXPECT_TRUE(absl::StrContains(refused.message(), "--robot_plans_per_s")) << refused;
  EXPECT_EQ(gate.busy(), 0);  // every admitted plan gave its core back
}

TEST_F(PlanSchedulerTest, APlanWaitsForACoreUntilItsDeadlineAndIsCountedWhileItWaits) {
  PlanGate gate(/*slots=*/1, /*max_waiting=*/1);
  PlanScheduler scheduler(&gate, nullptr, /*plans_per_s=*/0.0);
  absl::StatusOr<PlanGate::Ticket> held = gate.Enter(absl::InfiniteFuture());  // the only core
  ASSERT_TRUE(held.ok());
  absl::StatusOr<robot::PlanOutcome> late;
  std::thread waiter([&] { late = scheduler.Plan(*runtime_, Input(absl::Seconds(1))); });
  bool counted = false;
  for (int i = 0; i < 250 && !counted; ++i) {
    counted = runtime_->Progress().plans_waiting == 1;
    if (!counted) absl::SleepFor(absl::Milliseconds(2));
  }
  EXPECT_TRUE(counted) << "the waiting plan is counted in the robot's progress";
  // A second plan finds the waiting room (1) full and is refused at once.
  absl::StatusOr<robot::PlanOutcome> full = scheduler.Plan(*runtime_, Input(absl::Seconds(5)));
  EXPECT_EQ(full.status().code(), absl::StatusCode::kResourceExhausted);
  waiter.join();
  EXPECT_EQ(late.status().code(), absl::StatusCode::kResourceExhausted)
      << "no core before the deadline";
  EXPECT_EQ(runtime_->Progress().plans_waiting, 0);
}

}  // namespace
}  // namespace foray::sched
