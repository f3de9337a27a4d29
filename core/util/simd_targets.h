// The SIMD targets every Highway-compiled file of the project is built for; include it first,
// before setting HWY_TARGET_INCLUDE and including "hwy/foreach_target.h". Every target Highway
// can reach on the architecture is compiled in, whatever the build's baseline (the emulated
// fallback included, so tests and simd::LimitTarget can run it); SVE is left out (the kernels
// keep arrays of vectors, which SVE's sizeless types do not allow), so ARM64 runs NEON.
#ifndef FORAY_CORE_UTIL_SIMD_TARGETS_H_
#define FORAY_CORE_UTIL_SIMD_TARGETS_H_

#ifndef HWY_COMPILE_ALL_ATTAINABLE
#define HWY_COMPILE_ALL_ATTAINABLE
#endif
#ifndef HWY_DISABLED_TARGETS
#define HWY_DISABLED_TARGETS (HWY_SVE | HWY_SVE2 | HWY_SVE_256 | HWY_SVE2_128)
#endif

#endif  // FORAY_CORE_UTIL_SIMD_TARGETS_H_
