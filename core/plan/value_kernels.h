// The kernel sums of core/plan/value.h on SIMD kernels (Highway, dispatched at run time to the
// best target of the CPU, like core/model/simd_kernels.h): points go into the lanes of a vector.
// A state value is evaluated at every particle of every candidate (a nearby reward at every
// step of the rollout too), so this is a planner's hot loop.
//
//   simd::KernelSums(points, stride, n, d, z, c, weight, value, &weighted, &total, &best);
#ifndef FORAY_CORE_PLAN_VALUE_KERNELS_H_
#define FORAY_CORE_PLAN_VALUE_KERNELS_H_

#include <cstddef>

namespace foray::plan::simd {

// With k_i = exp(-c sum_j (points[j * stride + i] - z[j])^2) over points i < n (n a multiple of
// 16, the widest vector; padding points carry weight 0 and value 0) and dimensions j < d:
//   *weighted = sum_i weight_i k_i value_i,  *total = sum_i weight_i k_i,
//   *best = max(0, max_i k_i value_i).
// c >= 0. The exponential is clamped below at e^-87.3 (a point that far counts about 1e-38).
void KernelSums(const float* points, size_t stride, int n, int d, const float* z, float c,
                const float* weight, const float* value, float* weighted, float* total,
                float* best);

}  // namespace foray::plan::simd

#endif  // FORAY_CORE_PLAN_VALUE_KERNELS_H_
