// Highway's per-target compilation (see core/model/simd_kernels.cc); value_kernels.h says what
// the kernel computes.
#include "core/util/simd_targets.h"  // before foreach_target.h
#undef HWY_TARGET_INCLUDE
#define HWY_TARGET_INCLUDE "core/plan/value_kernels.cc"
#include "hwy/foreach_target.h"  // IWYU pragma: keep (must come before highway.h)

#include "core/plan/value_kernels.h"
#include "hwy/highway.h"
// The per-target headers after highway.h.
#include "core/util/simd_math-inl.h"

HWY_BEFORE_NAMESPACE();
namespace foray::plan::simd {
namespace HWY_NAMESPACE {
namespace hn = hwy::HWY_NAMESPACE;
using foray::simd_math::HWY_NAMESPACE::ExpClamped;

void KernelSumsKernel(const float* points, size_t stride, int n, int d, const float* z, float c,
                      const float* weight, const float* value, float* weighted, float* total,
                      float* best) {
  const hn::ScalableTag<float> df;
  using V = hn::Vec<decltype(df)>;
  const size_t lanes = hn::Lanes(df);
  const V neg_c = hn::Set(df, -c);
  V sum_wkv = hn::Zero(df), sum_wk = hn::Zero(df), max_kv = hn::Zero(df);
  for (size_t i = 0; i < static_cast<size_t>(n); i += lanes) {
    V d2 = hn::Zero(df);
    for (int j = 0; j < d; ++j) {
      const V diff = hn::Sub(hn::LoadU(df, points + j * stride + i), hn::Set(df, z[j]));
      d2 = hn::MulAdd(diff, diff, d2);
    }
    const V k = ExpClamped(df, hn::Mul(neg_c, d2));
    const V v = hn::LoadU(df, value + i);
    const V wk = hn::Mul(hn::LoadU(df, weight + i), k);
    sum_wk = hn::Add(sum_wk, wk);
    sum_wkv = hn::MulAdd(wk, v, sum_wkv);
    max_kv = hn::Max(max_kv, hn::Mul(k, v));
  }
  *weighted = hn::GetLane(hn::SumOfLanes(df, sum_wkv));
  *total = hn::GetLane(hn::SumOfLanes(df, sum_wk));
  *best = hn::GetLane(hn::MaxOfLanes(df, max_kv));
}

}  // namespace HWY_NAMESPACE
}  // namespace foray::plan::simd
HWY_AFTER_NAMESPACE();

#if HWY_ONCE
namespace foray::plan::simd {

HWY_EXPORT(KernelSumsKernel);

void KernelSums(const float* points, size_t stride, int n, int d, const float* z, float c,
                const float* weight, const float* value, float* weighted, float* total,
                float* best) {
  HWY_DYNAMIC_DISPATCH(KernelSumsKernel)(points, stride, n, d, z, c, weight, value, weighted,
                                         total, best);
}

}  // namespace foray::plan::simd
#endif  // HWY_ONCE
