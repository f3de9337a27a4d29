// Helpers shared by the C++ sides of the benchmarks: timing summaries, random matrices, the
// SGEMM peak every figure is put against and the FMA peak of the cores (the hardware's limit).
// Single-threaded use, except FmaPeakGflops, which starts its own threads.
#ifndef FORAY_TESTS_BENCH_BENCH_COMMON_H_
#define FORAY_TESTS_BENCH_BENCH_COMMON_H_

#include <algorithm>
#include <chrono>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <string>
#include <thread>
#include <vector>

#include "Eigen/Core"
#include "core/model/simd_kernels.h"
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

// One thread's FMA rate in GFLOP/s over `steps` steps of 12 chains, on the best SIMD target of
// the CPU (tests/bench/fma_peak.cc; an FMA counts as two operations).
double FmaChainsGflops(long steps);

// The cores' fused multiply-add limit in single precision: `threads` threads at once, each
// running FmaChainsGflops for about 0.2 s; the best of `repeats` runs, summed over the threads.
inline double FmaPeakGflops(int threads, int repeats = 5) {
  constexpr long kSteps = 4000000;
  double best = 0.0;
  for (int r = 0; r < repeats; ++r) {
    std::vector<double> each(threads, 0.0);
    std::vector<std::thread> pool;
    for (int t = 1; t < threads; ++t) pool.emplace_back([&each, t] { each[t] = FmaChainsGflops(kSteps); });
    each[0] = FmaChainsGflops(kSteps);
    for (std::thread& t : pool) t.join();
    double total = 0.0;
    for (double g : each) total += g;
    best = std::max(best, total);
  }
  return best;
}

// Caps the model's kernels at the target named by FORAY_SIMD_TARGET (unset: the CPU's best) and
// prints the target they run on as one JSON line (name "simd_target"); false on a bad name.
inline bool ChooseSimdTarget() {
  const char* wanted = std::getenv("FORAY_SIMD_TARGET");
  if (absl::Status s = model::simd::LimitTarget(wanted == nullptr ? "best" : wanted); !s.ok()) {
    std::fprintf(stderr, "FORAY_SIMD_TARGET: %s\n", std::string(s.message()).c_str());
    return false;
  }
  std::printf("{\"name\": \"simd_target\", \"impl\": \"foray\", \"target\": \"%s\"}\n",
              model::simd::TargetName());
  std::fflush(stdout);
  return true;
}

// Prints the FMA peak on `threads` threads as one JSON line (name "fma_peak").
inline void PrintFmaPeak(int threads) {
  std::printf("{\"name\": \"fma_peak\", \"impl\": \"foray\", \"gflops\": %.2f, \"threads\": %d}\n",
              FmaPeakGflops(threads), threads);
  std::fflush(stdout);
}

}  // namespace foray::bench

#endif  // FORAY_TESTS_BENCH_BENCH_COMMON_H_
