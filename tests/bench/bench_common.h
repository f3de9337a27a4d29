// Helpers shared by the C++ sides of the benchmarks: timing summaries, random matrices, the
// SGEMM peak every figure is put against and the FMA peak of the cores (the hardware's limit).
// Single-threaded use, except FmaPeakGflops, which starts its own threads.
#ifndef FORAY_TESTS_BENCH_BENCH_COMMON_H_
#define FORAY_TESTS_BENCH_BENCH_COMMON_H_

#include <algorithm>
#include <chrono>
#include <cstdint>
#include <cstdio>
#include <thread>
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

// The cores' fused multiply-add limit in single precision: `threads` threads at once, each
// running 12 independent chains of vector FMAs (enough to cover the FMA latency of current
// x86 cores) in registers, with the widest vectors the build targets. The best of `repeats`
// runs of about 0.2 s, summed over the threads; GFLOP/s counting an FMA as two operations.
// No real kernel reaches it (loads, epilogues); it bounds what any implementation can do.
inline double FmaPeakGflops(int threads, int repeats = 5) {
#if defined(__AVX512F__)
  constexpr int kBytes = 64;
#elif defined(__AVX__)
  constexpr int kBytes = 32;
#else
  constexpr int kBytes = 16;
#endif
  typedef float Vec __attribute__((vector_size(kBytes)));
  constexpr int kLanes = kBytes / 4;
  constexpr long kSteps = 4000000;
  auto run = [](double* gflops) {
    const Vec a = Vec{} + 0.999999f, b = Vec{} + 1e-7f;
#define FORAY_CHAINS(X) X(0) X(1) X(2) X(3) X(4) X(5) X(6) X(7) X(8) X(9) X(10) X(11)
#define FORAY_DECLARE(i) Vec c##i = Vec{} + 0.01f * i;
#define FORAY_STEP(i) c##i = c##i * a + b;
#define FORAY_SUM(i) sink += c##i[0];
    FORAY_CHAINS(FORAY_DECLARE)
    const auto start = std::chrono::steady_clock::now();
    for (long k = 0; k < kSteps; ++k) {
      FORAY_CHAINS(FORAY_STEP)
      asm volatile("" : "+x"(c0), "+x"(c6));  // keeps the loop from being folded
    }
    const double ms = MsSince(start);
    float sink = 0.0f;
    FORAY_CHAINS(FORAY_SUM)
#undef FORAY_SUM
#undef FORAY_STEP
#undef FORAY_DECLARE
#undef FORAY_CHAINS
    *gflops = sink == 12345.0f ? 0.0 : 2.0 * 12 * kLanes * kSteps / (ms * 1e6);
  };
  double best = 0.0;
  for (int r = 0; r < repeats; ++r) {
    std::vector<double> each(threads, 0.0);
    std::vector<std::thread> pool;
    for (int t = 1; t < threads; ++t) pool.emplace_back(run, &each[t]);
    run(&each[0]);
    for (std::thread& t : pool) t.join();
    double total = 0.0;
    for (double g : each) total += g;
    best = std::max(best, total);
  }
  return best;
}

// Prints the FMA peak on `threads` threads as one JSON line (name "fma_peak").
inline void PrintFmaPeak(int threads) {
  std::printf("{\"name\": \"fma_peak\", \"impl\": \"foray\", \"gflops\": %.2f, \"threads\": %d}\n",
              FmaPeakGflops(threads), threads);
  std::fflush(stdout);
}

}  // namespace foray::bench

#endif  // FORAY_TESTS_BENCH_BENCH_COMMON_H_
