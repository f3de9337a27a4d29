// The ensemble against PyTorch (Debian's python3-torch): the same weights give the same outputs,
// the same NLL gradients (torch.autograd on torch.nn.functional.gaussian_nll_loss), the same
// termination-head logits, BCE and gradients (binary_cross_entropy_with_logits with
// pos_weight), and the trainer's steps equal torch.optim.AdamW's. The reference script is
// torch_reference.py beside this file; it computes in float64 from float32-representable values, so
// the figures below are the float32 error of the C++ code.
//
// Errors are max |c++ - torch| over a block divided by max |torch| of the block. The forward
// and gradient checks run on every SIMD target the machine supports (the training's products
// and activations and the planner's packed forward are Highway kernels dispatched at run time).

#include <string>

#include "core/model/ensemble.h"
#include "core/model/inference.h"
#include "core/model/trainer.h"
#include "gtest/gtest.h"
#include "tests/testing/reference.h"
#include "tests/testing/simd_targets.h"

namespace foray::model {
namespace {

using Arrays = std::map<std::string, Eigen::MatrixXd>;
using foray::testing::RelativeError;

Arrays RunReference(const std::string& args, const std::string& name) {
  const auto dir = foray::testing::FreshDir(name);
  std::string output;
  const int rc = foray::testing::RunPython("tests/core/model/torch_reference.py",
                                           args + " --out " + dir.string(), &output);
  EXPECT_EQ(rc, 0) << output;
  return foray::testing::LoadArrays(dir);
}

// Builds the C++ ensemble holding the reference's weights.
Ensemble FromReference(const Arrays& a) {
  const Eigen::MatrixXd& meta = a.at("meta");
  EnsembleOptions options;
  options.ensemble_size = static_cast<int>(meta(2));
  options.termination_head = a.count("head") == 0 || a.at("head")(0) != 0;
  options.activation = static_cast<Activation>(static_cast<int>(meta(3)));
  options.hidden_widths.clear();
  for (int i = 4; i < meta.rows(); ++i) options.hidden_widths.push_back(static_cast<int>(meta(i)));
  auto e = Ensemble::Create(static_cast<int>(meta(0)), static_cast<int>(meta(1)), options, 0);
  EXPECT_TRUE(e.ok()) << e.status();
  for (int b = 0; b < e->size(); ++b) {
    for (int l = 0; l < e->num_layers(); ++l) {
      const Eigen::MatrixXf w =
          a.at("w_" + std::to_string(b) + "_" + std::to_string(l)).cast<float>();
      const Eigen::MatrixXf bias =
          a.at("bias_" + std::to_string(b) + "_" + std::to_string(l)).cast<float>();
      EXPECT_EQ(w.rows(), e->layer_fan_in(l));
      EXPECT_EQ(w.cols(), e->layer_fan_out(l));
      Eigen::Map<Eigen::MatrixXf>(e->mutable_params().col(b).data() + e->weight_offset(l), w.rows(),
                                  w.cols()) = w;
      Eigen::Map<Eigen::VectorXf>(e->mutable_params().col(b).data() + e->bias_offset(l),
                                  bias.size()) = bias;
    }
  }
  e->mutable_max_log_var() = a.at("max_lv").cast<float>();
  e->mutable_min_log_var() = a.at("min_lv").cast<float>();
  if (a.count("in_mean")) {
    e->mutable_input_normalizer().mutable_mean() = a.at("in_mean").cast<float>();
    e->mutable_input_normalizer().mutable_std() = a.at("in_std").cast<float>();
    e->mutable_output_normalizer().mutable_mean() = a.at("out_mean").cast<float>();
    e->mutable_output_normalizer().mutable_std() = a.at("out_std").cast<float>();
  }
  return *std::move(e);
}

// "tanh" runs without a termination head (the layout of models saved before it); "silu_beta"
// takes the gradients of the beta-NLL with beta 0.5 (Seitzer et al., ICLR 2022);
// "silu_reward_beta" the same with the reward's column at beta 1.
class TorchForwardTest : public ::testing::TestWithParam<std::string> {};

TEST_P(TorchForwardTest, OutputsAndGradientsMatchTorch) {
  const bool head = GetParam() != "tanh";
  const bool reward_beta = GetParam() == "silu_reward_beta";
  const bool beta = GetParam() == "silu_beta" || reward_beta;
  const std::string activation = beta ? "silu" : GetParam();
  const Arrays a = RunReference("--case forward --activation " + activation +
                                    (head ? "" : " --no_head") + (beta ? " --nll_beta 0.5" : "") +
                                    (reward_beta ? " --reward_nll_beta 1" : ""),
                                "fwd-" + GetParam());
  ASSERT_FALSE(a.empty());
  const Ensemble e = FromReference(a);
  ASSERT_EQ(e.has_termination_head(), head);
  const Eigen::MatrixXf x = a.at("x_norm").cast<float>();
  Eigen::MatrixXf y = a.at("target").cast<float>();
  if (head) {
    y.conservativeResize(Eigen::NoChange, y.cols() + 1);
    y.col(y.cols() - 1) = a.at("terminal").cast<float>();
  }
  Ensemble::LossOptions loss_options;
  loss_options.pos_weight = a.at("pos_weight")(0);
  loss_options.nll_beta = beta ? 0.5 : 0.0;
  loss_options.reward_nll_beta = reward_beta ? 1.0 : loss_options.nll_beta;
  foray::testing::ForEachSimdTarget([&] {
    Eigen::MatrixXf probability;
    ASSERT_TRUE(e.PredictTermination(a.at("states").cast<float>(), a.at("actions").cast<float>(),
                                     &probability)
                    .ok());
    std::vector<Eigen::MatrixXf> raw_means, raw_vars;
    ASSERT_TRUE(e.Predict(a.at("states").cast<float>(), a.at("actions").cast<float>(), &raw_means,
                          &raw_vars)
                    .ok());
    for (int b = 0; b < e.size(); ++b) {
      const std::string s = std::to_string(b);
      Eigen::MatrixXf mean, log_var, logit;
      e.MemberForward(b, x, &mean, &log_var, &logit);
      if (head) {
        EXPECT_LT(RelativeError(logit.cast<double>(), a.at("logit_" + s)), 1e-5) << "member " << b;
        EXPECT_LT(RelativeError(probability.col(b).cast<double>(), a.at("probability_" + s)), 1e-5);
      } else {
        EXPECT_EQ(logit.cols(), 0);
        EXPECT_EQ(probability.col(b).cwiseAbs().maxCoeff(), 0.0f);
      }
      // Issue target: same outputs within 1e-5 relative.
      EXPECT_LT(RelativeError(mean.cast<double>(), a.at("mean_" + s)), 1e-5) << "member " << b;
      EXPECT_LT(RelativeError(log_var.cast<double>(), a.at("log_var_" + s)), 1e-5)
          << "member " << b;
      EXPECT_LT(RelativeError(raw_means[b].cast<double>(), a.at("raw_mean_" + s)), 1e-5);
      EXPECT_LT(RelativeError(raw_vars[b].cast<double>(), a.at("raw_var_" + s)), 1e-5);

      Eigen::VectorXf grad(e.num_member_params());
      Eigen::VectorXf grad_max = Eigen::VectorXf::Zero(e.output_dim());
      Eigen::VectorXf grad_min = Eigen::VectorXf::Zero(e.output_dim());
      float bce = -1;
      const float loss = e.MemberLossAndGradient(b, x, y, grad.data(), &grad_max, &grad_min,
                                                 nullptr, loss_options, &bce);
      EXPECT_NEAR(loss, a.at("loss_" + s)(0), 1e-5 * std::abs(a.at("loss_" + s)(0)));
      if (head) EXPECT_NEAR(bce, a.at("bce_" + s)(0), 1e-5 * std::abs(a.at("bce_" + s)(0)));
      // Issue target: gradients within 1e-4 relative, per parameter block.
      for (int l = 0; l < e.num_layers(); ++l) {
        const std::string sl = s + "_" + std::to_string(l);
        const Eigen::MatrixXd gw =
            Eigen::Map<Eigen::MatrixXf>(grad.data() + e.weight_offset(l), e.layer_fan_in(l),
                                        e.layer_fan_out(l))
                .cast<double>();
        const Eigen::MatrixXd gb =
            Eigen::Map<Eigen::VectorXf>(grad.data() + e.bias_offset(l), e.layer_fan_out(l))
                .cast<double>();
        EXPECT_LT(RelativeError(gw, a.at("grad_w_" + sl)), 1e-4) << "layer " << l;
        EXPECT_LT(RelativeError(gb, a.at("grad_bias_" + sl)), 1e-4) << "layer " << l;
      }
      EXPECT_LT(RelativeError(grad_max.cast<double>(), a.at("grad_max_lv_" + s)), 1e-4);
      EXPECT_LT(RelativeError(grad_min.cast<double>(), a.at("grad_min_lv_" + s)), 1e-4);
    }
    // The planner's packed forward (simd::Dense) against the same reference.
    const PackedEnsemble::RowMatrix x_rows = x;
    const PackedEnsemble packed(e);
    PackedEnsemble::Workspace ws;
    for (int b = 0; b < e.size(); ++b) {
      const std::string s = std::to_string(b);
      PackedEnsemble::RowMatrix mean(x.rows(), e.output_dim()), log_var(x.rows(), e.output_dim());
      Eigen::VectorXf logit(x.rows());
      packed.ForwardMember(b, x_rows.data(), static_cast<int>(x.rows()), mean.data(),
                           log_var.data(), &ws, logit.data());
      EXPECT_LT(RelativeError(mean.cast<double>(), a.at("mean_" + s)), 1e-5) << "member " << b;
      EXPECT_LT(RelativeError(log_var.cast<double>(), a.at("log_var_" + s)), 1e-5)
          << "member " << b;
      if (head) EXPECT_LT(RelativeError(logit.cast<double>(), a.at("logit_" + s)), 1e-5);
    }
  });
}

INSTANTIATE_TEST_SUITE_P(Activations, TorchForwardTest,
                         ::testing::Values("silu", "relu", "tanh", "silu_beta",
                                           "silu_reward_beta"));

// Full-batch training without bootstrap, holdout or normaliser refit is exactly AdamW on the
// summed member NLL plus the bound penalty: each epoch is one step, as in the reference.
TEST(TorchAdamWTest, TrainerStepsMatchTorchAdamW) {
  const Arrays a = RunReference("--case adamw", "adamw");
  ASSERT_FALSE(a.empty());
  const Ensemble start = FromReference(a);
  const Eigen::MatrixXd& settings = a.at("settings");
  const Eigen::MatrixXf x = a.at("x_norm").cast<float>();
  const Eigen::MatrixXf y = a.at("target").cast<float>();
  // Identity normalisers, so the trainer's normalised data is the reference's x and y:
  // states = x[:, :S], actions = x[:, S:], next_states - states = y[:, :S], rewards = y[:, S].
  const int s = start.state_dim();
  TransitionData data;
  data.states = x.leftCols(s);
  data.actions = x.rightCols(start.action_dim());
  data.next_states = data.states + y.leftCols(s);
  data.rewards = y.col(s);
  data.terminals = a.at("terminal").cast<float>();

  TrainingOptions options;
  options.max_epochs = static_cast<int>(settings(0));
  options.learning_rate = settings(1);
  options.weight_decay = settings(2);
  options.log_var_bound_penalty = settings(3);
  options.batch_size = static_cast<int>(x.rows());
  options.bootstrap = false;
  options.holdout_fraction = 0;
  options.refit_normalizers = false;
  options.patience = 100;
  foray::testing::ForEachSimdTarget([&] {
    auto trainer = EnsembleTrainer::Create(start, data, options);
    ASSERT_TRUE(trainer.ok()) << trainer.status();
    while (!(*trainer)->RunEpoch()) {
    }
    // The kept weights must be the last step's for the comparison to mean anything.
    ASSERT_EQ((*trainer)->Report().best_epoch, options.max_epochs);
    const Ensemble& after = (*trainer)->best();
    for (int b = 0; b < after.size(); ++b) {
      for (int l = 0; l < after.num_layers(); ++l) {
        const std::string sl = std::to_string(b) + "_" + std::to_string(l);
        const Eigen::MatrixXd w =
            Eigen::Map<const Eigen::MatrixXf>(after.params().col(b).data() + after.weight_offset(l),
                                              after.layer_fan_in(l), after.layer_fan_out(l))
                .cast<double>();
        const Eigen::MatrixXd bias =
            Eigen::Map<const Eigen::VectorXf>(after.params().col(b).data() + after.bias_offset(l),
                                              after.layer_fan_out(l))
                .cast<double>();
        EXPECT_LT(RelativeError(w, a.at("after_w_" + sl)), 1e-5) << sl;
        EXPECT_LT(RelativeError(bias, a.at("after_bias_" + sl)), 1e-5) << sl;
      }
    }
    EXPECT_LT(RelativeError(after.max_log_var().cast<double>(), a.at("after_max_lv")), 1e-5);
    EXPECT_LT(RelativeError(after.min_log_var().cast<double>(), a.at("after_min_lv")), 1e-5);
  });
}

}  // namespace
}  // namespace foray::model
