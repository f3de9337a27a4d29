// The plan helpers' pool: every task of a Run runs exactly once and has finished when Run
// returns, also when several plans Run at once and when there are more tasks than threads.

#include "server/sched/helper_pool.h"

#include <atomic>
#include <chrono>
#include <thread>
#include <vector>

#include "gtest/gtest.h"

namespace foray::sched {
namespace {

TEST(HelperPoolTest, EveryTaskRunsOnceAndHasFinishedWhenRunReturns) {
  for (int threads : {0, 1, 3}) {
    HelperPool pool(threads);
    for (int tasks : {0, 1, 2, 5, 17}) {
      std::vector<std::atomic<int>> runs(tasks);
      std::vector<std::atomic<bool>> finished(tasks);
      pool.Run(tasks, [&](int i) {
        runs[i].fetch_add(1);
        std::this_thread::sleep_for(std::chrono::microseconds(200 * (i % 3)));
        finished[i].store(true);
      });
      for (int i = 0; i < tasks; ++i) {
        EXPECT_EQ(runs[i].load(), 1) << "threads " << threads << ", tasks " << tasks << ", task " << i;
        EXPECT_TRUE(finished[i].load()) << "threads " << threads << ", tasks " << tasks << ", task " << i;
      }
    }
  }
}

TEST(HelperPoolTest, SeveralPlansRunAtOnce) {
  HelperPool pool(2);
  constexpr int kCallers = 4, kRuns = 200, kTasks = 3;
  std::vector<std::atomic<int>> total(kCallers);
  std::vector<std::thread> callers;
  for (int c = 0; c < kCallers; ++c) {
    callers.emplace_back([&, c] {
      for (int r = 0; r < kRuns; ++r) {
        std::vector<int> seen(kTasks, 0);  // written by the tasks, read after Run returns
        pool.Run(kTasks, [&](int i) { seen[i] += 1; });
        for (int i = 0; i < kTasks; ++i) {
          ASSERT_EQ(seen[i], 1) << "caller " << c << ", run " << r << ", task " << i;
        }
        total[c].fetch_add(kTasks);
      }
    });
  }
  for (std::thread& t : callers) t.join();
  for (int c = 0; c < kCallers; ++c) EXPECT_EQ(total[c].load(), kRuns * kTasks);
}

}  // namespace
}  // namespace foray::sched
