#include "server/sched/training_loop.h"

#include <cstdio>
#include <string>

namespace foray::sched {

ParallelFor TrainingSplit(const PlanGate* gate, HelperPool* helpers) {
  return [gate, helpers](int tasks, const std::function<void(int)>& task) {
    if (helpers != nullptr && (gate == nullptr || gate->busy() == 0)) {
      helpers->Run(tasks, task);
    } else {
      for (int i = 0; i < tasks; ++i) task(i);
    }
  };
}

TrainingLoop::TrainingLoop(RobotSource robots, const PlanGate* gate, HelperPool* helpers,
                           absl::Duration idle_poll, absl::Duration max_pause)
    : robots_(std::move(robots)),
      gate_(gate),
      split_(TrainingSplit(gate, helpers)),
      idle_poll_(idle_poll),
      max_pause_(max_pause) {}

TrainingLoop::~TrainingLoop() { Stop(); }

void TrainingLoop::Start() {
  {
    absl::MutexLock lock(&mu_);
    stopping_ = false;
  }
  thread_ = std::thread([this] { Run(); });
}

void TrainingLoop::Stop() {
  {
    absl::MutexLock lock(&mu_);
    stopping_ = true;
  }
  if (thread_.joinable()) thread_.join();
}

void TrainingLoop::Run() {
  size_t next = 0;  // where the round robin resumes
  for (;;) {
    {
      absl::MutexLock lock(&mu_);
      if (stopping_) return;
    }
    const std::vector<std::shared_ptr<robot::RobotRuntime>> robots = robots_();
    bool trained = false;
    for (size_t i = 0; i < robots.size(); ++i) {
      const auto& runtime = robots[(next + i) % robots.size()];
      if (!runtime->WantsTraining()) continue;
      auto published = runtime->TrainOnce(
          [this] {
            if (gate_ != nullptr) gate_->WaitForIdleCore(max_pause_);
          },
          split_);
      if (!published.ok()) {
        std::fprintf(stderr, "forayd: training robot %s failed: %s\n", runtime->robot_id().c_str(),
                     std::string(published.status().message()).c_str());
      }
      next = (next + i + 1) % robots.size();
      trained = true;
      break;  // one round, then look at every robot again from the next one
    }
    if (!trained) {
      absl::MutexLock lock(&mu_);
      mu_.AwaitWithTimeout(absl::Condition(&stopping_), idle_poll_);
    }
  }
}

}  // namespace foray::sched
