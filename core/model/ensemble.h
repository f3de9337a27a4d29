// An ensemble of B probabilistic MLPs that model a robot's dynamics and reward.
// A const ensemble may be evaluated from several threads at once; changing it is not
// thread-safe (training works on its own copy and publishes the result).
//
// Member b maps a normalised input x = clip(norm([state, action]), +-kInputClip) to a diagonal
// Gaussian over the normalised target y = norm([next_state - state, reward]) (Chua et al.
// 2018, "Deep Reinforcement Learning in a Handful of Trials using Probabilistic Dynamics
// Models"):
//   h_0 = x,  h_l = act(h_{l-1} W_l + b_l)  for the hidden layers,
//   [mu, raw, z] = h_L W_out + b_out,        mu and raw each (output_dim), z one column,
//   lv = max_lv - softplus(max_lv - raw),  lv = min_lv + softplus(lv - min_lv),
// with the log-variance bounds max_lv, min_lv learned and shared by all members. z is the
// termination head's logit: p_term = sigmoid(z) is the probability that the transition ends
// the episode (an irrecoverable state: a dropped object, a fall). It exists when the ensemble
// was made with a termination head (the default; models saved before it have none).
//
//   auto ensemble = Ensemble::Create(/*state_dim=*/4, /*action_dim=*/1, EnsembleOptions{}, 7);
//   std::vector<Eigen::MatrixXf> means, variances;
//   ensemble->Predict(states, actions, &means, &variances);
#ifndef FORAY_CORE_MODEL_ENSEMBLE_H_
#define FORAY_CORE_MODEL_ENSEMBLE_H_

#include <cstdint>
#include <vector>

#include "Eigen/Core"
#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "core/model/normalizer.h"

namespace foray::model {

enum class Activation { kSilu = 1, kRelu = 2, kTanh = 3 };

// Architecture of an ensemble.
struct EnsembleOptions {
  // Number of members B. Range 1..32.
  int ensemble_size = 5;
  // Widths of the hidden layers. 1..8 layers, each 1..2048 wide.
  std::vector<int> hidden_widths = {64, 64, 64};
  Activation activation = Activation::kSilu;
  // Initial log-variance bounds, in normalised output units (nats of log variance). The values
  // are those of Chua et al. 2018's reference setup (common practice, quoted from memory).
  double initial_max_log_var = 0.5;
  double initial_min_log_var = -10.0;
  // A termination head: one more output column per member, a Bernoulli logit.
  bool termination_head = true;

  absl::Status Validate() const;
};

template <typename Scalar>
class EnsembleT {
 public:
  // Normalised inputs are clipped to +-kInputClip standard deviations of the training data, in
  // training and in every prediction. A dimension that barely varied in the data (an object at
  // rest: a few distinct positions) has a tiny standard deviation, and a new value of it lands
  // hundreds of them away; unclipped, the members extrapolate without bound there, and a
  // rollout that feeds such predictions back grows to infinity within a horizon. Clipping
  // observations at a multiple of their running standard deviation is common practice in
  // reinforcement learning (10 is a usual choice); it bounds what a member can output.
  static constexpr float kInputClip = 10.0f;

  // Matrices are column-major; a "row per sample" matrix has one sample per row.
  using Matrix = Eigen::Matrix<Scalar, Eigen::Dynamic, Eigen::Dynamic>;
  using Vector = Eigen::Matrix<Scalar, Eigen::Dynamic, 1>;

  // Copyable and movable: a copy is an independent model.
  EnsembleT() = default;

  // A new ensemble with weights drawn from a truncated normal of standard deviation
  // 1 / (2 sqrt(fan_in)) and zero biases (common practice for these models), identity
  // normalisers and the initial log-variance bounds. InvalidArgument on bad dimensions/options.
  static absl::StatusOr<EnsembleT> Create(int state_dim, int action_dim,
                                          const EnsembleOptions& options, uint64_t seed);

  int state_dim() const { return state_dim_; }
  int action_dim() const { return action_dim_; }
  int input_dim() const { return state_dim_ + action_dim_; }
  // Outputs are the state delta then the reward: state_dim + 1.
  int output_dim() const { return state_dim_ + 1; }
  int size() const { return static_cast<int>(params_.cols()); }
  bool has_termination_head() const { return termination_head_; }
  Activation activation() const { return activation_; }
  const std::vector<int>& hidden_widths() const { return hidden_widths_; }

  // Parameter layout of one member: for each layer l (hidden layers, then the output layer of
  // width 2 * output_dim, plus 1 with a termination head), the weights W_l as a column-major (fan_in, fan_out) block, then the
  // bias (fan_out). Column b of params() holds member b.
  int num_layers() const { return static_cast<int>(hidden_widths_.size()) + 1; }
  int layer_fan_in(int layer) const;
  int layer_fan_out(int layer) const;
  int weight_offset(int layer) const { return offsets_[2 * layer]; }
  int bias_offset(int layer) const { return offsets_[2 * layer + 1]; }
  int num_member_params() const { return offsets_.empty() ? 0 : offsets_.back(); }

  // (num_member_params, B).
  const Matrix& params() const { return params_; }
  Matrix& mutable_params() { return params_; }
  // (output_dim) each, normalised units.
  const Vector& max_log_var() const { return max_log_var_; }
  const Vector& min_log_var() const { return min_log_var_; }
  Vector& mutable_max_log_var() { return max_log_var_; }
  Vector& mutable_min_log_var() { return min_log_var_; }
  // Over [state, action] (input_dim) and over [state delta, reward] (output_dim).
  const Normalizer<Scalar>& input_normalizer() const { return input_normalizer_; }
  const Normalizer<Scalar>& output_normalizer() const { return output_normalizer_; }
  Normalizer<Scalar>& mutable_input_normalizer() { return input_normalizer_; }
  Normalizer<Scalar>& mutable_output_normalizer() { return output_normalizer_; }

  // Version number given when the model is published; 0 for a model never published.
  uint64_t version() const { return version_; }
  void set_version(uint64_t version) { version_ = version; }

  // --- Normalised space ------------------------------------------------------------------

  // Member `member` on x (rows, input_dim), normalised inputs. Writes mean and bounded
  // log-variance, each (rows, output_dim), normalised outputs, and when term_logit is not null
  // the termination logit (rows, 1) (zeros-sized (rows, 0) without a head). Aborts on a shape
  // mismatch (internal entry point; the raw-unit entry points below validate).
  void MemberForward(int member, const Matrix& x, Matrix* mean, Matrix* log_var,
                     Matrix* term_logit = nullptr) const;

  // Mean Gaussian negative log-likelihood per element of member `member` on (x, y):
  //   L = 1/(rows * output_dim) * sum 0.5 * [ (mu - y)^2 exp(-lv) + lv + ln(2 pi) ],
  // x: (rows, input_dim), y: (rows, output_dim), normalised. Writes dL/dgrad of the member to
  // grad_params (num_member_params scalars, overwritten) and adds dL/dmax_lv and dL/dmin_lv
  // to *grad_max_log_var and *grad_min_log_var (output_dim each). Returns L.
  // With a termination head, y may carry one more column, the terminal flag t (0 or 1); then
  // the head is trained too, by the weighted binary cross-entropy of PyTorch's
  // binary_cross_entropy_with_logits(z, t, pos_weight=w_pos) (mean over rows):
  //   BCE = 1/rows * sum -[ w_pos t ln sigmoid(z) + (1 - t) ln(1 - sigmoid(z)) ],
  // the gradient is that of L + termination.weight * BCE, and BCE is written to
  // *termination_bce (when not null). Without the column the head's gradient is zero.
  // With loss.nll_beta = beta > 0 the gradient is that of the beta-NLL of Seitzer et al.
  // (ICLR 2022, "On the pitfalls of heteroscedastic uncertainty estimation with probabilistic
  // neural networks"): each element's NLL term weighted by stop_gradient(exp(beta * lv)), i.e.
  // the predicted variance to the power beta, so that rows the model calls noisy do not stop
  // their mean from being fitted. The reward's column has its own beta, loss.reward_nll_beta:
  // at 1 its mean's gradient is that of the squared error (the paper's beta = 1 case), so a
  // rare reward cannot be explained away as noise. The returned L stays the plain NLL.
  // `workspace` holds the layer buffers between calls (one per thread); null: a fresh one.
  struct GradientWorkspace {
    std::vector<Matrix> hidden;  // per hidden layer: act(z_l), the next layer's input
    std::vector<Matrix> slope;   // per hidden layer: act'(z_l)
    Matrix out, delta, back;
  };
  struct LossOptions {
    double termination_weight = 1.0;  // of the BCE beside the NLL, >= 0
    double pos_weight = 1.0;  // w_pos: weight of the terminal rows, >= 1 (rare terminals count)
    double nll_beta = 0.0;    // beta of the beta-NLL, [0, 1]; 0: the plain NLL
    double reward_nll_beta = 0.0;  // the same for the reward's column, [0, 1]
  };
  Scalar MemberLossAndGradient(int member, const Matrix& x, const Matrix& y,
                               Scalar* grad_params, Vector* grad_max_log_var,
                               Vector* grad_min_log_var,
                               GradientWorkspace* workspace = nullptr,
                               const LossOptions& loss = {},
                               Scalar* termination_bce = nullptr) const;

  // L of MemberLossAndGradient without the gradient (y's terminal column, if any, ignored).
  Scalar MemberLoss(int member, const Matrix& x, const Matrix& y) const;

  // A copy with a termination head added (no-op when there is one): the new output column has
  // zero weights and the bias logit(initial_probability), so the head predicts that
  // probability everywhere until trained. For warm starts from models saved without a head.
  EnsembleT WithTerminationHead(double initial_probability = 0.01) const;

  // --- Robot units -----------------------------------------------------------------------

  // Every member at every row. states: (rows, state_dim), actions: (rows, action_dim), robot
  // units, a row per sample. Resizes means and variances to B matrices of (rows, output_dim):
  // the Gaussian over [next_state - state, reward] in robot units.
  absl::Status Predict(const Matrix& states, const Matrix& actions, std::vector<Matrix>* means,
                       std::vector<Matrix>* variances) const;

  // Member `member` only, same shapes as Predict for one member.
  absl::Status PredictMember(int member, const Matrix& states, const Matrix& actions,
                             Matrix* mean, Matrix* variance) const;

  // Termination probability of every member at every row: (rows, B), sigmoid of the head's
  // logit; zeros without a head. Shapes as in Predict.
  absl::Status PredictTermination(const Matrix& states, const Matrix& actions,
                                  Matrix* probability) const;

 private:
  absl::Status CheckRows(const Matrix& states, const Matrix& actions) const;
  Matrix NormalizedInput(const Matrix& states, const Matrix& actions) const;
  void DenormalizeOutput(const Matrix& mean_z, const Matrix& log_var_z, Matrix* mean,
                         Matrix* variance) const;

  int state_dim_ = 0;
  int action_dim_ = 0;
  Activation activation_ = Activation::kSilu;
  bool termination_head_ = false;
  std::vector<int> hidden_widths_;
  std::vector<int> offsets_;  // weight and bias offset per layer, then the total
  Matrix params_;
  Vector max_log_var_;
  Vector min_log_var_;
  Normalizer<Scalar> input_normalizer_;
  Normalizer<Scalar> output_normalizer_;
  uint64_t version_ = 0;
};

using Ensemble = EnsembleT<float>;

// Builds the parameter offsets of a member for the given layer widths
// ([input, hidden..., 2 * output]); exposed for serialisation.
std::vector<int> MemberParamOffsets(const std::vector<int>& widths);

}  // namespace foray::model

#endif  // FORAY_CORE_MODEL_ENSEMBLE_H_
