// The packed ensemble (PackedEnsemble, the planner's copy) computes what the reference ensemble
// computes (Ensemble::MemberForward, itself checked against PyTorch in torch_parity_test.cc),
// for shapes that exercise every tile remainder: rows not a multiple of the 6-row tile, widths
// not a multiple of 16.

#include "core/model/inference.h"

#include <tuple>
#include <vector>

#include "core/util/random.h"
#include "gtest/gtest.h"

namespace foray::model {
namespace {

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
  ExpectMatchesReference(*e, x, 1e-5 * 10, /*require_finite=*/false);
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
  ExpectMatchesReference(*e, x, 1e-4, /*require_finite=*/true);
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
  std::vector<float> mean(rows * d), used_lv(rows * d), fresh_lv(rows * d);

  PackedEnsemble::Workspace used;
  PackedEnsemble(*first).ForwardMember(0, x.data(), rows, mean.data(), used_lv.data(), &used);
  const PackedEnsemble fast_second(second);
  fast_second.ForwardMember(0, x.data(), rows, mean.data(), used_lv.data(), &used);
  PackedEnsemble::Workspace fresh;
  fast_second.ForwardMember(0, x.data(), rows, mean.data(), fresh_lv.data(), &fresh);
  EXPECT_EQ(used_lv, fresh_lv);
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
