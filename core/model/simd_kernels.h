// The model's SIMD kernels, written once with Highway and compiled for every x86-64 target from
// SSSE3 to AVX-512 (NEON on ARM64) plus a scalar fallback; the best one the CPU has is chosen
// at run time, so one binary runs its widest kernels on any machine. No Highway type appears
// here: callers see plain pointers.
//
//   simd::Dense(x, ldx, rows, k, w, ldw, bias, y, ldy, simd::Act::kSilu);
//   std::printf("%s\n", simd::TargetName());   // "AVX3", "AVX2", ...
//
// Register tiles, per target (rows x vectors of accumulators). Chosen with the model benchmark's
// ensemble forward (B=5, 3x64, 1,000 rows, one thread; tests/bench/run_model_bench.sh with
// FORAY_SIMD_TARGET), on a 2-core AMD EPYC family 25 model 17 (AVX-512; its FMA peak is 117
// GFLOP/s a core at both 256 and 512 bits), 2026-12-04:
//   AVX-512, NEON (32 vector registers): 6 rows x 4 vectors (24 accumulators, 4 weight vectors,
//     1 broadcast: 29 of 32 registers); 60-65 GFLOP/s.
//   AVX2, SSE4, SSSE3 (16 registers): 5 rows x 2 vectors (10 + 2 + 1 = 13 of 16). Measured on
//     AVX2: 6 x 2 (15 of 16 registers) 32 GFLOP/s, since GCC 12 spills an accumulator in the
//     inner loop; 5 x 2 53; 4 x 2 49; 3 x 4 43; 2 x 4 43.
//   Scalar fallback (one lane): 4 x 2.
#ifndef FORAY_CORE_MODEL_SIMD_KERNELS_H_
#define FORAY_CORE_MODEL_SIMD_KERNELS_H_

#include <cstddef>
#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

#include "absl/status/status.h"

namespace foray::model::simd {

// Every padded row is a multiple of this many floats: the widest vector any target uses
// (512 bits), so one layout serves every target.
inline constexpr int kPadFloats = 16;

// What a dense layer applies after x W + b.
enum class Act { kNone, kSilu, kRelu, kTanh };

// y (rows, ldy) = act(x (rows, ldx) * w (k, ldw) + bias (ldw)), all row-major; ldw a multiple of
// kPadFloats, and y's rows at least ldw wide. Every ldw column of y is written.
// Silu is z * sigmoid(z) with e^-z from a range reduction: on AVX2 and AVX-512 a table of
// 2^(j/L) for L lanes, a degree-3 or 4 polynomial and a division (error at most 1.2e-7
// max(1, |silu|), measured over [-100, 100]); on the other targets a degree-5 polynomial and the
// reciprocal estimate refined by one Newton step (2.4e-7). See the kernel.
void Dense(const float* x, int ldx, int rows, int k, const float* w, int ldw, const float* bias,
           float* y, int ldy, Act act);

// c (m, n; row-major, ldc) = a (m, k) * b (k, n) [+ row_bias (m), added to every column of its
// row; null for none]. Element (i, kk) of a is a[i * a_row + kk * a_col] and (kk, j) of b is
// b[kk * b_row + j * b_col], so either operand may be read transposed (a column-major matrix is
// its transpose read row-major). b is read in place when b_col is 1; otherwise it is packed once
// per call. No width constraint: columns past the last whole vector go through a padded copy.
// The training's products (forward, weight gradient, back-propagation) run on it. Every sum
// runs over kk in order, so on one target a result does not depend on m, n or the operands' layout.
void Gemm(int m, int n, int k, const float* a, ptrdiff_t a_row, ptrdiff_t a_col, const float* b,
          ptrdiff_t b_row, ptrdiff_t b_col, const float* row_bias, float* c, int ldc);

// In place over n values: z <- act(z), and slope <- act'(z) at the old z (what back-propagation
// multiplies by). Silu from the exponential of simd_math-inl.h and a correctly rounded division
// (1 - sigmoid multiplies silu(z) in the slope); relu's slope is 1 where z > 0 and 0 elsewhere;
// tanh's is 1 - tanh(z)^2.
void ActivateWithSlope(Act act, float* z, float* slope, size_t n);

// The learned log-variance bounds in place, element by element over n values:
//   v = hi - softplus(hi - v);  v = lo + softplus(v - lo),  softplus(x) = max(x, 0) + ln(1 + e^-|x|).
// hi and lo hold one bound per value (the caller repeats the per-output bounds over the rows).
// The result does not depend on where the buffers lie: every value goes through the vector code.
void BoundLogVar(float* v, const float* hi, const float* lo, size_t n);

// The same bounds from exp_neg_hi = e^-hi and exp_lo = e^lo (one per value, as above):
//   v = ln(e^lo + 1 / (e^-hi + e^-v)),
// the two softplus steps composed in closed form: one exponential and one logarithm a value
// instead of two of each. Needs hi and lo within [-60, 60] (v is clamped to [-86, 87] first, which
// moves the result by at most e^-26 there; callers check, BoundLogVar takes any bounds). Against
// the chain in double: 1.9e-7 max(1, |v|) where BoundLogVar is at 9.6e-7 (hi 0.5, lo -10, 5,000
// values); 2.9x faster on AVX-512 and on AVX2 (AMD EPYC family 26 model 2, 2026-12-05).
void BoundLogVarFromExp(float* v, const float* exp_neg_hi, const float* exp_lo, size_t n);

// The target the kernels run on now (Highway's name: "AVX3" is AVX-512, "AVX2" is AVX2 with FMA,
// "SSE4", "SSSE3", "SCALAR", "NEON").
const char* TargetName();

// Caps the kernels at the target named `name` (as TargetName spells it, any case; "best" lifts
// the cap): from then on they run on the best target no better than it. A lab uses it to compare
// targets or to keep a machine off a target it distrusts. InvalidArgument naming the value and
// the choices when this CPU has no such target; nothing changes then.
absl::Status LimitTarget(std::string_view name);

// Tests: the targets compiled in and supported by this CPU, best first, and a switch to one of
// them (0 restores the CPU's best). Not for production paths: it changes every caller's target.
std::vector<int64_t> AvailableTargets();
std::string NameOfTarget(int64_t target);
void UseTargetForTest(int64_t target);

}  // namespace foray::model::simd

#endif  // FORAY_CORE_MODEL_SIMD_KERNELS_H_
