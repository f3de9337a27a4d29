#include "core/model/ensemble.h"

#include <cmath>
#include <type_traits>

#include "absl/strings/str_format.h"
#include "core/model/simd_kernels.h"
#include "core/util/random.h"
#include "core/util/status_macros.h"

namespace foray::model {
namespace {

constexpr double kHalfLog2Pi = 0.91893853320467274178;  // 0.5 * ln(2 pi)

// softplus(x) = ln(1 + e^x) = max(x, 0) + ln(1 + e^-|x|), evaluated without overflow. ln(1 + t)
// rather than log1p(t): Eigen vectorises log but not log1p, and the two differ only where t is
// below float epsilon, by less than t (under 1.2e-7 absolute).
template <typename Derived>
auto Softplus(const Eigen::ArrayBase<Derived>& x) {
  using S = typename Derived::Scalar;
  return x.max(S(0)) + (S(1) + (-(x.abs())).exp()).log();
}

template <typename Derived>
auto Sigmoid(const Eigen::ArrayBase<Derived>& x) {
  using S = typename Derived::Scalar;
  return S(1) / (S(1) + (-x).exp());
}

// In place: z <- act(z).
template <typename Matrix>
void ApplyActivation(Activation activation, Matrix* z) {
  using S = typename Matrix::Scalar;
  auto a = z->array();
  switch (activation) {
    case Activation::kSilu:
      a = a / (S(1) + (-a).exp());
      break;
    case Activation::kRelu:
      a = a.max(S(0));
      break;
    case Activation::kTanh:
      a = a.tanh();
      break;
  }
}

// In place: z <- act(z), and *slope <- act'(z) at the old z, elementwise.
template <typename Matrix>
void ActivateWithSlope(Activation activation, Matrix* z, Matrix* slope) {
  using S = typename Matrix::Scalar;
  slope->resize(z->rows(), z->cols());
  if constexpr (std::is_same_v<S, float>) {
    const simd::Act act = activation == Activation::kSilu   ? simd::Act::kSilu
                          : activation == Activation::kRelu ? simd::Act::kRelu
                                                            : simd::Act::kTanh;
    simd::ActivateWithSlope(act, z->data(), slope->data(), static_cast<size_t>(z->size()));
    return;
  }
  auto a = z->array();
  auto s = slope->array();
  switch (activation) {
    case Activation::kSilu:
      // With s = sigmoid(z): silu(z) = z s and silu'(z) = s (1 + z (1 - s)) = s + silu(z) (1 - s).
      s = (S(1) + (-a).exp()).inverse();
      a *= s;
      s += a * (S(1) - s);
      break;
    case Activation::kRelu:
      s = (a > S(0)).template cast<S>();
      a = a.max(S(0));
      break;
    case Activation::kTanh:
      a = a.tanh();
      s = S(1) - a.square();
      break;
  }
}

// The three products of a layer, all matrices column-major. In float they run on the
// dispatched SIMD kernel (simd::Gemm), reading a column-major matrix as its transpose; in double
// (the gradient checks) on Eigen.
//   out (rows, n) = in (rows, k) w (k, n) + bias (n) on every row.
template <typename Matrix, typename W, typename B>
void LayerForward(const Matrix& in, const W& w, const B& bias, Matrix* out) {
  const int rows = static_cast<int>(in.rows()), k = static_cast<int>(w.rows()),
            n = static_cast<int>(w.cols());
  out->resize(rows, n);
  if constexpr (std::is_same_v<typename Matrix::Scalar, float>) {
    // out^T (n, rows) = w^T (n, k) in^T (k, rows).
    simd::Gemm(n, rows, k, w.data(), /*a_row=*/k, /*a_col=*/1, in.data(), /*b_row=*/rows,
               /*b_col=*/1, bias.data(), out->data(), rows);
  } else {
    out->noalias() = in * w;
    out->rowwise() += bias.transpose();
  }
}

// grad_w (k, n) = in^T (k, rows) delta (rows, n).
template <typename Matrix, typename G>
void WeightGradient(const Matrix& in, const Matrix& delta, G* grad_w) {
  const int rows = static_cast<int>(in.rows()), k = static_cast<int>(in.cols()),
            n = static_cast<int>(delta.cols());
  if constexpr (std::is_same_v<typename Matrix::Scalar, float>) {
    // grad_w^T (n, k) = delta^T (n, rows) in (rows, k).
    simd::Gemm(n, k, rows, delta.data(), /*a_row=*/rows, /*a_col=*/1, in.data(), /*b_row=*/1,
               /*b_col=*/rows, nullptr, grad_w->data(), k);
  } else {
    grad_w->noalias() = in.transpose() * delta;
  }
}

// back (rows, k) = delta (rows, n) w^T (n, k).
template <typename Matrix, typename W>
void BackPropagate(const Matrix& delta, const W& w, Matrix* back) {
  const int rows = static_cast<int>(delta.rows()), k = static_cast<int>(w.rows()),
            n = static_cast<int>(w.cols());
  back->resize(rows, k);
  if constexpr (std::is_same_v<typename Matrix::Scalar, float>) {
    // back^T (k, rows) = w (k, n) delta^T (n, rows).
    simd::Gemm(k, rows, n, w.data(), /*a_row=*/1, /*a_col=*/k, delta.data(), /*b_row=*/rows,
               /*b_col=*/1, nullptr, back->data(), rows);
  } else {
    back->noalias() = delta * w.transpose();
  }
}

}  // namespace

absl::Status EnsembleOptions::Validate() const {
  if (ensemble_size < 1 || ensemble_size > 32) {
    return absl::InvalidArgumentError(
        absl::StrFormat("ensemble_size is %d, expected 1..32", ensemble_size));
  }
  if (hidden_widths.empty() || hidden_widths.size() > 8) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "hidden_widths has %d layers, expected 1..8", hidden_widths.size()));
  }
  for (size_t i = 0; i < hidden_widths.size(); ++i) {
    if (hidden_widths[i] < 1 || hidden_widths[i] > 2048) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "hidden_widths[%d] is %d, expected 1..2048", i, hidden_widths[i]));
    }
  }
  if (activation != Activation::kSilu && activation != Activation::kRelu &&
      activation != Activation::kTanh) {
    return absl::InvalidArgumentError(
        absl::StrFormat("activation is %d, expected 1 (SiLU), 2 (ReLU) or 3 (tanh)",
                        static_cast<int>(activation)));
  }
  if (!std::isfinite(initial_max_log_var) || !std::isfinite(initial_min_log_var) ||
      initial_min_log_var >= initial_max_log_var) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "initial log-variance bounds are [%g, %g], expected finite with min < max",
        initial_min_log_var, initial_max_log_var));
  }
  return absl::OkStatus();
}

std::vector<int> MemberParamOffsets(const std::vector<int>& widths) {
  std::vector<int> offsets;
  int offset = 0;
  for (size_t l = 0; l + 1 < widths.size(); ++l) {
    offsets.push_back(offset);
    offset += widths[l] * widths[l + 1];
    offsets.push_back(offset);
    offset += widths[l + 1];
  }
  offsets.push_back(offset);
  return offsets;
}

template <typename Scalar>
absl::StatusOr<EnsembleT<Scalar>> EnsembleT<Scalar>::Create(int state_dim, int action_dim,
                                                            const EnsembleOptions& options,
                                                            uint64_t seed) {
  FORAY_RETURN_IF_ERROR(options.Validate());
  if (state_dim < 1 || state_dim > 1024 || action_dim < 1 || action_dim > 1024) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "state_dim is %d and action_dim is %d, expected each in 1..1024", state_dim,
        action_dim));
  }
  EnsembleT e;
  e.state_dim_ = state_dim;
  e.action_dim_ = action_dim;
  e.activation_ = options.activation;
  e.hidden_widths_ = options.hidden_widths;
  e.termination_head_ = options.termination_head;
  std::vector<int> widths = {state_dim + action_dim};
  widths.insert(widths.end(), options.hidden_widths.begin(), options.hidden_widths.end());
  widths.push_back(2 * (state_dim + 1) + (options.termination_head ? 1 : 0));
  e.offsets_ = MemberParamOffsets(widths);
  e.params_ = Matrix::Zero(e.num_member_params(), options.ensemble_size);
  Rng rng(seed);
  for (int b = 0; b < options.ensemble_size; ++b) {
    for (int l = 0; l < e.num_layers(); ++l) {
      const double std = 1.0 / (2.0 * std::sqrt(static_cast<double>(e.layer_fan_in(l))));
      const int count = e.layer_fan_in(l) * e.layer_fan_out(l);
      for (int i = 0; i < count; ++i) {
        double z = rng.Normal();
        while (std::abs(z) > 2.0) z = rng.Normal();  // truncated at two standard deviations
        e.params_(e.weight_offset(l) + i, b) = static_cast<Scalar>(z * std);
      }
    }
  }
  if (e.termination_head_) {
    // The head starts at a small termination probability (1%), not at 1/2: untrained, it
    // should not make every rollout's survival halve per step.
    e.params_.row(e.bias_offset(e.num_layers() - 1) + 2 * e.output_dim()).setConstant(
        static_cast<Scalar>(std::log(0.01 / 0.99)));
  }
  e.max_log_var_ = Vector::Constant(e.output_dim(), static_cast<Scalar>(options.initial_max_log_var));
  e.min_log_var_ = Vector::Constant(e.output_dim(), static_cast<Scalar>(options.initial_min_log_var));
  e.input_normalizer_ = Normalizer<Scalar>(e.input_dim());
  e.output_normalizer_ = Normalizer<Scalar>(e.output_dim());
  return e;
}

template <typename Scalar>
int EnsembleT<Scalar>::layer_fan_in(int layer) const {
  return layer == 0 ? input_dim() : hidden_widths_[layer - 1];
}

template <typename Scalar>
int EnsembleT<Scalar>::layer_fan_out(int layer) const {
  return layer == num_layers() - 1 ? 2 * output_dim() + (termination_head_ ? 1 : 0)
                                   : hidden_widths_[layer];
}

template <typename Scalar>
EnsembleT<Scalar> EnsembleT<Scalar>::WithTerminationHead(double initial_probability) const {
  if (termination_head_) return *this;
  EnsembleT e = *this;
  e.termination_head_ = true;
  std::vector<int> widths = {input_dim()};
  widths.insert(widths.end(), hidden_widths_.begin(), hidden_widths_.end());
  widths.push_back(2 * output_dim() + 1);
  e.offsets_ = MemberParamOffsets(widths);
  e.params_ = Matrix::Zero(e.num_member_params(), size());
  const int last = num_layers() - 1;
  for (int l = 0; l < num_layers(); ++l) {
    const int weights = layer_fan_in(l) * layer_fan_out(l);
    // Column-major (fan_in, fan_out) blocks: the old columns are a prefix of the new block.
    e.params_.middleRows(e.weight_offset(l), weights) = params_.middleRows(weight_offset(l), weights);
    e.params_.middleRows(e.bias_offset(l), layer_fan_out(l)) =
        params_.middleRows(bias_offset(l), layer_fan_out(l));
  }
  e.params_.row(e.bias_offset(last) + 2 * output_dim())
      .setConstant(static_cast<Scalar>(std::log(initial_probability / (1.0 - initial_probability))));
  return e;
}

template <typename Scalar>
void EnsembleT<Scalar>::MemberForward(int member, const Matrix& x, Matrix* mean,
                                      Matrix* log_var, Matrix* term_logit) const {
  FORAY_CHECK(member >= 0 && member < size(), "member index out of range");
  FORAY_CHECK(x.cols() == input_dim(), "input has the wrong number of columns");
  const Scalar* p = params_.col(member).data();
  Matrix h = x;
  for (int l = 0; l < num_layers(); ++l) {
    const Eigen::Map<const Matrix> w(p + weight_offset(l), layer_fan_in(l), layer_fan_out(l));
    const Eigen::Map<const Vector> bias(p + bias_offset(l), layer_fan_out(l));
    Matrix z;
    LayerForward(h, w, bias, &z);
    if (l + 1 < num_layers()) ApplyActivation(activation_, &z);
    h.swap(z);
  }
  const int d = output_dim();
  *mean = h.leftCols(d);
  if (term_logit != nullptr) *term_logit = h.rightCols(termination_head_ ? 1 : 0);
  const auto raw = h.middleCols(d, d).array();
  const auto max_lv = max_log_var_.transpose().array();
  const auto min_lv = min_log_var_.transpose().array();
  const auto upper = (-Softplus((max_lv.replicate(raw.rows(), 1) - raw).eval()) +
                      max_lv.replicate(raw.rows(), 1))
                         .eval();
  *log_var = (Softplus((upper - min_lv.replicate(raw.rows(), 1)).eval()) +
              min_lv.replicate(raw.rows(), 1))
                 .matrix();
}

template <typename Scalar>
Scalar EnsembleT<Scalar>::MemberLoss(int member, const Matrix& x, const Matrix& y) const {
  FORAY_CHECK((y.cols() == output_dim() || y.cols() == output_dim() + 1) && y.rows() == x.rows(),
              "target shape mismatch");
  Matrix mean, log_var;
  MemberForward(member, x, &mean, &log_var);
  const auto err2 = (mean - y.leftCols(output_dim())).array().square();
  const double sum =
      (Scalar(0.5) * (err2 * (-log_var.array()).exp() + log_var.array())).template cast<double>().sum();
  return static_cast<Scalar>(sum / static_cast<double>(mean.size()) + kHalfLog2Pi);
}

template <typename Scalar>
Scalar EnsembleT<Scalar>::MemberLossAndGradient(int member, const Matrix& x, const Matrix& y,
                                                Scalar* grad_params, Vector* grad_max_log_var,
                                                Vector* grad_min_log_var,
                                                GradientWorkspace* workspace,
                                                const LossOptions& loss_options,
                                                Scalar* termination_bce) const {
  FORAY_CHECK(member >= 0 && member < size(), "member index out of range");
  FORAY_CHECK(x.cols() == input_dim(), "input has the wrong number of columns");
  FORAY_CHECK((y.cols() == output_dim() || y.cols() == output_dim() + 1) && y.rows() == x.rows(),
              "target shape mismatch");
  const bool train_head = termination_head_ && y.cols() == output_dim() + 1;
  GradientWorkspace local;
  GradientWorkspace& ws = workspace != nullptr ? *workspace : local;
  const Scalar* p = params_.col(member).data();
  const int layers = num_layers();
  const Eigen::Index rows = x.rows();
  ws.hidden.resize(layers - 1);
  ws.slope.resize(layers - 1);

  // Forward, keeping each hidden layer's output (the next layer's input) and the slope of
  // its activation, which is all the backward pass needs of it.
  auto layer_input = [&](int l) -> const Matrix& { return l == 0 ? x : ws.hidden[l - 1]; };
  for (int l = 0; l < layers; ++l) {
    const Eigen::Map<const Matrix> w(p + weight_offset(l), layer_fan_in(l), layer_fan_out(l));
    const Eigen::Map<const Vector> bias(p + bias_offset(l), layer_fan_out(l));
    Matrix& z = l + 1 < layers ? ws.hidden[l] : ws.out;
    LayerForward(layer_input(l), w, bias, &z);
    if (l + 1 < layers) ActivateWithSlope(activation_, &z, &ws.slope[l]);
  }
  const int d = output_dim();
  const auto mean = ws.out.leftCols(d).array();
  const auto raw = ws.out.middleCols(d, d).array();
  const auto max_lv = max_log_var_.transpose().array().replicate(rows, 1).eval();
  const auto min_lv = min_log_var_.transpose().array().replicate(rows, 1).eval();
  const auto u = (max_lv - raw).eval();              // max_lv - raw
  const auto upper = (max_lv - Softplus(u)).eval();  // first bound
  const auto v = (upper - min_lv).eval();
  const auto log_var = (min_lv + Softplus(v)).eval();
  const auto inv_var = (-log_var).exp().eval();
  const auto err = (mean - y.leftCols(d).array()).eval();
  const Eigen::Index elements = rows * d;

  const double loss =
      (Scalar(0.5) * (err.square() * inv_var + log_var)).template cast<double>().sum() /
          static_cast<double>(elements) +
      kHalfLog2Pi;

  // Backward. dL/dmu = w err inv_var / N; dL/dlv = 0.5 w (1 - err^2 inv_var) / N, with the
  // beta-NLL's weight w = exp(beta lv) held constant (1 for the plain NLL); beta is
  // reward_nll_beta in the reward's column, nll_beta in the state deltas'.
  const Scalar inv_n = Scalar(1) / static_cast<Scalar>(elements);
  using Array = Eigen::Array<Scalar, Eigen::Dynamic, Eigen::Dynamic>;
  Array scale(rows, d);
  for (int k = 0; k < d; ++k) {
    const Scalar beta =
        static_cast<Scalar>(k + 1 == d ? loss_options.reward_nll_beta : loss_options.nll_beta);
    if (beta == Scalar(0)) {
      scale.col(k).setConstant(inv_n);
    } else {
      scale.col(k) = (beta * log_var.col(k)).exp() * inv_n;
    }
  }
  const auto d_lv = (Scalar(0.5) * scale * (Scalar(1) - err.square() * inv_var)).eval();
  const auto sig_u = Sigmoid(u).eval();
  const auto sig_v = Sigmoid(v).eval();
  Matrix& delta = ws.delta;
  delta.resize(rows, layer_fan_out(layers - 1));
  delta.leftCols(d) = (err * inv_var * scale).matrix();
  delta.middleCols(d, d) = (d_lv * sig_v * sig_u).matrix();
  if (termination_head_) {
    // Weighted BCE with logits, written as PyTorch does for stability:
    //   (1 - t) z + (1 + (w_pos - 1) t) softplus(-z);
    // d/dz = sigmoid(z) (1 - t + w_pos t) - w_pos t.
    if (train_head) {
      const auto z = ws.out.col(2 * d).array();
      const auto t = y.col(d).array();
      const Scalar w_pos = static_cast<Scalar>(loss_options.pos_weight);
      const auto coeff = (Scalar(1) + (w_pos - Scalar(1)) * t).eval();
      const double bce = ((Scalar(1) - t) * z + coeff * Softplus((-z).eval()))
                             .template cast<double>().sum() / static_cast<double>(rows);
      if (termination_bce != nullptr) *termination_bce = static_cast<Scalar>(bce);
      const Scalar head_scale =
          static_cast<Scalar>(loss_options.termination_weight) / static_cast<Scalar>(rows);
      delta.col(2 * d) = (head_scale * (Sigmoid(z.eval()) * coeff - w_pos * t)).matrix();
    } else {
      delta.col(2 * d).setZero();
      if (termination_bce != nullptr) *termination_bce = Scalar(0);
    }
  }
  *grad_max_log_var += (d_lv * sig_v * (Scalar(1) - sig_u)).matrix().colwise().sum().transpose();
  *grad_min_log_var += (d_lv * (Scalar(1) - sig_v)).matrix().colwise().sum().transpose();

  for (int l = layers - 1; l >= 0; --l) {
    Eigen::Map<Matrix> gw(grad_params + weight_offset(l), layer_fan_in(l), layer_fan_out(l));
    Eigen::Map<Vector> gb(grad_params + bias_offset(l), layer_fan_out(l));
    WeightGradient(layer_input(l), delta, &gw);
    gb = delta.colwise().sum().transpose();
    if (l > 0) {
      const Eigen::Map<const Matrix> w(p + weight_offset(l), layer_fan_in(l), layer_fan_out(l));
      BackPropagate(delta, w, &ws.back);
      ws.back.array() *= ws.slope[l - 1].array();
      delta.swap(ws.back);
    }
  }
  return static_cast<Scalar>(loss);
}

template <typename Scalar>
absl::Status EnsembleT<Scalar>::PredictTermination(const Matrix& states, const Matrix& actions,
                                                   Matrix* probability) const {
  FORAY_RETURN_IF_ERROR(CheckRows(states, actions));
  probability->setZero(states.rows(), size());
  if (!termination_head_) return absl::OkStatus();
  const Matrix x = NormalizedInput(states, actions);
  Matrix mean_z, log_var_z, logit;
  for (int b = 0; b < size(); ++b) {
    MemberForward(b, x, &mean_z, &log_var_z, &logit);
    probability->col(b) = Sigmoid(logit.col(0).array().eval()).matrix();
  }
  return absl::OkStatus();
}

template <typename Scalar>
absl::Status EnsembleT<Scalar>::CheckRows(const Matrix& states, const Matrix& actions) const {
  if (states.cols() != state_dim_) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "states have %d columns, the model expects state_dim %d", states.cols(), state_dim_));
  }
  if (actions.cols() != action_dim_) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "actions have %d columns, the model expects action_dim %d", actions.cols(),
        action_dim_));
  }
  if (states.rows() != actions.rows()) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "states have %d rows but actions have %d", states.rows(), actions.rows()));
  }
  return absl::OkStatus();
}

template <typename Scalar>
typename EnsembleT<Scalar>::Matrix EnsembleT<Scalar>::NormalizedInput(
    const Matrix& states, const Matrix& actions) const {
  Matrix x(states.rows(), input_dim());
  x << states, actions;
  return input_normalizer_.Apply(x).cwiseMax(Scalar(-kInputClip)).cwiseMin(Scalar(kInputClip));
}

template <typename Scalar>
void EnsembleT<Scalar>::DenormalizeOutput(const Matrix& mean_z, const Matrix& log_var_z,
                                          Matrix* mean, Matrix* variance) const {
  *mean = output_normalizer_.Invert(mean_z);
  const auto scale2 = output_normalizer_.std().array().square().transpose();
  *variance = (log_var_z.array().exp().rowwise() * scale2).matrix();
}

template <typename Scalar>
absl::Status EnsembleT<Scalar>::Predict(const Matrix& states, const Matrix& actions,
                                        std::vector<Matrix>* means,
                                        std::vector<Matrix>* variances) const {
  FORAY_RETURN_IF_ERROR(CheckRows(states, actions));
  const Matrix x = NormalizedInput(states, actions);
  means->resize(size());
  variances->resize(size());
  Matrix mean_z, log_var_z;
  for (int b = 0; b < size(); ++b) {
    MemberForward(b, x, &mean_z, &log_var_z);
    DenormalizeOutput(mean_z, log_var_z, &(*means)[b], &(*variances)[b]);
  }
  return absl::OkStatus();
}

template <typename Scalar>
absl::Status EnsembleT<Scalar>::PredictMember(int member, const Matrix& states,
                                              const Matrix& actions, Matrix* mean,
                                              Matrix* variance) const {
  FORAY_RETURN_IF_ERROR(CheckRows(states, actions));
  if (member < 0 || member >= size()) {
    return absl::InvalidArgumentError(
        absl::StrFormat("member is %d, the ensemble has %d members", member, size()));
  }
  Matrix mean_z, log_var_z;
  MemberForward(member, NormalizedInput(states, actions), &mean_z, &log_var_z);
  DenormalizeOutput(mean_z, log_var_z, mean, variance);
  return absl::OkStatus();
}

template class EnsembleT<float>;
template class EnsembleT<double>;

}  // namespace foray::model
