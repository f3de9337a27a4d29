// Unit tests of the ensemble: shapes and errors, the log-variance bounds, an exact gradient
// (central finite differences on every parameter block), and the serialisation round trip.

#include "core/model/ensemble.h"

#include <cmath>
#include <cstring>
#include <string>

#include "core/model/serialize.h"
#include "core/util/random.h"
#include "gtest/gtest.h"

namespace foray::model {
namespace {

template <typename Scalar>
Eigen::Matrix<Scalar, Eigen::Dynamic, Eigen::Dynamic> RandomMatrix(int rows, int cols,
                                                                    uint64_t seed) {
  Rng rng(seed);
  Eigen::Matrix<Scalar, Eigen::Dynamic, Eigen::Dynamic> m(rows, cols);
  for (int j = 0; j < cols; ++j)
    for (int i = 0; i < rows; ++i) m(i, j) = static_cast<Scalar>(rng.Normal());
  return m;
}

TEST(EnsembleOptionsTest, RejectsBadSizesNamingTheField) {
  EnsembleOptions options;
  options.ensemble_size = 0;
  EXPECT_EQ(options.Validate().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(options.Validate().message().find("ensemble_size is 0"), std::string::npos);
  options = EnsembleOptions();
  options.hidden_widths = {64, 0};
  EXPECT_NE(options.Validate().message().find("hidden_widths[1] is 0"), std::string::npos);
}

TEST(EnsembleTest, PredictShapesAndPositiveVariance) {
  auto e = Ensemble::Create(4, 2, EnsembleOptions{}, 3);
  ASSERT_TRUE(e.ok()) << e.status();
  std::vector<Eigen::MatrixXf> means, variances;
  ASSERT_TRUE(e->Predict(RandomMatrix<float>(7, 4, 1), RandomMatrix<float>(7, 2, 2), &means,
                         &variances)
                  .ok());
  ASSERT_EQ(means.size(), 5u);
  for (int b = 0; b < 5; ++b) {
    EXPECT_EQ(means[b].rows(), 7);
    EXPECT_EQ(means[b].cols(), 5);
    EXPECT_GT(variances[b].minCoeff(), 0.0f);
  }
}

TEST(EnsembleTest, PredictRejectsWrongDimensions) {
  auto e = Ensemble::Create(4, 2, EnsembleOptions{}, 3);
  std::vector<Eigen::MatrixXf> means, variances;
  absl::Status s =
      e->Predict(RandomMatrix<float>(7, 3, 1), RandomMatrix<float>(7, 2, 2), &means, &variances);
  EXPECT_EQ(s.code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(s.message().find("states have 3 columns, the model expects state_dim 4"),
            std::string::npos)
      << s;
  s = e->Predict(RandomMatrix<float>(7, 4, 1), RandomMatrix<float>(6, 2, 2), &means, &variances);
  EXPECT_NE(s.message().find("states have 7 rows but actions have 6"), std::string::npos) << s;
}

// The two softplus bounds keep lv inside [min_lv, max_lv] for any raw output, up to the
// softness of the lower bound at the top: min + softplus(max - min) exceeds max by
// ln(1 + exp(-(max - min))).
TEST(EnsembleTest, LogVarianceStaysWithinLearnedBounds) {
  EnsembleOptions options;
  options.ensemble_size = 1;
  options.hidden_widths = {8};
  auto e = Ensemble::Create(2, 1, options, 5);
  // Large weights push raw log-variances far beyond both bounds.
  e->mutable_params() *= 200.0f;
  Eigen::MatrixXf mean, log_var;
  e->MemberForward(0, RandomMatrix<float>(500, 3, 9), &mean, &log_var);
  EXPECT_LE(log_var.maxCoeff(), 0.5f + std::log1p(std::exp(-10.5f)) + 1e-6f);
  EXPECT_GT(log_var.maxCoeff(), 0.49f);  // the top bound is reached
  EXPECT_GE(log_var.minCoeff(), -10.0f - 1e-5f);
}

// Gradient check against central finite differences, in double precision, on every parameter
// block (each layer's weights and bias, and both log-variance bounds). Step 1e-6 gives a
// truncation error of order 1e-12 relative to the third derivative (textbook numerical analysis).
class GradientCheckTest : public ::testing::TestWithParam<Activation> {};

TEST_P(GradientCheckTest, MatchesCentralDifferences) {
  using E = EnsembleT<double>;
  EnsembleOptions options;
  options.ensemble_size = 2;
  options.hidden_widths = {6, 5};
  options.activation = GetParam();
  // Bounds near the data's log-variance so that both softplus branches are active.
  options.initial_max_log_var = 0.3;
  options.initial_min_log_var = -0.8;
  auto e = E::Create(3, 2, options, 11);
  ASSERT_TRUE(e.ok());
  e->mutable_params() *= 3.0;  // spread the raw log-variance across both bounds
  const Eigen::MatrixXd x = RandomMatrix<double>(9, 5, 21);
  const Eigen::MatrixXd y = RandomMatrix<double>(9, 4, 22);
  const int member = 1;

  Eigen::VectorXd grad(e->num_member_params());
  Eigen::VectorXd grad_max = Eigen::VectorXd::Zero(4), grad_min = Eigen::VectorXd::Zero(4);
  e->MemberLossAndGradient(member, x, y, grad.data(), &grad_max, &grad_min);

  const double h = 1e-6;
  auto numeric = [&](double* value) {
    const double saved = *value;
    *value = saved + h;
    const double plus = e->MemberLoss(member, x, y);
    *value = saved - h;
    const double minus = e->MemberLoss(member, x, y);
    *value = saved;
    return (plus - minus) / (2 * h);
  };
  for (int l = 0; l < e->num_layers(); ++l) {
    for (int block = 0; block < 2; ++block) {
      const int begin = block == 0 ? e->weight_offset(l) : e->bias_offset(l);
      const int end = block == 0 ? e->bias_offset(l) : e->bias_offset(l) + e->layer_fan_out(l);
      double max_err = 0, max_abs = 0;
      for (int i = begin; i < end; ++i) {
        const double n = numeric(&e->mutable_params()(i, member));
        max_err = std::max(max_err, std::abs(n - grad(i)));
        max_abs = std::max(max_abs, std::abs(n));
      }
      EXPECT_LT(max_err, 1e-7 * std::max(1.0, max_abs) + 1e-9)
          << "layer " << l << (block == 0 ? " weights" : " bias");
    }
  }
  for (int k = 0; k < 4; ++k) {
    EXPECT_NEAR(numeric(&e->mutable_max_log_var()(k)), grad_max(k), 1e-8) << "max_lv " << k;
    EXPECT_NEAR(numeric(&e->mutable_min_log_var()(k)), grad_min(k), 1e-8) << "min_lv " << k;
  }
}

INSTANTIATE_TEST_SUITE_P(Activations, GradientCheckTest,
                         ::testing::Values(Activation::kSilu, Activation::kRelu,
                                           Activation::kTanh));

TEST(SerializeTest, RoundTripIsBitExact) {
  EnsembleOptions options;
  options.hidden_widths = {16, 8};
  options.activation = Activation::kTanh;
  auto e = Ensemble::Create(3, 2, options, 4);
  e->set_version(42);
  e->mutable_input_normalizer().mutable_mean() << 1, 2, 3, 4, 5;
  e->mutable_output_normalizer().mutable_std() << 0.5, 0.25, 2, 3;
  const std::string bytes = SerializeEnsemble(*e);
  auto back = DeserializeEnsemble(bytes);
  ASSERT_TRUE(back.ok()) << back.status();
  EXPECT_EQ(back->version(), 42u);
  EXPECT_EQ(back->activation(), Activation::kTanh);
  EXPECT_EQ(back->hidden_widths(), options.hidden_widths);
  EXPECT_EQ(SerializeEnsemble(*back), bytes);
  EXPECT_EQ(std::memcmp(back->params().data(), e->params().data(),
                        e->params().size() * sizeof(float)),
            0);
}

// Checkpoints written before termination heads (format 1: no head flag) still load, without a
// head; format 2 keeps the head bit for bit.
TEST(SerializeTest, FormatOneLoadsWithoutAHeadAndFormatTwoKeepsIt) {
  EnsembleOptions old_layout;
  old_layout.hidden_widths = {8};
  old_layout.termination_head = false;
  auto e = Ensemble::Create(2, 1, old_layout, 6);
  std::string bytes = SerializeEnsemble(*e);
  // Format 1 is format 2 without the flag word after the hidden widths: header "FORAYENS",
  // format, state_dim, action_dim, members, activation, layer count, 1 width, then the flag.
  const size_t flag_at = 8 + 4 * 7;
  std::string format_one = bytes.substr(0, flag_at) + bytes.substr(flag_at + 4);
  const uint32_t one = 1;
  std::memcpy(&format_one[8], &one, 4);
  auto back = DeserializeEnsemble(format_one);
  ASSERT_TRUE(back.ok()) << back.status();
  EXPECT_FALSE(back->has_termination_head());
  EXPECT_EQ(back->params(), e->params());

  auto headed = Ensemble::Create(2, 1, EnsembleOptions{}, 6);
  auto again = DeserializeEnsemble(SerializeEnsemble(*headed));
  ASSERT_TRUE(again.ok());
  EXPECT_TRUE(again->has_termination_head());
  EXPECT_EQ(again->params(), headed->params());
}

// A head added to a model without one leaves its Gaussians as they were and predicts the
// initial probability everywhere.
TEST(EnsembleTest, AddedTerminationHeadKeepsTheGaussians) {
  EnsembleOptions options;
  options.termination_head = false;
  options.hidden_widths = {12, 7};
  auto e = Ensemble::Create(3, 2, options, 9);
  ASSERT_TRUE(e.ok());
  const Ensemble headed = e->WithTerminationHead(0.02);
  ASSERT_TRUE(headed.has_termination_head());
  const Eigen::MatrixXf states = RandomMatrix<float>(20, 3, 1), actions = RandomMatrix<float>(20, 2, 2);
  std::vector<Eigen::MatrixXf> m0, v0, m1, v1;
  ASSERT_TRUE(e->Predict(states, actions, &m0, &v0).ok());
  ASSERT_TRUE(headed.Predict(states, actions, &m1, &v1).ok());
  for (int b = 0; b < e->size(); ++b) {
    EXPECT_EQ(m0[b], m1[b]);
    EXPECT_EQ(v0[b], v1[b]);
  }
  Eigen::MatrixXf p;
  ASSERT_TRUE(headed.PredictTermination(states, actions, &p).ok());
  EXPECT_NEAR(p.minCoeff(), 0.02, 1e-6);
  EXPECT_NEAR(p.maxCoeff(), 0.02, 1e-6);
  ASSERT_TRUE(e->PredictTermination(states, actions, &p).ok());
  EXPECT_EQ(p.cwiseAbs().maxCoeff(), 0.0f);  // no head: nothing ends
}

TEST(SerializeTest, TruncatedBytesAreDataLoss) {
  auto e = Ensemble::Create(3, 2, EnsembleOptions{}, 4);
  const std::string bytes = SerializeEnsemble(*e);
  auto back = DeserializeEnsemble(std::string_view(bytes).substr(0, bytes.size() - 3));
  EXPECT_EQ(back.status().code(), absl::StatusCode::kDataLoss);
  EXPECT_NE(back.status().message().find("parameters"), std::string::npos);
  EXPECT_EQ(DeserializeEnsemble("garbage").status().code(), absl::StatusCode::kDataLoss);
}

TEST(SerializeTest, TrailingBytesAreRejected) {
  auto e = Ensemble::Create(3, 2, EnsembleOptions{}, 4);
  const std::string bytes = SerializeEnsemble(*e) + "xx";
  EXPECT_EQ(DeserializeEnsemble(bytes).status().code(), absl::StatusCode::kInvalidArgument);
}

}  // namespace
}  // namespace foray::model
