// The server's concurrency without the network: what the rpc threads and the trainer thread do
// to one robot at the same time, in one process. A writer appends transitions (and resends some,
// as a reconnecting client does), two planners plan through the plan scheduler forayd uses (its
// gate, helper pool and rate limit), the background trainer retrains and publishes new versions,
// and a monitor reads the status, the progress and the settings while they change. Built for the
// ThreadSanitizer run of tests/run_sanitizers.sh, where every unordered access is a failure; in
// the plain build it checks the end state: every transition stored once, plans valid throughout,
// versions rising.

#include <atomic>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <memory>
#include <string>
#include <thread>
#include <vector>

#include "absl/strings/str_cat.h"
#include "absl/time/clock.h"
#include "gtest/gtest.h"
#include "server/api/directory.h"
#include "server/robot/runtime.h"
#include "server/sched/helper_pool.h"
#include "server/sched/plan_gate.h"
#include "server/sched/plan_scheduler.h"
#include "server/sched/training_loop.h"
#include "server/store/store.h"
#include "tests/server/cart_config.h"

namespace foray {
namespace {

constexpr int kStateDim = 2;
constexpr int kActionDim = 1;

robot::RobotConfig SmallRobot() {
  robot::RobotConfig config = test_configs::CartConfig("concurrency-cart");
  config.control_period_s = 0.05;
  config.ensemble.ensemble_size = 3;
  config.ensemble.hidden_widths = {16, 16};
  config.training.max_epochs = 3;
  config.training.batch_size = 32;
  config.policy.every_n_transitions = 60;
  config.policy.min_transitions = 40;
  config.policy.at_episode_end = true;
  config.planner.set_horizon(6);
  config.planner.cem.population = 24;
  config.planner.cem.elites = 4;
  config.planner.cem.iterations = 2;
  config.planner.rollout.particles = 3;
  return config;
}

// A cart of our own: position and velocity, pushed by the action, with friction.
store::TransitionRecord Step(uint64_t seq) {
  store::TransitionRecord t;
  t.seq = seq;
  t.episode = 1 + seq / 50;
  t.step = static_cast<uint32_t>(seq % 50);
  const double x = std::sin(0.1 * static_cast<double>(seq)), v = std::cos(0.07 * static_cast<double>(seq));
  const double a = std::sin(0.31 * static_cast<double>(seq));
  t.state = {x, v};
  t.action = {a};
  t.next_state = {x + 0.05 * v, 0.98 * v + 0.05 * a};
  t.reward = -x * x;
  t.terminal = seq % 50 == 49;
  return t;
}

// An empty directory of the test's own under the test temp dir.
std::string FreshDir(const std::string& name) {
  const std::string dir = ::testing::TempDir() + "/" + name;
  std::filesystem::remove_all(dir);
  std::filesystem::create_directories(dir);
  return dir;
}

TEST(RuntimeConcurrencyTest, AppendPlanTrainAndMonitorAtOnce) {
  const std::string dir = FreshDir("foray-runtime-concurrency");
  auto store = store::Store::Open(dir + "/foray.db");
  ASSERT_TRUE(store.ok()) << store.status();
  store::RobotRecord record;
  record.robot_id = "r-0123456789abcdef";
  record.token_hash = std::string(64, '0');
  record.created_at = absl::Now();
  ASSERT_TRUE((*store)->InsertRobot(record).ok());

  auto runtime = std::make_shared<robot::RobotRuntime>(record.robot_id, SmallRobot(), store->get());
  ASSERT_TRUE(runtime->Load().ok());
  sched::PlanGate gate(/*slots=*/2, /*max_waiting=*/8);
  sched::HelperPool helpers(gate.slots() - 1);  // as forayd has it
  sched::PlanScheduler scheduler(&gate, &helpers, /*plans_per_s=*/0);
  sched::TrainingLoop trainer([runtime] { return std::vector<std::shared_ptr<robot::RobotRuntime>>{runtime}; },
                              &gate, &helpers, absl::Milliseconds(5), absl::Milliseconds(50));
  trainer.Start();

  constexpr uint64_t kTransitions = 600;
  constexpr uint64_t kBatch = 12;
  std::atomic<bool> writing{true};
  std::atomic<int> plans{0}, plan_errors{0}, invalid_actions{0};

  std::thread writer([&] {
    for (uint64_t first = 1; first <= kTransitions; first += kBatch) {
      std::vector<store::TransitionRecord> batch;
      // Every third batch starts with the previous batch's last two transitions again: a
      // client resending after a reconnect.
      const uint64_t from = (first / kBatch) % 3 == 2 && first > 2 ? first - 2 : first;
      for (uint64_t s = from; s < first + kBatch && s <= kTransitions; ++s) batch.push_back(Step(s));
      absl::StatusOr<store::AppendResult> r = runtime->Append(batch);
      EXPECT_TRUE(r.ok()) << r.status();
    }
    writing = false;
  });

  auto planner = [&](int seed) {
    int n = 0;
    while (writing || n < 5) {
      robot::PlanInput input;
      input.state = Eigen::Vector2f(0.1f * static_cast<float>(seed), -0.2f);
      input.deadline = absl::Now() + absl::Seconds(5);
      input.planner = runtime->config().planner;
      input.planner.cem.seed = static_cast<uint64_t>(seed * 1000 + n);
      input.objective = runtime->config().objective;
      absl::StatusOr<robot::PlanOutcome> outcome = scheduler.Plan(*runtime, std::move(input));
      if (!outcome.ok()) {
        ++plan_errors;
        ADD_FAILURE() << outcome.status();
        continue;
      }
      const Eigen::MatrixXf& actions = outcome->result.actions;
      if (actions.rows() != 6 || actions.cols() != kActionDim || !actions.allFinite() ||
          actions.maxCoeff() > 1.0f || actions.minCoeff() < -1.0f) {
        ++invalid_actions;
      }
      ++plans;
      ++n;
    }
  };
  std::thread planner_a(planner, 1), planner_b(planner, 2);

  std::thread monitor([&] {
    uint64_t last_version = 0, last_seq = 0;
    int updates = 0;
    while (writing) {
      const robot::RobotStatus status = runtime->Status();
      EXPECT_GE(status.model_version, last_version);
      EXPECT_GE(status.last_seq, last_seq);
      last_version = status.model_version;
      last_seq = status.last_seq;
      const robot::ProgressView progress = runtime->Progress();
      (void)progress;
      if (std::shared_ptr<const robot::PublishedModel> model = runtime->published()) {
        EXPECT_EQ(model->ensemble.state_dim(), kStateDim);
      }
      // Settings change while plans and training read them.
      robot::RobotConfig config = runtime->config();
      config.training.max_epochs = 2 + updates % 3;
      runtime->UpdateSettings(config.planner, config.objective, config.training, config.policy);
      ++updates;
      absl::SleepFor(absl::Milliseconds(2));
    }
  });

  writer.join();
  planner_a.join();
  planner_b.join();
  monitor.join();
  // Let the trainer see the last transitions, then stop it. A round that is running when the
  // request is made does not answer it (it trains on what it started with), so wait until no
  // round runs and none is due.
  runtime->RequestTraining();
  const absl::Time until = absl::Now() + absl::Seconds(60);
  while ((runtime->WantsTraining() || runtime->Status().training) && absl::Now() < until) {
    absl::SleepFor(absl::Milliseconds(10));
  }
  trainer.Stop();

  const robot::RobotStatus status = runtime->Status();
  std::printf("transitions %llu, model versions %llu, plans %d\n",
              static_cast<unsigned long long>(status.transitions),
              static_cast<unsigned long long>(status.model_version), plans.load());
  EXPECT_EQ(status.last_seq, kTransitions);
  EXPECT_EQ(status.transitions, kTransitions);
  EXPECT_GE(status.model_version, 2u) << "the trainer published at most one version";
  EXPECT_EQ(plan_errors.load(), 0);
  EXPECT_EQ(invalid_actions.load(), 0);
  EXPECT_GE(plans.load(), 10);

  // What is stored is what the runtime mirrors: every seq once, after a reopen.
  runtime.reset();
  store->reset();
  auto reopened = store::Store::Open(dir + "/foray.db");
  ASSERT_TRUE(reopened.ok()) << reopened.status();
  robot::RobotRuntime again(record.robot_id, SmallRobot(), reopened->get());
  ASSERT_TRUE(again.Load().ok());
  EXPECT_EQ(again.Status().transitions, kTransitions);
  EXPECT_EQ(again.Status().last_seq, kTransitions);
  EXPECT_GE(again.Status().model_version, 2u);
  std::filesystem::remove_all(dir);
}

v1::RobotSpec SpecNamed(const std::string& name) {
  v1::RobotSpec spec;
  spec.set_name(name);
  spec.set_control_period_s(0.05);
  for (int k = 0; k < kStateDim; ++k) spec.add_state()->set_label(absl::StrCat("x", k));
  v1::Dimension* u = spec.add_action();
  u->set_label("u0");
  v1::ActionLimit* limit = spec.add_action_limits();
  limit->set_min(-1.0);
  limit->set_max(1.0);
  spec.mutable_model()->add_hidden_widths(8);
  return spec;
}

// Registrations racing for names and ids while others list and archive: each name and id is
// taken once, the losers get ALREADY_EXISTS, and the directory matches the store afterwards.
TEST(DirectoryConcurrencyTest, RegisterListAndArchiveAtOnce) {
  const std::string dir = FreshDir("foray-directory-concurrency");
  auto store = store::Store::Open(dir + "/foray.db");
  ASSERT_TRUE(store.ok()) << store.status();
  api::RobotDirectory directory(store->get(), std::string(64, 'a'));
  ASSERT_TRUE(directory.LoadAll().ok());

  constexpr int kThreads = 6, kNames = 4;
  std::atomic<int> registered{0}, refused{0}, other_errors{0};
  std::atomic<bool> running{true};
  std::vector<std::thread> threads;
  for (int i = 0; i < kThreads; ++i) {
    threads.emplace_back([&, i] {
      for (int n = 0; n < kNames; ++n) {
        // Every thread tries every name; two threads also try the same chosen id.
        const std::string id = n == 0 ? "r-00000000000000aa" : "";
        auto result = directory.Register(SpecNamed(absl::StrCat("cart-", n)), id);
        if (result.ok()) {
          ++registered;
        } else if (absl::IsAlreadyExists(result.status())) {
          ++refused;
        } else {
          ++other_errors;
          ADD_FAILURE() << result.status();
        }
      }
      (void)i;
    });
  }
  std::thread lister([&] {
    while (running) {
      for (const auto& entry : directory.List(/*include_archived=*/true)) {
        EXPECT_FALSE(entry->robot_id.empty());
      }
      absl::SleepFor(absl::Microseconds(200));
    }
  });
  for (std::thread& t : threads) t.join();
  // Archive two while the lister reads.
  std::vector<std::shared_ptr<const api::RobotEntry>> all = directory.List(false);
  ASSERT_EQ(all.size(), static_cast<size_t>(kNames));
  EXPECT_TRUE(directory.Archive(all[0]->robot_id).ok());
  EXPECT_TRUE(directory.Archive(all[1]->robot_id).ok());
  running = false;
  lister.join();

  EXPECT_EQ(registered.load(), kNames);
  EXPECT_EQ(refused.load(), kThreads * kNames - kNames);
  EXPECT_EQ(other_errors.load(), 0);
  EXPECT_EQ(directory.List(false).size(), static_cast<size_t>(kNames - 2));
  absl::StatusOr<std::vector<store::RobotRecord>> stored = (*store)->ListRobots();
  ASSERT_TRUE(stored.ok()) << stored.status();
  EXPECT_EQ(stored->size(), static_cast<size_t>(kNames));
  std::filesystem::remove_all(dir);
}

}  // namespace
}  // namespace foray
