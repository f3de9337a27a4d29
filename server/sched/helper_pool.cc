#include "server/sched/helper_pool.h"

#include <atomic>

namespace foray::sched {

struct HelperPool::Batch {
  const std::function<void(int)>* task = nullptr;
  int tasks = 0;
  std::atomic<int> next{0};      // the next task index to start
  std::atomic<int> finished{0};  // tasks that have returned
  absl::Mutex mu;
  bool done ABSL_GUARDED_BY(mu) = false;
};

HelperPool::HelperPool(int threads) {
  for (int i = 0; i < threads; ++i) threads_.emplace_back([this] { Work(); });
}

HelperPool::~HelperPool() {
  {
    absl::MutexLock lock(&mu_);
    stopping_ = true;
  }
  for (std::thread& t : threads_) t.join();
}

bool HelperPool::Drain(Batch* batch) {
  bool last = false;
  for (int i = batch->next.fetch_add(1); i < batch->tasks; i = batch->next.fetch_add(1)) {
    (*batch->task)(i);
    last = batch->finished.fetch_add(1) + 1 == batch->tasks;
  }
  if (last) {
    absl::MutexLock lock(&batch->mu);
    batch->done = true;
  }
  return last;
}

void HelperPool::Work() {
  for (;;) {
    std::shared_ptr<Batch> batch;
    {
      absl::MutexLock lock(&mu_);
      auto ready = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) { return stopping_ || !queue_.empty(); };
      mu_.Await(absl::Condition(&ready));
      if (queue_.empty()) return;  // stopping
      batch = queue_.front();
      // A batch stays queued while it has tasks to start, so that several threads join it.
      if (batch->next.load() >= batch->tasks - 1) queue_.pop_front();
    }
    Drain(batch.get());
  }
}

void HelperPool::Run(int tasks, const std::function<void(int)>& task) {
  if (tasks <= 0) return;
  if (tasks == 1 || threads_.empty()) {
    for (int i = 0; i < tasks; ++i) task(i);
    return;
  }
  auto batch = std::make_shared<Batch>();
  batch->task = &task;
  batch->tasks = tasks;
  {
    absl::MutexLock lock(&mu_);
    queue_.push_back(batch);
  }
  Drain(batch.get());
  {
    // Take the batch off the queue if no helper did (so none starts it after this returns).
    absl::MutexLock lock(&mu_);
    for (auto it = queue_.begin(); it != queue_.end(); ++it) {
      if (*it == batch) {
        queue_.erase(it);
        break;
      }
    }
  }
  absl::MutexLock lock(&batch->mu);
  batch->mu.Await(absl::Condition(&batch->done));
}

::foray::ParallelFor HelperPool::ParallelFor() {
  return [this](int tasks, const std::function<void(int)>& task) { Run(tasks, task); };
}

}  // namespace foray::sched
