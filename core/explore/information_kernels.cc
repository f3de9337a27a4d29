// Highway's per-target compilation, as in core/model/simd_kernels.cc (same targets): this file
// is compiled once per target; the HWY_ONCE part at the end dispatches.
// clang-format off
#include "core/util/simd_targets.h"  // before foreach_target.h
#undef HWY_TARGET_INCLUDE
#define HWY_TARGET_INCLUDE "core/explore/information_kernels.cc"
#include "hwy/foreach_target.h"  // IWYU pragma: keep (must come before highway.h)
// clang-format on

#include <algorithm>
#include <cmath>
#include <cstddef>
#include <vector>

#include "core/explore/information_kernels.h"
#include "hwy/highway.h"
// The per-target headers after highway.h.
#include "core/util/simd_math-inl.h"
#include "hwy/contrib/math/math-inl.h"

HWY_BEFORE_NAMESPACE();
namespace foray::explore::simd {
namespace HWY_NAMESPACE {
namespace hn = hwy::HWY_NAMESPACE;
using foray::simd_math::HWY_NAMESPACE::ExpClamped;

using D = hn::ScalableTag<float>;
using V = hn::Vec<D>;

constexpr float kLog2Pi = 1.8378770664093454836f;  // ln(2 pi)
constexpr float kLog4Pi = 2.5310242469692907930f;  // ln(4 pi)

// One vector of rows, transposed so that every (member, dimension) is a vector over the rows:
// mean, log-variance, variance and its inverse at [(b * dim + k) * lanes], and the sum over k of
// the log-variances at [b * lanes]. Lanes past the last row hold a standard normal (finite
// arithmetic; their results are dropped).
struct Chunk {
  int members = 0, dim = 0;
  size_t lanes = 0;
  std::vector<float> mu, lv, var, ivar, sum_lv, scratch;

  Chunk(const GaussianSet<float>& set, size_t lanes)
      : members(set.members), dim(set.dim), lanes(lanes) {
    const size_t n = static_cast<size_t>(members) * dim * lanes;
    mu.resize(n);
    lv.resize(n);
    var.resize(n);
    ivar.resize(n);
    sum_lv.resize(static_cast<size_t>(members) * lanes);
  }

  const float* at(const std::vector<float>& v, int b, int k) const {
    return v.data() + (static_cast<size_t>(b) * dim + k) * lanes;
  }

  void Load(D d, const GaussianSet<float>& set, int first, int rows) {
    for (int b = 0; b < members; ++b) {
      for (int r = 0; r < static_cast<int>(lanes); ++r) {
        const bool real = r < rows;
        const std::ptrdiff_t row = b * set.member_stride + (first + r) * set.row_stride;
        for (int k = 0; k < dim; ++k) {
          const size_t i = (static_cast<size_t>(b) * dim + k) * lanes + r;
          mu[i] = real ? set.mean[row + k] : 0.0f;
          lv[i] = real ? set.log_var[row + k] : 0.0f;
        }
      }
      V sum = hn::Zero(d);
      for (int k = 0; k < dim; ++k) {
        const size_t i = (static_cast<size_t>(b) * dim + k) * lanes;
        const V l = hn::LoadU(d, lv.data() + i);
        hn::StoreU(ExpClamped(d, l), d, var.data() + i);
        hn::StoreU(ExpClamped(d, hn::Neg(l)), d, ivar.data() + i);
        sum = hn::Add(sum, l);
      }
      hn::StoreU(sum, d, sum_lv.data() + static_cast<size_t>(b) * lanes);
    }
  }

  // Over k, for members i and j: sum of (mu_i - mu_j)^2 / s and of ln s, s = var_i + var_j.
  void SumsOfPair(D d, int i, int j, V* quad, V* log_sum) const {
    V q = hn::Zero(d), l = hn::Zero(d);
    for (int k = 0; k < dim; ++k) {
      const V s = hn::Add(hn::LoadU(d, at(var, i, k)), hn::LoadU(d, at(var, j, k)));
      const V diff = hn::Sub(hn::LoadU(d, at(mu, i, k)), hn::LoadU(d, at(mu, j, k)));
      q = hn::Add(q, hn::Div(hn::Mul(diff, diff), s));
      l = hn::Add(l, hn::Log(d, s));
    }
    *quad = q;
    *log_sum = l;
  }
};

// I_D = ln B - (1/B) sum_i ln sum_j exp(-D_ij) from the inner sums (each in [1, B]: D_ii = 0).
V FromInnerSums(D d, const float* inner, int members, size_t lanes) {
  V total = hn::Zero(d);
  for (int i = 0; i < members; ++i) {
    total = hn::Add(total, hn::Log(d, hn::LoadU(d, inner + static_cast<size_t>(i) * lanes)));
  }
  const V log_b = hn::Set(d, std::log(static_cast<float>(members)));
  return hn::Max(hn::NegMulAdd(total, hn::Set(d, 1.0f / members), log_b), hn::Zero(d));
}

// KL(p_i || p_j) = 1/2 [ S_j - S_i + sum_k (var_ik + (mu_ik - mu_jk)^2) / var_jk - d ], with
// S the sum of the log-variances; ordered pairs.
V KlChunk(D d, Chunk& c) {
  const size_t lanes = c.lanes;
  c.scratch.assign(static_cast<size_t>(c.members) * lanes, 1.0f);
  const V half = hn::Set(d, 0.5f);
  const V dims = hn::Set(d, static_cast<float>(c.dim));
  for (int i = 0; i < c.members; ++i) {
    const V s_i = hn::LoadU(d, c.sum_lv.data() + i * lanes);
    V inner = hn::Set(d, 1.0f);
    for (int j = 0; j < c.members; ++j) {
      if (j == i) continue;
      V acc = hn::Zero(d);
      for (int k = 0; k < c.dim; ++k) {
        const V diff = hn::Sub(hn::LoadU(d, c.at(c.mu, i, k)), hn::LoadU(d, c.at(c.mu, j, k)));
        const V num = hn::MulAdd(diff, diff, hn::LoadU(d, c.at(c.var, i, k)));
        acc = hn::MulAdd(num, hn::LoadU(d, c.at(c.ivar, j, k)), acc);
      }
      const V s_j = hn::LoadU(d, c.sum_lv.data() + j * lanes);
      const V dist = hn::Mul(half, hn::Sub(hn::Add(hn::Sub(s_j, s_i), acc), dims));
      inner = hn::Add(inner, ExpClamped(d, hn::Neg(dist)));
    }
    hn::StoreU(inner, d, c.scratch.data() + i * lanes);
  }
  return FromInnerSums(d, c.scratch.data(), c.members, lanes);
}

// BD(p_i, p_j) = sum_k (mu_ik - mu_jk)^2 / (4 s_k) + 1/2 sum_k ln(s_k / 2) - (S_i + S_j) / 4,
// s = var_i + var_j; symmetric, so each unordered pair once.
V BhattacharyyaChunk(D d, Chunk& c) {
  const size_t lanes = c.lanes;
  c.scratch.assign(static_cast<size_t>(c.members) * lanes, 1.0f);
  const V quarter = hn::Set(d, 0.25f), half = hn::Set(d, 0.5f);
  const V log_halves = hn::Set(d, c.dim * 0.69314718055994530942f);  // d ln 2
  for (int i = 0; i < c.members; ++i) {
    for (int j = i + 1; j < c.members; ++j) {
      V quad, log_sum;
      c.SumsOfPair(d, i, j, &quad, &log_sum);
      const V s_ij = hn::Add(hn::LoadU(d, c.sum_lv.data() + i * lanes),
                             hn::LoadU(d, c.sum_lv.data() + j * lanes));
      V dist = hn::Mul(half, hn::Sub(log_sum, log_halves));
      dist = hn::MulAdd(quarter, hn::Sub(quad, s_ij), dist);
      const V e = ExpClamped(d, hn::Neg(dist));
      float* inner_i = c.scratch.data() + i * lanes;
      float* inner_j = c.scratch.data() + j * lanes;
      hn::StoreU(hn::Add(hn::LoadU(d, inner_i), e), d, inner_i);
      hn::StoreU(hn::Add(hn::LoadU(d, inner_j), e), d, inner_j);
    }
  }
  return FromInnerSums(d, c.scratch.data(), c.members, lanes);
}

// JR2 = -ln( (1/B^2) sum_ij N(mu_i; mu_j, diag(var_i + var_j)) ) - (1/B) sum_i H2(p_i), with
// ln N = -1/2 (d ln 2 pi + sum_k ln s_k + sum_k (mu_ik - mu_jk)^2 / s_k) per unordered pair
// (off-diagonal pairs count twice), summed with the largest factored out.
V JensenRenyi2Chunk(D d, Chunk& c) {
  const size_t lanes = c.lanes;
  const int pairs = c.members * (c.members + 1) / 2;
  c.scratch.resize(static_cast<size_t>(pairs) * lanes);
  const V minus_half = hn::Set(d, -0.5f);
  const V log_norm = hn::Set(d, c.dim * kLog2Pi);
  V top = hn::Set(d, -HUGE_VALF);
  int pair = 0;
  for (int i = 0; i < c.members; ++i) {
    for (int j = i; j < c.members; ++j, ++pair) {
      V quad, log_sum;
      c.SumsOfPair(d, i, j, &quad, &log_sum);
      const V log_overlap = hn::Mul(minus_half, hn::Add(log_norm, hn::Add(log_sum, quad)));
      hn::StoreU(log_overlap, d, c.scratch.data() + pair * lanes);
      top = hn::Max(top, log_overlap);
    }
  }
  V acc = hn::Zero(d);
  pair = 0;
  for (int i = 0; i < c.members; ++i) {
    for (int j = i; j < c.members; ++j, ++pair) {
      const V e = ExpClamped(d, hn::Sub(hn::LoadU(d, c.scratch.data() + pair * lanes), top));
      acc = hn::MulAdd(hn::Set(d, i == j ? 1.0f : 2.0f), e, acc);
    }
  }
  V sum_lv = hn::Zero(d);
  for (int b = 0; b < c.members; ++b)
    sum_lv = hn::Add(sum_lv, hn::LoadU(d, c.sum_lv.data() + b * lanes));
  // mean over members of H2(p_i) = d/2 ln(4 pi) + 1/2 sum_k ln var_ik
  const V component =
      hn::MulAdd(hn::Set(d, 0.5f / c.members), sum_lv, hn::Set(d, 0.5f * c.dim * kLog4Pi));
  const V two_log_b = hn::Set(d, 2.0f * std::log(static_cast<float>(c.members)));
  const V mixture = hn::Sub(two_log_b, hn::Add(top, hn::Log(d, acc)));
  return hn::Max(hn::Sub(mixture, component), hn::Zero(d));
}

template <typename ChunkFn>
void OverRows(const GaussianSet<float>& set, float* out, ChunkFn chunk_fn) {
  if (set.members == 1) {
    std::fill(out, out + set.rows, 0.0f);
    return;
  }
  const D d;
  const size_t lanes = hn::Lanes(d);
  thread_local std::vector<float> result;
  Chunk c(set, lanes);
  result.resize(lanes);
  for (int first = 0; first < set.rows; first += static_cast<int>(lanes)) {
    const int rows = std::min(static_cast<int>(lanes), set.rows - first);
    c.Load(d, set, first, rows);
    hn::StoreU(chunk_fn(d, c), d, result.data());
    std::copy_n(result.data(), rows, out + first);
  }
}

void PairwiseKlKernel(const GaussianSet<float>& set, float* out) { OverRows(set, out, KlChunk); }

void PairwiseBhattacharyyaKernel(const GaussianSet<float>& set, float* out) {
  OverRows(set, out, BhattacharyyaChunk);
}

void JensenRenyi2Kernel(const GaussianSet<float>& set, float* out) {
  OverRows(set, out, JensenRenyi2Chunk);
}

}  // namespace HWY_NAMESPACE
}  // namespace foray::explore::simd
HWY_AFTER_NAMESPACE();

#if HWY_ONCE
namespace foray::explore::simd {

HWY_EXPORT(PairwiseKlKernel);
HWY_EXPORT(PairwiseBhattacharyyaKernel);
HWY_EXPORT(JensenRenyi2Kernel);

void PairwiseKl(const GaussianSet<float>& set, float* out) {
  HWY_DYNAMIC_DISPATCH(PairwiseKlKernel)(set, out);
}

void PairwiseBhattacharyya(const GaussianSet<float>& set, float* out) {
  HWY_DYNAMIC_DISPATCH(PairwiseBhattacharyyaKernel)(set, out);
}

void JensenRenyi2(const GaussianSet<float>& set, float* out) {
  HWY_DYNAMIC_DISPATCH(JensenRenyi2Kernel)(set, out);
}

}  // namespace foray::explore::simd
#endif  // HWY_ONCE
