// The packed ensemble (PackedEnsemble, the planner's copy) computes what the reference ensemble
// computes (Ensemble::MemberForward, itself checked against PyTorch in torch_parity_test.cc),
// for shapes that exercise every tile remainder: rows not a multiple of any target's tile,
// widths not a multiple of 16. Every check runs on every SIMD target this machine can run
// (simd::AvailableTargets: AVX-512, AVX2, SSE4, SSSE3 and the emulated fallback on an AVX-512
// x86-64), Highway's pattern of testing each compiled target in turn.

#include "core/model/inference.h"

#include <cmath>
#include <cstring>
#include <functional>
#include <limits>
#include <thread>
#include <tuple>
#include <vector>

#include "core/model/simd_kernels.h"
#include "core/util/random.h"
#include "gtest/gtest.h"
#include "tests/testing/simd_targets.h"

namespace foray::model {
namespace {

template <class F>
void ForEachTarget(F check) {
  testing::ForEachSimdTarget(check);
}

using Param = std::tuple<Activation, std::vector<int>, int /*state_dim*/, int /*rows*/>;

// Every member of the packed copy of `e` against Ensemble::MemberForward at inputs `x`:
// means within 1e-5 relative, log-variances within `lv_tolerance`.
void ExpectMatchesReference(const Ensemble& e, const Eigen::MatrixXf& x, double lv_tolerance,
                            bool require_finite) {
  const int rows = static_cast<int>(x.rows());
  const PackedEnsemble::RowMatrix x_rows = x;
  PackedEnsemble fast(e);
  PackedEnsemble::Workspace ws;
  for (int b = 0; b < e.size(); ++b) {
    Eigen::MatrixXf mean, log_var, logit;
    e.MemberForward(b, x, &mean, &log_var, &logit);
    PackedEnsemble::RowMatrix fast_mean(rows, e.output_dim()), fast_lv(rows, e.output_dim());
    Eigen::VectorXf fast_logit = Eigen::VectorXf::Constant(rows, 123.0f);
    fast.ForwardMember(b, x_rows.data(), rows, fast_mean.data(), fast_lv.data(), &ws,
                       fast_logit.data());
    if (e.has_termination_head()) {
      const double logit_scale = std::max(1.0f, logit.cwiseAbs().maxCoeff());
      EXPECT_LT((fast_logit - logit.col(0)).cwiseAbs().maxCoeff() / logit_scale, 1e-5) << "member " << b;
    } else {
      EXPECT_EQ(fast_logit, Eigen::VectorXf::Constant(rows, 123.0f));  // left alone
    }
    if (require_finite) {
      ASSERT_TRUE(fast_mean.allFinite());
      ASSERT_TRUE(fast_lv.allFinite());
    }
    const double scale = std::max(1.0f, mean.cwiseAbs().maxCoeff());
    EXPECT_LT((fast_mean - mean).cwiseAbs().maxCoeff() / scale, 1e-5) << "member " << b;
    EXPECT_LT((fast_lv - log_var).cwiseAbs().maxCoeff(), lv_tolerance) << "member " << b;
  }
}

class InferenceTest : public ::testing::TestWithParam<Param> {};

TEST_P(InferenceTest, MatchesReferenceForward) {
  const auto& [activation, widths, state_dim, rows] = GetParam();
  EnsembleOptions options;
  options.ensemble_size = 3;
  options.hidden_widths = widths;
  options.activation = activation;
  options.termination_head = state_dim % 2 == 0;  // both layouts
  auto e = Ensemble::Create(state_dim, 2, options, 8);
  ASSERT_TRUE(e.ok());
  e->mutable_params() *= 2.0f;  // reach both log-variance bounds
  e->mutable_params().row(0).array() += 0.1f;
  Rng rng(3);
  Eigen::MatrixXf x(rows, e->input_dim());
  for (int j = 0; j < x.cols(); ++j)
    for (int i = 0; i < rows; ++i) x(i, j) = static_cast<float>(2 * rng.Normal());
  ForEachTarget([&] { ExpectMatchesReference(*e, x, 1e-5 * 10, /*require_finite=*/false); });
}

// Pre-activations far outside [-88, 88], where the fast path's exponential clamps its argument:
// SiLU must still give z for large z and (almost) 0 for very negative z, as the reference does
// (Eigen's exp saturates to inf and 0 there).
TEST(InferenceExtremeTest, SiluSaturatesLikeReference) {
  EnsembleOptions options;
  options.ensemble_size = 2;
  options.hidden_widths = {32};
  options.activation = Activation::kSilu;
  auto e = Ensemble::Create(3, 1, options, 5);
  ASSERT_TRUE(e.ok());
  e->mutable_params() *= 40.0f;
  const int rows = 50;
  Eigen::MatrixXf x(rows, e->input_dim());
  for (int i = 0; i < rows; ++i) {
    for (int j = 0; j < x.cols(); ++j) x(i, j) = static_cast<float>((i - rows / 2) * (j + 1)) * 2.0f;
  }
  ForEachTarget([&] { ExpectMatchesReference(*e, x, 1e-4, /*require_finite=*/true); });
}

// Bounds beyond the one-step form's range ([-60, 60]) run the two-step softplus chain: the
// packed forward still matches the reference, at inputs that reach both bounds.
TEST(InferenceExtremeTest, BoundsBeyondTheOneStepRangeMatchReference) {
  EnsembleOptions options;
  options.ensemble_size = 2;
  options.hidden_widths = {32};
  auto e = Ensemble::Create(3, 1, options, 5);
  ASSERT_TRUE(e.ok());
  e->mutable_max_log_var().setConstant(95.0f);
  e->mutable_min_log_var().setConstant(-90.0f);
  e->mutable_params() *= 30.0f;
  const int rows = 60;
  Eigen::MatrixXf x(rows, e->input_dim());
  for (int i = 0; i < rows; ++i) {
    for (int j = 0; j < x.cols(); ++j)
      x(i, j) = static_cast<float>((i - rows / 2) * (j + 1)) * 0.5f;
  }
  ForEachTarget([&] { ExpectMatchesReference(*e, x, 1e-4 * 95, /*require_finite=*/true); });
}

// A workspace kept across model versions (as a trainer's threads keep theirs from epoch to
// epoch) must not carry one version's log-variance bounds into the next: the second model's
// outputs through a used workspace equal those through a fresh one.
TEST(InferenceWorkspaceTest, ReusedAcrossModelsGivesEachModelsOwnBounds) {
  auto first = Ensemble::Create(3, 1, EnsembleOptions{}, 5);
  ASSERT_TRUE(first.ok());
  Ensemble second = *first;
  second.mutable_max_log_var().array() -= 2.0f;  // bounds that bind at these inputs
  second.mutable_min_log_var().array() += 7.0f;
  const int rows = 40;
  PackedEnsemble::RowMatrix x(rows, first->input_dim());
  Rng rng(3);
  for (int i = 0; i < x.size(); ++i) x.data()[i] = static_cast<float>(rng.Normal());
  const int d = first->output_dim();
  ForEachTarget([&] {
    std::vector<float> mean(rows * d), used_lv(rows * d), fresh_lv(rows * d);
    PackedEnsemble::Workspace used;
    PackedEnsemble(*first).ForwardMember(0, x.data(), rows, mean.data(), used_lv.data(), &used);
    const PackedEnsemble fast_second(second);
    fast_second.ForwardMember(0, x.data(), rows, mean.data(), used_lv.data(), &used);
    PackedEnsemble::Workspace fresh;
    fast_second.ForwardMember(0, x.data(), rows, mean.data(), fresh_lv.data(), &fresh);
    EXPECT_EQ(used_lv, fresh_lv);
  });
}

// ForwardAll splits members and blocks of rows into tasks; on each target, the numbers must
// not depend on how the tasks are spread over threads (plans are reproducible at any thread
// count), nor on where the output buffers lie (offset by one float: an unaligned start).
TEST(InferenceSplitTest, EveryTargetGivesTheSameBitsUnderAnyThreadSplit) {
  EnsembleOptions options;
  options.ensemble_size = 3;
  options.hidden_widths = {48, 48};
  auto e = Ensemble::Create(5, 2, options, 9);
  ASSERT_TRUE(e.ok());
  const PackedEnsemble fast(*e);
  const int rows = 2 * PackedEnsemble::kBlockRows + 77;  // three blocks per member, one ragged
  PackedEnsemble::RowMatrix x(rows, e->input_dim());
  Rng rng(11);
  for (int i = 0; i < x.size(); ++i) x.data()[i] = static_cast<float>(rng.Normal());
  const size_t n = static_cast<size_t>(e->size()) * rows * e->output_dim();
  ForEachTarget([&] {
    std::vector<float> mean(n), lv(n), mean2(n + 1), lv2(n + 1);
    fast.ForwardAll(x.data(), rows, mean.data(), lv.data(), ParallelFor());
    // Tasks in reverse order on two threads of our own.
    const ParallelFor two = [](int tasks, const std::function<void(int)>& task) {
      std::thread other([&] {
        for (int i = tasks - 1; i >= 0; i -= 2) task(i);
      });
      for (int i = tasks - 2; i >= 0; i -= 2) task(i);
      other.join();
    };
    fast.ForwardAll(x.data(), rows, mean2.data() + 1, lv2.data() + 1, two);
    EXPECT_EQ(0, std::memcmp(mean.data(), mean2.data() + 1, n * sizeof(float)));
    EXPECT_EQ(0, std::memcmp(lv.data(), lv2.data() + 1, n * sizeof(float)));
  });
}

// The kernels' elementwise functions against the C library (glibc's expf and log1pf, correctly
// rounded or within 1 ulp): SiLU z / (1 + e^-z) over [-100, 100] and the log-variance bounds'
// softplus chain, relative 2e-6 (a few float ulps: Highway documents 1 ulp for its Exp and 2
// for Log1p, and the reciprocal's Newton step adds about 1e-7).
TEST(SimdKernelTest, ElementwiseFunctionsMatchTheCLibrary) {
  const int count = 4001;
  std::vector<float> z(count);
  for (int i = 0; i < count; ++i) z[i] = -100.0f + 200.0f * i / (count - 1);
  // Identity weights: y = act(x I + 0), one row of `count` inputs padded to 16.
  const int width = (count + simd::kPadFloats - 1) / simd::kPadFloats * simd::kPadFloats;
  ForEachTarget([&] {
    for (int i = 0; i < count; i += 97) {
      // One row, one input: y[c] = silu(z_i * w[c]) with w = 1 at every column.
      std::vector<float> w(width, 1.0f), bias(width, 0.0f), y(width);
      simd::Dense(&z[i], 1, 1, 1, w.data(), width, bias.data(), y.data(), width, simd::Act::kSilu);
      const double expect = z[i] / (1.0 + std::exp(-static_cast<double>(z[i])));
      EXPECT_NEAR(y[0], expect, 2e-6 * std::max(1.0, std::abs(expect))) << "silu at " << z[i];
      EXPECT_EQ(y[0], y[width - 1]);
    }
    // The training's activation with its slope: silu(z) and silu'(z) = s (1 + z (1 - s)),
    // tanh and 1 - tanh^2 against glibc's tanh, relu and its 0/1 step.
    for (simd::Act act : {simd::Act::kSilu, simd::Act::kTanh, simd::Act::kRelu}) {
      std::vector<float> a = z, slope(count);
      simd::ActivateWithSlope(act, a.data(), slope.data(), count);
      for (int i = 0; i < count; ++i) {
        const double x = z[i];
        double value, derivative;
        if (act == simd::Act::kSilu) {
          const double sig = 1.0 / (1.0 + std::exp(-x));
          value = x * sig;
          derivative = sig * (1.0 + x * (1.0 - sig));
        } else if (act == simd::Act::kTanh) {
          value = std::tanh(x);
          derivative = 1.0 - value * value;
        } else {
          value = x > 0 ? x : 0.0;
          derivative = x > 0 ? 1.0 : 0.0;
        }
        ASSERT_NEAR(a[i], value, 2e-6 * std::max(1.0, std::abs(value))) << static_cast<int>(act) << " at " << x;
        ASSERT_NEAR(slope[i], derivative, 4e-6) << "slope " << static_cast<int>(act) << " at " << x;
      }
    }
    std::vector<float> v = z, hi(count, 0.5f), lo(count, -10.0f);
    simd::BoundLogVar(v.data(), hi.data(), lo.data(), count);
    auto softplus = [](double t) { return std::max(t, 0.0) + std::log1p(std::exp(-std::abs(t))); };
    for (int i = 0; i < count; ++i) {
      const double upper = 0.5 - softplus(0.5 - z[i]);
      const double expect = -10.0 + softplus(upper + 10.0);
      ASSERT_NEAR(v[i], expect, 2e-6 * std::max(1.0, std::abs(expect))) << "bounds at " << z[i];
    }
    // The one-step form ln(e^lo + 1 / (e^-hi + e^-v)) against the same softplus chain in double,
    // at the edges of the bounds it accepts ([-60, 60]) and with inputs far beyond them (the
    // chain's limits there are lo and hi); same tolerance, and an odd count for the padded tail.
    struct Bounds {
      float hi, lo;
    };
    for (const Bounds b : {Bounds{0.5f, -10.0f}, Bounds{60.0f, -60.0f}, Bounds{-3.0f, -5.0f},
                           Bounds{10.0f, 9.5f}, Bounds{-59.0f, -60.0f}, Bounds{60.0f, 59.0f}}) {
      std::vector<float> x = z;
      for (float extra : {-1e4f, 1e4f, -87.5f, 87.5f, -std::numeric_limits<float>::infinity(),
                          std::numeric_limits<float>::infinity()})
        x.push_back(extra);
      const size_t n = x.size();
      std::vector<float> y = x, exp_neg_hi(n, std::exp(-b.hi)), exp_lo(n, std::exp(b.lo));
      simd::BoundLogVarFromExp(y.data(), exp_neg_hi.data(), exp_lo.data(), n);
      for (size_t i = 0; i < n; ++i) {
        const double upper = b.hi - softplus(static_cast<double>(b.hi) - x[i]);
        const double expect = b.lo + softplus(upper - b.lo);
        ASSERT_NEAR(y[i], expect, 2e-6 * std::max(1.0, std::abs(expect)))
            << "one-step bounds " << b.hi << ", " << b.lo << " at " << x[i];
      }
    }
  });
}

// The training's product kernel against the definition c_ij = bias_i + sum_k a_ik b_kj, summed
// in double: every operand layout the training uses (either operand read transposed), widths
// with and without a partial last vector, a single row, column and step. Tolerance: 2e-6 of
// sum_k |a_ik b_kj| (float rounding of a k-term sum grows about like sqrt(k) ulps; common
// practice). On one target the same element comes out bit for bit whatever m and n are.
TEST(SimdKernelTest, GemmMatchesTheDefinitionInEveryLayout) {
  struct Shape { int m, n, k; };
  const Shape shapes[] = {{1, 1, 1}, {7, 5, 3}, {13, 37, 64}, {64, 256, 65}, {6, 33, 1}, {5, 64, 256}};
  Rng rng(11);
  ForEachTarget([&] {
    for (const Shape& s : shapes) {
      for (int a_transposed = 0; a_transposed < 2; ++a_transposed) {
        for (int b_transposed = 0; b_transposed < 2; ++b_transposed) {
          SCOPED_TRACE(::testing::Message() << s.m << "x" << s.n << "x" << s.k << " a^T " << a_transposed
                                          << " b^T " << b_transposed);
          std::vector<float> a(s.m * s.k), b(s.k * s.n), bias(s.m);
          for (float& v : a) v = static_cast<float>(rng.Normal());
          for (float& v : b) v = static_cast<float>(rng.Normal());
          for (float& v : bias) v = static_cast<float>(rng.Normal());
          const ptrdiff_t a_row = a_transposed ? 1 : s.k, a_col = a_transposed ? s.m : 1;
          const ptrdiff_t b_row = b_transposed ? 1 : s.n, b_col = b_transposed ? s.k : 1;
          const int ldc = s.n + 3;  // rows of c wider than n: the columns past n stay untouched
          std::vector<float> c(s.m * ldc, 7.0f);
          const bool with_bias = (s.m + s.n) % 2 == 0;
          simd::Gemm(s.m, s.n, s.k, a.data(), a_row, a_col, b.data(), b_row, b_col,
                     with_bias ? bias.data() : nullptr, c.data(), ldc);
          for (int i = 0; i < s.m; ++i) {
            for (int j = 0; j < s.n; ++j) {
              double sum = with_bias ? bias[i] : 0.0, scale = 1.0;
              for (int kk = 0; kk < s.k; ++kk) {
                const double t = static_cast<double>(a[i * a_row + kk * a_col]) * b[kk * b_row + j * b_col];
                sum += t;
                scale += std::abs(t);
              }
              ASSERT_NEAR(c[i * ldc + j], sum, 2e-6 * scale) << "c[" << i << "][" << j << "]";
            }
            for (int j = s.n; j < ldc; ++j) ASSERT_EQ(c[i * ldc + j], 7.0f);
          }
          // The last row and the last column alone: the same bits.
          float corner = 0.0f;
          const int i = s.m - 1, j = s.n - 1;
          simd::Gemm(1, 1, s.k, a.data() + i * a_row, a_row, a_col, b.data() + j * b_col, b_row,
                     b_col, with_bias ? bias.data() + i : nullptr, &corner, 1);
          ASSERT_EQ(corner, c[i * ldc + j]);
        }
      }
    }
  });
}

INSTANTIATE_TEST_SUITE_P(
    Shapes, InferenceTest,
    ::testing::Values(Param{Activation::kSilu, {64, 64, 64}, 4, 1000},
                      Param{Activation::kSilu, {200, 200, 200}, 14, 37},
                      Param{Activation::kRelu, {24, 40}, 3, 13},
                      Param{Activation::kTanh, {70}, 9, 6},
                      Param{Activation::kSilu, {16}, 1, 1},
                      Param{Activation::kTanh, {130, 17}, 20, 5}));

}  // namespace
}  // namespace foray::model
