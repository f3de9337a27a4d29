// Helpers shared by the C++ sides of the benchmarks: timing summaries, random matrices and the
// SGEMM peak every figure is put against. Single-threaded use.
#ifndef FORAY_TESTS_BENCH_BENCH_COMMON_H_
#define FORAY_TESTS_BENCH_BENCH_COMMON_H_

#include <algorithm>
#include <chrono>
#include <cstdint>
#include <vector>

#include "Eigen/Core"
#include "core/util/random.h"

namespace foray::bench {

struct Timing {
  double median_ms, min_ms, max_ms;
};

inline Timing Summarise(std::vector<double> ms) {
  std::sort(ms.begin(), ms.end());
  return {ms[ms.size() / 2], ms.front(), ms.back()};
}

inline double MsSince(std::chrono::steady_clock::time_point start) {
  return std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - start).count();
}

// Runs fn `warmup` times untimed, then `repeats` times timed.
template <typename F>
Timing Time(F&& fn, int repeats, int warmup = 3) {
  for (int i = 0; i < warmup; ++i) fn();
  std::vector<double> ms;
  for (int i = 0; i < repeats; ++i) {
    const auto start = std::chrono::steady_clock::now();
    fn();
    ms.push_back(MsSince(start));
  }
  return Summarise(std::move(ms));
}

// (rows, cols) standard normal draws, column by column.
inline Eigen::MatrixXf Random(int rows, int cols, uint64_t seed) {
  Rng rng(seed);
  Eigen::MatrixXf m(rows, cols);
  for (int j = 0; j < cols; ++j)
    for (int i = 0; i < rows; ++i) m(i, j) = static_cast<float>(rng.Normal());
  return m;
}

// Square n x n SGEMM with Eigen on the calling thread (the core starts no threads).
inline Timing SgemmTiming(int n, int repeats, int warmup) {
  const Eigen::MatrixXf a = Random(n, n, 1), b = Random(n, n, 2);
  Eigen::MatrixXf c(n, n);
  return Time([&] { c.noalias() = a * b; }, repeats, warmup);
}

}  // namespace foray::bench

#endif  // FORAY_TESTS_BENCH_BENCH_COMMON_H_
