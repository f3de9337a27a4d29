// Vector math shared by the per-target kernels (core/model/simd_kernels.cc,
// core/explore/information_kernels.cc). Highway's per-target header pattern: the guard toggles so
// that foreach_target.h compiles this once per target, each time into that target's namespace.
// Include it after "hwy/highway.h", inside no namespace.
//
//   const V e = foray::simd_math::HWY_NAMESPACE::ExpInRange(d, x);   // x in [kExpLow, kExpHigh]
#if defined(FORAY_CORE_UTIL_SIMD_MATH_INL_H_) == defined(HWY_TARGET_TOGGLE)
#ifdef FORAY_CORE_UTIL_SIMD_MATH_INL_H_
#undef FORAY_CORE_UTIL_SIMD_MATH_INL_H_
#else
#define FORAY_CORE_UTIL_SIMD_MATH_INL_H_
#endif

#include "hwy/highway.h"

HWY_BEFORE_NAMESPACE();
namespace foray::simd_math {
namespace HWY_NAMESPACE {
namespace hn = hwy::HWY_NAMESPACE;

// The range ExpInRange accepts: 2^n stays a normal float for n = round(x / ln 2) in
// [-126, 127], and e^x = 2^n e^f with |f| <= ln(2)/2 stays below FLT_MAX.
inline constexpr float kExpLow = -87.3f;
inline constexpr float kExpHigh = 88.0f;

// e^x for x in [kExpLow, kExpHigh] (callers clamp; outside it the result is wrong, not slow).
// Cody & Waite's reduction x = n ln 2 + f with ln 2 split into a short head and a tail (so n ln 2
// is exact to float precision), a degree-5 polynomial for e^f - 1 - f (the coefficients of the
// Cephes library's expf, about 1 ulp over |f| <= ln(2)/2), and 2^n written into the exponent
// bits. About half the instructions of Highway's general Exp, which handles the whole float
// range: on the model's layers the activation's exponential is a fifth of the work.
template <class D>
HWY_INLINE hn::Vec<D> ExpInRange(D d, hn::Vec<D> x) {
  using V = hn::Vec<D>;
  const V n = hn::Round(hn::Mul(x, hn::Set(d, 1.44269504088896341f)));
  V f = hn::NegMulAdd(n, hn::Set(d, 0.693359375f), x);
  f = hn::NegMulAdd(n, hn::Set(d, -2.12194440e-4f), f);
  V p = hn::Set(d, 1.9875691500e-4f);
  p = hn::MulAdd(p, f, hn::Set(d, 1.3981999507e-3f));
  p = hn::MulAdd(p, f, hn::Set(d, 8.3334519073e-3f));
  p = hn::MulAdd(p, f, hn::Set(d, 4.1665795894e-2f));
  p = hn::MulAdd(p, f, hn::Set(d, 1.6666665459e-1f));
  p = hn::MulAdd(p, f, hn::Set(d, 5.0000001201e-1f));
  p = hn::MulAdd(p, hn::Mul(f, f), hn::Add(f, hn::Set(d, 1.0f)));
  const hn::RebindToSigned<D> di;
  const auto bits = hn::ShiftLeft<23>(hn::Add(hn::ConvertTo(di, n), hn::Set(di, 127)));
  return hn::Mul(p, hn::BitCast(d, bits));
}

// e^x clamped into ExpInRange's range first: e^x for x >= kExpLow up to kExpHigh, about
// 1.2e-38 below (where callers add it to 1 or compare it with others of the same size) and
// e^88 = 1.65e38 above.
template <class D>
HWY_INLINE hn::Vec<D> ExpClamped(D d, hn::Vec<D> x) {
  return ExpInRange(d, hn::Min(hn::Max(x, hn::Set(d, kExpLow)), hn::Set(d, kExpHigh)));
}

}  // namespace HWY_NAMESPACE
}  // namespace foray::simd_math
HWY_AFTER_NAMESPACE();

#endif  // FORAY_CORE_UTIL_SIMD_MATH_INL_H_
