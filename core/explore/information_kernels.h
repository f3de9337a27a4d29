// The float information-gain estimators on SIMD kernels (Highway, dispatched at run time to the
// best target of the CPU, like core/model/simd_kernels.h): rows go into the lanes of a vector, so
// one pass over the members' pairs serves a whole vector of rows. information_gain.cc sends its
// float pairwise and Jensen-Renyi estimators here; the double ones stay on Eigen arrays and are
// the tests' reference. Every row's value is computed in its own lane by the same instructions,
// so it does not depend on which rows share a call (the planner splits rows over threads).
//
//   simd::PairwiseKl(set, out);   // as PairwiseKlInformation(set, out)
#ifndef FORAY_CORE_EXPLORE_INFORMATION_KERNELS_H_
#define FORAY_CORE_EXPLORE_INFORMATION_KERNELS_H_

#include "core/explore/information_gain.h"

namespace foray::explore::simd {

// The formulas of information_gain.h, out (rows) in nats. The set must be valid (Validate).
void PairwiseKl(const GaussianSet<float>& set, float* out);
void PairwiseBhattacharyya(const GaussianSet<float>& set, float* out);
void JensenRenyi2(const GaussianSet<float>& set, float* out);

}  // namespace foray::explore::simd

#endif  // FORAY_CORE_EXPLORE_INFORMATION_KERNELS_H_
