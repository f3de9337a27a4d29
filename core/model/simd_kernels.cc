// Highway's per-target compilation: foreach_target.h includes this file once per target, each
// time with HWY_NAMESPACE naming that target; the HWY_ONCE part at the end is compiled once and
// dispatches. See simd_kernels.h for what each kernel computes.
// The targets: core/util/simd_targets.h.
#include "core/util/simd_targets.h"  // before foreach_target.h
#undef HWY_TARGET_INCLUDE
#define HWY_TARGET_INCLUDE "core/model/simd_kernels.cc"
#include "hwy/foreach_target.h"  // IWYU pragma: keep (must come before highway.h)

#include <algorithm>
#include <cstddef>
#include <cstring>
#include <vector>

#include "absl/strings/ascii.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"

#include "core/model/simd_kernels.h"
#include "hwy/highway.h"
// The per-target headers after highway.h.
#include "core/util/simd_math-inl.h"
#include "hwy/contrib/math/math-inl.h"

HWY_BEFORE_NAMESPACE();
namespace foray::model::simd {
namespace HWY_NAMESPACE {
namespace hn = hwy::HWY_NAMESPACE;
using foray::simd_math::HWY_NAMESPACE::ExpClamped;
using foray::simd_math::HWY_NAMESPACE::ExpInRange;

using D = hn::ScalableTag<float>;
using V = hn::Vec<D>;

// Register tile per target: see the header for the register counts behind them.
#if HWY_TARGET == HWY_AVX3 || HWY_TARGET == HWY_AVX3_DL || HWY_TARGET == HWY_NEON
constexpr int kTileRows = 6;
constexpr int kTileVectors = 4;
#elif HWY_TARGET == HWY_SCALAR || HWY_TARGET == HWY_EMU128
constexpr int kTileRows = 4;
constexpr int kTileVectors = 2;
#else
constexpr int kTileRows = 5;  // 6 x 2 would use 15 of 16 registers and spills (see the header)
constexpr int kTileVectors = 2;
#endif

// z * sigmoid(z) = z / (1 + e^-z) in 18 vector operations, short dependency chains (the targets
// other than AVX2 and AVX-512, which take SiluTable below): on 64-wide
// layers the activation is a fifth to a third of the time, bound by the FMA ports and by latency.
// e^-z: z clamped to [-88, 87.3] (e^-z stays a finite normal float); n = round(-z / ln 2) by
// the round-to-nearest of adding 1.5 * 2^23, whose low bits then hold n for the exponent;
// f = -z - n ln 2 in one fused step (ln 2's float rounding, 1.9e-9, times |n| <= 127 is at most
// 2.4e-7 in f, 5.5e-8 for |z| < 20); e^f on |f| <= ln(2)/2 by a degree-5 polynomial in Estrin's
// form (coefficients fitted here for relative error: 2.1e-7 at most with float arithmetic); the
// reciprocal estimate (12 to 14 bits, exact on the emulated target) gets one Newton step. In
// float64 emulation of these steps over z in [-100, 100]: error at most 1.7e-7 max(1, |silu|).
// Against the former form (two-step Cody-Waite, Horner, 24 operations), the plan benchmark's
// "small" plan on one thread, 4 interleaved passes on a 2-core AMD EPYC family 26 model 2,
// 2026-12-05: fastest 51.7 -> 47.1 ms on AVX-512, model part 78-112 -> 112-125 GFLOP/s; at the
// AVX2 target on the same machine 52-56 -> 57-63 GFLOP/s (3 passes).
HWY_INLINE V Silu(D d, V z) {
  const hn::RebindToSigned<D> di;
  const V zc = hn::Min(hn::Max(z, hn::Set(d, -88.0f)), hn::Set(d, 87.3f));
  const V magic = hn::Set(d, 12582912.0f);  // 1.5 * 2^23
  const V t = hn::NegMulAdd(zc, hn::Set(d, 1.44269504088896341f), magic);
  const V n = hn::Sub(t, magic);
  const V f = hn::NegMulSub(n, hn::Set(d, 0.693147182464599609375f), zc);
  const V f2 = hn::Mul(f, f);
  const V p01 = hn::MulAdd(f, hn::Set(d, 0.9999997019767761f), hn::Set(d, 1.0000001192092896f));
  const V p23 = hn::MulAdd(f, hn::Set(d, 0.16667574644088745f), hn::Set(d, 0.49998894333839417f));
  const V p45 = hn::MulAdd(f, hn::Set(d, 8.297648280858994e-3f), hn::Set(d, 4.191538691520691e-2f));
  const V p = hn::MulAdd(f2, hn::MulAdd(f2, p45, p23), p01);
  // t's bits are those of 1.5 * 2^23 plus n: shifted by 23, only n + 127 stays.
  const V scale = hn::BitCast(d, hn::ShiftLeft<23>(hn::Add(hn::BitCast(di, t), hn::Set(di, 127))));
  const V den = hn::MulAdd(p, scale, hn::Set(d, 1.0f));
  V r = hn::ApproximateReciprocal(den);
  r = hn::Mul(r, hn::NegMulAdd(den, r, hn::Set(d, 2.0f)));
  return hn::Mul(z, r);
}

// AVX2 and AVX-512 (8 and 16 lanes) take SiluTable, the other targets Silu (set anew for each
// target's pass through this file).
#undef FORAY_SILU_TABLE
#if HWY_TARGET == HWY_AVX3 || HWY_TARGET == HWY_AVX3_DL || HWY_TARGET == HWY_AVX2
#define FORAY_SILU_TABLE 1
#else
#define FORAY_SILU_TABLE 0
#endif

#if FORAY_SILU_TABLE
// 2^(j/16) and 2^(j/8), rounded to float.
alignas(64) constexpr float kExp2Sixteenths[16] = {
    1.000000000e+00f, 1.044273734e+00f, 1.090507746e+00f, 1.138788581e+00f,
    1.189207077e+00f, 1.241857767e+00f, 1.296839595e+00f, 1.354255557e+00f,
    1.414213538e+00f, 1.476826191e+00f, 1.542210817e+00f, 1.610490322e+00f,
    1.681792855e+00f, 1.756252170e+00f, 1.834008098e+00f, 1.915206552e+00f};
alignas(32) constexpr float kExp2Eighths[8] = {1.000000000e+00f, 1.090507746e+00f, 1.189207077e+00f,
                                               1.296839595e+00f, 1.414213538e+00f, 1.542210817e+00f,
                                               1.681792855e+00f, 1.834008098e+00f};

// Silu with a table of 2^(j/L) for vectors of L = 16 or 8 lanes: e^-z = 2^(m/L) e^f with
// m = round(-z L / ln 2), 2^(m/L) = 2^(m >> log2 L) T[m mod L] (the table lookup is one lane
// permutation, the power of two an integer add to T's exponent bits), |f| <= ln(2) / (2L), so
// e^f needs degree 3 (L = 16; Taylor remainder 9e-9) or 4 (L = 8; 1.3e-9) instead of 5; f's
// error from ln 2's float rounding is that of Silu above (ln(2)/L rounds like ln 2). Fewer
// operations on the FMA ports, and a correctly rounded division, which measured no slower than
// the reciprocal and its Newton step here (and faster with the table). Measured over 2e6 points
// of [-100, 100] against double: 1.17e-7 max(1, |silu|) on AVX-512 and AVX2 (2.38e-7 for Silu
// on SSE4). A 64 -> 64 SiLU layer on 1,000 rows, minimum of 200 calls, 2-core AMD EPYC family 26
// model 2, 2026-12-05, machine loaded by other work: AVX-512 45.1-47.2 -> 44.2-45.5 us, the
// 5 -> 64 input layer 13.4-13.6 -> 12.4-13.4 us; AVX2 95-99 -> 94-97 us and 26.0-26.2 ->
// 23.4-24.9 us. See README "Dispatched kernels by CPU" for the plan benchmark.
HWY_INLINE V SiluTable(D d, V z) {
  constexpr size_t kL = hn::MaxLanes(D());
  static_assert(kL == 16 || kL == 8);
  constexpr int kShift = kL == 16 ? 4 : 3;
  const hn::RebindToSigned<D> di;
  const V zc = hn::Min(hn::Max(z, hn::Set(d, -88.0f)), hn::Set(d, 87.3f));
  const V magic = hn::Set(d, 12582912.0f);  // 1.5 * 2^23
  const V t = hn::NegMulAdd(zc, hn::Set(d, static_cast<float>(kL * 1.44269504088896341)), magic);
  const V m = hn::Sub(t, magic);
  const V f = hn::NegMulSub(m, hn::Set(d, static_cast<float>(0.693147180559945309 / kL)), zc);
  V p;
  if constexpr (kL == 16) {
    p = hn::MulAdd(
        hn::MulAdd(hn::MulAdd(hn::Set(d, 1.0f / 6), f, hn::Set(d, 0.5f)), f, hn::Set(d, 1.0f)), f,
        hn::Set(d, 1.0f));
  } else {
    p = hn::MulAdd(hn::MulAdd(hn::MulAdd(hn::MulAdd(hn::Set(d, 1.0f / 24), f, hn::Set(d, 1.0f / 6)),
                                         f, hn::Set(d, 0.5f)),
                              f, hn::Set(d, 1.0f)),
                   f, hn::Set(d, 1.0f));
  }
  const auto mi = hn::Sub(hn::BitCast(di, t), hn::BitCast(di, magic));
  const auto index = hn::And(mi, hn::Set(di, static_cast<int>(kL) - 1));
  const V table = hn::Load(d, kL == 16 ? kExp2Sixteenths : kExp2Eighths);
  const V entry = hn::TableLookupLanes(table, hn::IndicesFromVec(d, index));
  const V scale = hn::BitCast(
      d, hn::Add(hn::BitCast(di, entry), hn::ShiftLeft<23>(hn::ShiftRight<kShift>(mi))));
  const V den = hn::MulAdd(p, scale, hn::Set(d, 1.0f));
  return hn::Div(z, den);
}
#endif

template <Act A>
HWY_INLINE V Activate(D d, V z) {
  if constexpr (A == Act::kSilu) {
#if FORAY_SILU_TABLE
    return SiluTable(d, z);
#else
    return Silu(d, z);
#endif
  } else if constexpr (A == Act::kRelu) {
    return hn::Max(z, hn::Zero(d));
  } else if constexpr (A == Act::kTanh) {
    return hn::Tanh(d, z);
  } else {
    return z;
  }
}

// y[r][c] for R rows and NV vectors of columns: act(sum_k x[r][k] w[k][c] + b[c]).
template <Act A, int R, int NV>
HWY_INLINE void Tile(const float* HWY_RESTRICT x, int ldx, int k_count,
                     const float* HWY_RESTRICT w, int ldw, const float* HWY_RESTRICT bias,
                     float* HWY_RESTRICT y, int ldy) {
  const D d;
  const size_t n = hn::Lanes(d);
  V acc[R][NV];
  for (int v = 0; v < NV; ++v) {
    const V b = hn::LoadU(d, bias + v * n);
    for (int r = 0; r < R; ++r) acc[r][v] = b;
  }
  for (int k = 0; k < k_count; ++k) {
    V wv[NV];
    for (int v = 0; v < NV; ++v) wv[v] = hn::LoadU(d, w + static_cast<size_t>(k) * ldw + v * n);
    for (int r = 0; r < R; ++r) {
      const V xb = hn::Set(d, x[static_cast<size_t>(r) * ldx + k]);
      for (int v = 0; v < NV; ++v) acc[r][v] = hn::MulAdd(xb, wv[v], acc[r][v]);
    }
  }
  for (int r = 0; r < R; ++r) {
    for (int v = 0; v < NV; ++v) hn::StoreU(acc[r][v], d, y + static_cast<size_t>(r) * ldy + v * n);
  }
  if constexpr (A != Act::kNone) {
    // The activation in a second pass over the tile while it is in L1: applied to the
    // accumulators in registers, its constants and temporaries would spill them.
    for (int r = 0; r < R; ++r) {
      float* HWY_RESTRICT row = y + static_cast<size_t>(r) * ldy;
      for (int v = 0; v < NV; ++v)
        hn::StoreU(Activate<A>(d, hn::LoadU(d, row + v * n)), d, row + v * n);
    }
  }
}

// A tile of R rows and `vectors` (1..NV) vectors.
template <Act A, int R, int NV>
HWY_INLINE void TileColumns(int vectors, const float* x, int ldx, int k_count, const float* w,
                            int ldw, const float* bias, float* y, int ldy) {
  if constexpr (NV > 1) {
    if (vectors < NV) return TileColumns<A, R, NV - 1>(vectors, x, ldx, k_count, w, ldw, bias, y, ldy);
  }
  Tile<A, R, NV>(x, ldx, k_count, w, ldw, bias, y, ldy);
}

// The last `rows` (1..R) rows of a column block.
template <Act A, int R>
HWY_INLINE void TileRows(int rows, int vectors, const float* x, int ldx, int k_count,
                         const float* w, int ldw, const float* bias, float* y, int ldy) {
  if constexpr (R > 1) {
    if (rows < R) return TileRows<A, R - 1>(rows, vectors, x, ldx, k_count, w, ldw, bias, y, ldy);
  }
  TileColumns<A, R, kTileVectors>(vectors, x, ldx, k_count, w, ldw, bias, y, ldy);
}

template <Act A>
void DenseWith(const float* x, int ldx, int rows, int k_count, const float* w, int ldw,
               const float* bias, float* y, int ldy) {
  const int n = static_cast<int>(hn::Lanes(D()));
  const int block = kTileVectors * n;
  // Column blocks outside, rows inside: a block of weights stays in L1 across all rows.
  for (int c0 = 0; c0 < ldw; c0 += block) {
    const int vectors = std::min(kTileVectors, (ldw - c0) / n);
    int r0 = 0;
    for (; r0 + kTileRows <= rows; r0 += kTileRows) {
      TileColumns<A, kTileRows, kTileVectors>(vectors, x + static_cast<size_t>(r0) * ldx, ldx,
                                              k_count, w + c0, ldw, bias + c0,
                                              y + static_cast<size_t>(r0) * ldy + c0, ldy);
    }
    if (r0 < rows) {
      TileRows<A, kTileRows - 1>(rows - r0, vectors, x + static_cast<size_t>(r0) * ldx, ldx,
                                 k_count, w + c0, ldw, bias + c0,
                                 y + static_cast<size_t>(r0) * ldy + c0, ldy);
    }
  }
}

void DenseKernel(const float* x, int ldx, int rows, int k_count, const float* w, int ldw,
                 const float* bias, float* y, int ldy, int act) {
  switch (static_cast<Act>(act)) {
    case Act::kNone: return DenseWith<Act::kNone>(x, ldx, rows, k_count, w, ldw, bias, y, ldy);
    case Act::kSilu: return DenseWith<Act::kSilu>(x, ldx, rows, k_count, w, ldw, bias, y, ldy);
    case Act::kRelu: return DenseWith<Act::kRelu>(x, ldx, rows, k_count, w, ldw, bias, y, ldy);
    case Act::kTanh: return DenseWith<Act::kTanh>(x, ldx, rows, k_count, w, ldw, bias, y, ldy);
  }
}

// c[i][j] for R rows and NV vectors of columns: row_bias[i] + sum_kk a(i, kk) b[kk][j], with a
// read through strides (a broadcast per row and step) and b row-major, full vectors only.
template <int R, int NV>
HWY_INLINE void GemmTile(const float* HWY_RESTRICT a, ptrdiff_t a_row, ptrdiff_t a_col,
                         int k_count, const float* HWY_RESTRICT b, size_t ldb,
                         const float* HWY_RESTRICT row_bias, float* HWY_RESTRICT c, size_t ldc) {
  const D d;
  const size_t n = hn::Lanes(d);
  V acc[R][NV];
  for (int r = 0; r < R; ++r) {
    const V start = row_bias != nullptr ? hn::Set(d, row_bias[r]) : hn::Zero(d);
    for (int v = 0; v < NV; ++v) acc[r][v] = start;
  }
  for (int kk = 0; kk < k_count; ++kk) {
    V bv[NV];
    for (int v = 0; v < NV; ++v) bv[v] = hn::LoadU(d, b + static_cast<size_t>(kk) * ldb + v * n);
    for (int r = 0; r < R; ++r) {
      const V ab = hn::Set(d, a[r * a_row + kk * a_col]);
      for (int v = 0; v < NV; ++v) acc[r][v] = hn::MulAdd(ab, bv[v], acc[r][v]);
    }
  }
  for (int r = 0; r < R; ++r) {
    for (int v = 0; v < NV; ++v) hn::StoreU(acc[r][v], d, c + static_cast<size_t>(r) * ldc + v * n);
  }
}

template <int R, int NV>
HWY_INLINE void GemmTileColumns(int vectors, const float* a, ptrdiff_t a_row, ptrdiff_t a_col,
                                int k_count, const float* b, size_t ldb, const float* row_bias,
                                float* c, size_t ldc) {
  if constexpr (NV > 1) {
    if (vectors < NV) {
      return GemmTileColumns<R, NV - 1>(vectors, a, a_row, a_col, k_count, b, ldb, row_bias, c, ldc);
    }
  }
  GemmTile<R, NV>(a, a_row, a_col, k_count, b, ldb, row_bias, c, ldc);
}

template <int R>
HWY_INLINE void GemmTileRows(int rows, int vectors, const float* a, ptrdiff_t a_row,
                             ptrdiff_t a_col, int k_count, const float* b, size_t ldb,
                             const float* row_bias, float* c, size_t ldc) {
  if constexpr (R > 1) {
    if (rows < R) {
      return GemmTileRows<R - 1>(rows, vectors, a, a_row, a_col, k_count, b, ldb, row_bias, c, ldc);
    }
  }
  GemmTileColumns<R, kTileVectors>(vectors, a, a_row, a_col, k_count, b, ldb, row_bias, c, ldc);
}

// c = a b (+ row_bias) with b row-major (ldb) and every row of c a whole number of vectors.
void GemmFull(int m, int n_cols, int k_count, const float* a, ptrdiff_t a_row, ptrdiff_t a_col,
              const float* b, size_t ldb, const float* row_bias, float* c, size_t ldc) {
  const int n = static_cast<int>(hn::Lanes(D()));
  const int block = kTileVectors * n;
  for (int c0 = 0; c0 < n_cols; c0 += block) {
    const int vectors = std::min(kTileVectors, (n_cols - c0) / n);
    int r0 = 0;
    for (; r0 + kTileRows <= m; r0 += kTileRows) {
      GemmTileColumns<kTileRows, kTileVectors>(
          vectors, a + r0 * a_row, a_row, a_col, k_count, b + c0, ldb,
          row_bias != nullptr ? row_bias + r0 : nullptr, c + static_cast<size_t>(r0) * ldc + c0, ldc);
    }
    if (r0 < m) {
      GemmTileRows<kTileRows - 1>(m - r0, vectors, a + r0 * a_row, a_row, a_col, k_count, b + c0,
                                  ldb, row_bias != nullptr ? row_bias + r0 : nullptr,
                                  c + static_cast<size_t>(r0) * ldc + c0, ldc);
    }
  }
}

void GemmKernel(int m, int n_cols, int k_count, const float* a, ptrdiff_t a_row, ptrdiff_t a_col,
                const float* b, ptrdiff_t b_row, ptrdiff_t b_col, const float* row_bias, float* c,
                int ldc) {
  if (m <= 0 || n_cols <= 0) return;
  const size_t n = hn::Lanes(D());
  const size_t whole = static_cast<size_t>(n_cols) / n * n;
  const bool b_direct = b_col == 1 && b_row >= 0;
  // b as it is when its rows are contiguous; otherwise packed row-major. Columns past the last
  // whole vector go through a zero-padded copy of b and a scratch block of c.
  thread_local std::vector<float> packed, scratch_b, scratch_c;
  const float* b_rows = b;
  size_t ldb = static_cast<size_t>(b_row);
  if (!b_direct && whole > 0) {
    packed.resize(static_cast<size_t>(k_count) * whole);
    for (int kk = 0; kk < k_count; ++kk) {
      for (size_t j = 0; j < whole; ++j) packed[kk * whole + j] = b[kk * b_row + j * b_col];
    }
    b_rows = packed.data();
    ldb = whole;
  }
  if (whole > 0) {
    GemmFull(m, static_cast<int>(whole), k_count, a, a_row, a_col, b_rows, ldb, row_bias, c,
             static_cast<size_t>(ldc));
  }
  const size_t tail = static_cast<size_t>(n_cols) - whole;
  if (tail == 0) return;
  scratch_b.assign(static_cast<size_t>(k_count) * n, 0.0f);
  for (int kk = 0; kk < k_count; ++kk) {
    for (size_t j = 0; j < tail; ++j) scratch_b[kk * n + j] = b[kk * b_row + (whole + j) * b_col];
  }
  scratch_c.resize(static_cast<size_t>(m) * n);
  GemmFull(m, static_cast<int>(n), k_count, a, a_row, a_col, scratch_b.data(), n, row_bias,
           scratch_c.data(), n);
  for (int i = 0; i < m; ++i) {
    std::memcpy(c + static_cast<size_t>(i) * ldc + whole, scratch_c.data() + i * n,
                tail * sizeof(float));
  }
}

// z <- act(z) and slope <- act'(z) at the old z. Silu: with s = sigmoid(z), silu(z) = z s and
// silu'(z) = s + silu(z) (1 - s). Relu: slope 1 where z > 0, else 0. Tanh: 1 - tanh(z)^2.
template <Act A>
HWY_INLINE void ActivateSlopeVector(D d, float* HWY_RESTRICT z, float* HWY_RESTRICT slope) {
  const V x = hn::LoadU(d, z);
  const V one = hn::Set(d, 1.0f);
  V a, s;
  if constexpr (A == Act::kSilu) {
    const V e = ExpClamped(d, hn::Neg(x));
    // A correctly rounded division: 1 - s multiplies silu(z), which is large where s is 1.
    s = hn::Div(one, hn::Add(one, e));
    a = hn::Mul(x, s);
    s = hn::MulAdd(a, hn::Sub(one, s), s);
  } else if constexpr (A == Act::kRelu) {
    const auto positive = hn::Gt(x, hn::Zero(d));
    s = hn::IfThenElseZero(positive, one);
    a = hn::IfThenElseZero(positive, x);
  } else {
    a = hn::Tanh(d, x);
    s = hn::NegMulAdd(a, a, one);
  }
  hn::StoreU(a, d, z);
  hn::StoreU(s, d, slope);
}

template <Act A>
void ActivateSlopeWith(float* z, float* slope, size_t count) {
  const D d;
  const size_t n = hn::Lanes(d);
  size_t i = 0;
  for (; i + n <= count; i += n) ActivateSlopeVector<A>(d, z + i, slope + i);
  if (i == count) return;
  HWY_ALIGN float tz[hn::MaxLanes(d)] = {}, ts[hn::MaxLanes(d)] = {};
  std::memcpy(tz, z + i, (count - i) * sizeof(float));
  ActivateSlopeVector<A>(d, tz, ts);
  std::memcpy(z + i, tz, (count - i) * sizeof(float));
  std::memcpy(slope + i, ts, (count - i) * sizeof(float));
}

void ActivateSlopeKernel(float* z, float* slope, size_t count, int act) {
  switch (static_cast<Act>(act)) {
    case Act::kSilu: return ActivateSlopeWith<Act::kSilu>(z, slope, count);
    case Act::kRelu: return ActivateSlopeWith<Act::kRelu>(z, slope, count);
    case Act::kTanh: return ActivateSlopeWith<Act::kTanh>(z, slope, count);
    case Act::kNone: std::fill(slope, slope + count, 1.0f); return;
  }
}

// max(x, 0) + ln(1 + e^-|x|): never overflows (e^-|x| <= 1).
HWY_INLINE V Softplus(D d, V t) {
  return hn::Add(hn::Max(t, hn::Zero(d)), hn::Log1p(d, ExpClamped(d, hn::Neg(hn::Abs(t)))));
}

HWY_INLINE V Bound(D d, V v, V hi, V lo) {
  v = hn::Sub(hi, Softplus(d, hn::Sub(hi, v)));
  return hn::Add(lo, Softplus(d, hn::Sub(v, lo)));
}

// v[i] = f(v[i], a[i], b[i]) over count values, the tail through the same vector code with a
// and b padded with ones (harmless for both bound forms; the padded lanes are not stored).
template <class F>
HWY_INLINE void OverBoundArrays(float* v, const float* a, const float* b, size_t count, F f) {
  const D d;
  const size_t n = hn::Lanes(d);
  size_t i = 0;
  for (; i + n <= count; i += n) {
    hn::StoreU(f(d, hn::LoadU(d, v + i), hn::LoadU(d, a + i), hn::LoadU(d, b + i)), d, v + i);
  }
  if (i == count) return;
  HWY_ALIGN float tv[hn::MaxLanes(d)] = {}, ta[hn::MaxLanes(d)], tb[hn::MaxLanes(d)];
  std::fill(ta, ta + hn::MaxLanes(d), 1.0f);
  std::fill(tb, tb + hn::MaxLanes(d), 1.0f);
  const size_t left = count - i;
  std::memcpy(tv, v + i, left * sizeof(float));
  std::memcpy(ta, a + i, left * sizeof(float));
  std::memcpy(tb, b + i, left * sizeof(float));
  hn::Store(f(d, hn::Load(d, tv), hn::Load(d, ta), hn::Load(d, tb)), d, tv);
  std::memcpy(v + i, tv, left * sizeof(float));
}

void BoundKernel(float* v, const float* hi, const float* lo, size_t count) {
  OverBoundArrays(v, hi, lo, count, [](D d, V x, V h, V l) { return Bound(d, x, h, l); });
}

// The same two bounds in one step from e^-hi and e^lo: hi - softplus(hi - v) = -ln(e^-hi + e^-v)
// and lo + softplus(u - lo) = ln(e^lo + e^u), so the pair is ln(e^lo + 1 / (e^-hi + e^-v)): one
// exponential, one reciprocal (estimate and a Newton step) and one logarithm instead of two
// exponentials and two logarithms. v is clamped to [-86, 87] first (e^-v then stays a normal
// float, and so does 1 / (e^-hi + e^-v)); with hi and lo within [-60, 60] that moves the result
// by at most e^-26 relative, since the bounds pull any v beyond it to lo or hi.
HWY_INLINE V BoundFromExp(D d, V v, V exp_neg_hi, V exp_lo) {
  const V e = ExpInRange(d, hn::Neg(hn::Min(hn::Max(v, hn::Set(d, -86.0f)), hn::Set(d, 87.0f))));
  const V den = hn::Add(exp_neg_hi, e);
  V r = hn::ApproximateReciprocal(den);
  r = hn::Mul(r, hn::NegMulAdd(den, r, hn::Set(d, 2.0f)));
  return hn::Log(d, hn::Add(exp_lo, r));
}

void BoundFromExpKernel(float* v, const float* exp_neg_hi, const float* exp_lo, size_t count) {
  OverBoundArrays(v, exp_neg_hi, exp_lo, count,
                  [](D d, V x, V h, V l) { return BoundFromExp(d, x, h, l); });
}

int64_t CurrentTarget() { return HWY_TARGET; }

}  // namespace HWY_NAMESPACE
}  // namespace foray::model::simd
HWY_AFTER_NAMESPACE();

#if HWY_ONCE
namespace foray::model::simd {

HWY_EXPORT(DenseKernel);
HWY_EXPORT(BoundKernel);
HWY_EXPORT(BoundFromExpKernel);
HWY_EXPORT(GemmKernel);
HWY_EXPORT(ActivateSlopeKernel);
HWY_EXPORT(CurrentTarget);

void Dense(const float* x, int ldx, int rows, int k, const float* w, int ldw, const float* bias,
           float* y, int ldy, Act act) {
  HWY_DYNAMIC_DISPATCH(DenseKernel)(x, ldx, rows, k, w, ldw, bias, y, ldy, static_cast<int>(act));
}

void Gemm(int m, int n, int k, const float* a, ptrdiff_t a_row, ptrdiff_t a_col, const float* b,
          ptrdiff_t b_row, ptrdiff_t b_col, const float* row_bias, float* c, int ldc) {
  HWY_DYNAMIC_DISPATCH(GemmKernel)(m, n, k, a, a_row, a_col, b, b_row, b_col, row_bias, c, ldc);
}

void ActivateWithSlope(Act act, float* z, float* slope, size_t n) {
  HWY_DYNAMIC_DISPATCH(ActivateSlopeKernel)(z, slope, n, static_cast<int>(act));
}

void BoundLogVar(float* v, const float* hi, const float* lo, size_t n) {
  HWY_DYNAMIC_DISPATCH(BoundKernel)(v, hi, lo, n);
}

void BoundLogVarFromExp(float* v, const float* exp_neg_hi, const float* exp_lo, size_t n) {
  HWY_DYNAMIC_DISPATCH(BoundFromExpKernel)(v, exp_neg_hi, exp_lo, n);
}

const char* TargetName() { return hwy::TargetName(HWY_DYNAMIC_DISPATCH(CurrentTarget)()); }

std::vector<int64_t> AvailableTargets() { return hwy::SupportedAndGeneratedTargets(); }

std::string NameOfTarget(int64_t target) { return hwy::TargetName(target); }

void UseTargetForTest(int64_t target) { hwy::SetSupportedTargetsForTest(target); }

absl::Status LimitTarget(std::string_view name) {
  const std::string given(name);
  const std::string wanted = absl::AsciiStrToUpper(given);
  if (wanted == "BEST") {
    hwy::DisableTargets(0);
    return absl::OkStatus();
  }
  hwy::DisableTargets(0);  // the CPU's full list, whatever an earlier cap left
  std::vector<std::string> names;
  for (int64_t target : hwy::SupportedAndGeneratedTargets()) {
    names.push_back(hwy::TargetName(target));
    // Highway numbers better targets with lower bits: disable every bit below this one.
    if (names.back() == wanted) {
      hwy::DisableTargets(target - 1);
      return absl::OkStatus();
    }
  }
  return absl::InvalidArgumentError(absl::StrCat("SIMD target \"", given, "\" is not one this CPU runs; choose best or one of: ", absl::StrJoin(names, ", ")));
}

}  // namespace foray::model::simd
#endif  // HWY_ONCE
