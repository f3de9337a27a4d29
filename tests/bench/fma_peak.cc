// The cores' fused multiply-add limit, compiled for every SIMD target and run on the best one
// this CPU has (Highway's dynamic dispatch, as the model's kernels): 12 independent chains of
// vector FMAs in registers, enough to cover the FMA latency of current x86 and ARM cores. No
// real kernel reaches it (loads, epilogues); it bounds what any implementation can do.
#include "core/util/simd_targets.h"  // before foreach_target.h
#undef HWY_TARGET_INCLUDE
#define HWY_TARGET_INCLUDE "tests/bench/fma_peak.cc"
#include "hwy/foreach_target.h"  // IWYU pragma: keep (must come before highway.h)

#include <chrono>

#include "hwy/highway.h"
#include "tests/bench/bench_common.h"

HWY_BEFORE_NAMESPACE();
namespace foray::bench {
namespace HWY_NAMESPACE {
namespace hn = hwy::HWY_NAMESPACE;

// Seeds the chains from memory the compiler cannot see through, so nothing is folded.
volatile float g_seed[3] = {0.999999f, 1e-7f, 0.01f};

double FmaChains(long steps) {
  const hn::ScalableTag<float> d;
  const auto a = hn::Set(d, g_seed[0]), b = hn::Set(d, g_seed[1]);
  auto c0 = hn::Set(d, g_seed[2]), c1 = hn::Add(c0, c0), c2 = hn::Add(c1, c0),
       c3 = hn::Add(c2, c0), c4 = hn::Add(c3, c0), c5 = hn::Add(c4, c0), c6 = hn::Add(c5, c0),
       c7 = hn::Add(c6, c0), c8 = hn::Add(c7, c0), c9 = hn::Add(c8, c0), c10 = hn::Add(c9, c0),
       c11 = hn::Add(c10, c0);
  const auto start = std::chrono::steady_clock::now();
  for (long k = 0; k < steps; ++k) {
    c0 = hn::MulAdd(c0, a, b); c1 = hn::MulAdd(c1, a, b); c2 = hn::MulAdd(c2, a, b);
    c3 = hn::MulAdd(c3, a, b); c4 = hn::MulAdd(c4, a, b); c5 = hn::MulAdd(c5, a, b);
    c6 = hn::MulAdd(c6, a, b); c7 = hn::MulAdd(c7, a, b); c8 = hn::MulAdd(c8, a, b);
    c9 = hn::MulAdd(c9, a, b); c10 = hn::MulAdd(c10, a, b); c11 = hn::MulAdd(c11, a, b);
  }
  const double ms = MsSince(start);
  const auto sum = hn::Add(hn::Add(hn::Add(c0, c1), hn::Add(c2, c3)),
                           hn::Add(hn::Add(hn::Add(c4, c5), hn::Add(c6, c7)),
                                   hn::Add(hn::Add(c8, c9), hn::Add(c10, c11))));
  g_seed[2] = g_seed[2] + 0.0f * hn::GetLane(sum);  // uses the chains
  return 2.0 * 12 * hn::Lanes(d) * steps / (ms * 1e6);
}

}  // namespace HWY_NAMESPACE
}  // namespace foray::bench
HWY_AFTER_NAMESPACE();

#if HWY_ONCE
namespace foray::bench {
HWY_EXPORT(FmaChains);

double FmaChainsGflops(long steps) { return HWY_DYNAMIC_DISPATCH(FmaChains)(steps); }

}  // namespace foray::bench
#endif  // HWY_ONCE
