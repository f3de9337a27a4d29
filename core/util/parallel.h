// How core code splits work over threads it does not own. Core starts no threads of its own: a
// caller with a worker pool passes a ParallelFor that runs the tasks there; an empty one runs
// them in order on the caller's thread.
//
//   RunTasks(parallel, members, [&](int b) { ... });   // returns when every task finished
#ifndef FORAY_CORE_UTIL_PARALLEL_H_
#define FORAY_CORE_UTIL_PARALLEL_H_

#include <functional>

namespace foray {

// Runs task(i) for every i in [0, tasks), possibly on several threads at once, and returns when
// all have finished.
using ParallelFor = std::function<void(int tasks, const std::function<void(int)>& task)>;

inline void RunTasks(const ParallelFor& parallel, int tasks, const std::function<void(int)>& task) {
  if (parallel && tasks > 1) {
    parallel(tasks, task);
  } else {
    for (int i = 0; i < tasks; ++i) task(i);
  }
}

}  // namespace foray

#endif  // FORAY_CORE_UTIL_PARALLEL_H_
