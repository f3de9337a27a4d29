// Runs a check once per SIMD target the machine supports (every kernel compiled with Highway in
// core/model/simd_kernels.cc and core/explore/information_kernels.cc follows the same switch):
// AVX-512, AVX2, SSE4, SSSE3 and the emulated fallback on an AVX-512 x86-64 machine.
//
//   testing::ForEachSimdTarget([&] { EXPECT_...; });
#ifndef FORAY_TESTS_TESTING_SIMD_TARGETS_H_
#define FORAY_TESTS_TESTING_SIMD_TARGETS_H_

#include <cstdint>
#include <vector>

#include "core/model/simd_kernels.h"
#include "gtest/gtest.h"

namespace foray::testing {

// Runs `check` once per target, then restores the CPU's best.
template <class F>
void ForEachSimdTarget(F check) {
  const std::vector<int64_t> targets = model::simd::AvailableTargets();
  ASSERT_FALSE(targets.empty());
  for (int64_t target : targets) {
    model::simd::UseTargetForTest(target);
    SCOPED_TRACE(model::simd::NameOfTarget(target));
    ASSERT_EQ(model::simd::TargetName(), model::simd::NameOfTarget(target));
    check();
  }
  model::simd::UseTargetForTest(0);
}

}  // namespace foray::testing

#endif  // FORAY_TESTS_TESTING_SIMD_TARGETS_H_
