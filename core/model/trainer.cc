#include "core/model/trainer.h"

#include <algorithm>
#include <cmath>
#include <utility>

#include "absl/strings/str_format.h"
#include "core/util/status_macros.h"

namespace foray::model {
namespace {

constexpr double kHalfLog2Pi = 0.91893853320467274178;  // 0.5 * ln(2 pi)

absl::Status CheckShape(const char* name, Eigen::Index rows, Eigen::Index cols, Eigen::Index want_rows,
                        Eigen::Index want_cols) {
  if (rows != want_rows || cols != want_cols) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "%s is (%d, %d), expected (%d, %d)", name, rows, cols, want_rows, want_cols));
  }
  return absl::OkStatus();
}

template <typename Derived>
absl::Status CheckFinite(const char* name, const Eigen::DenseBase<Derived>& values) {
  for (Eigen::Index j = 0; j < values.cols(); ++j) {
    for (Eigen::Index i = 0; i < values.rows(); ++i) {
      if (!std::isfinite(values(i, j))) {
        return absl::InvalidArgumentError(absl::StrFormat(
            "%s[%d][%d] is %g, expected a finite number", name, i, j, values(i, j)));
      }
    }
  }
  return absl::OkStatus();
}

void GatherRowsInto(const Eigen::MatrixXf& m, const int* rows, int count, Eigen::MatrixXf* out) {
  out->resize(count, m.cols());
  for (Eigen::Index c = 0; c < m.cols(); ++c) {
    const float* src = m.col(c).data();
    float* dst = out->col(c).data();
    for (int i = 0; i < count; ++i) dst[i] = src[rows[i]];
  }
}

Eigen::MatrixXf GatherRows(const Eigen::MatrixXf& m, const int* rows, int count) {
  Eigen::MatrixXf out;
  GatherRowsInto(m, rows, count, &out);
  return out;
}

}  // namespace

absl::Status TransitionData::Validate(int state_dim, int action_dim) const {
  const Eigen::Index n = states.rows();
  FORAY_RETURN_IF_ERROR(CheckShape("states", states.rows(), states.cols(), n, state_dim));
  FORAY_RETURN_IF_ERROR(CheckShape("actions", actions.rows(), actions.cols(), n, action_dim));
  FORAY_RETURN_IF_ERROR(
      CheckShape("next_states", next_states.rows(), next_states.cols(), n, state_dim));
  FORAY_RETURN_IF_ERROR(CheckShape("rewards", rewards.rows(), 1, n, 1));
  FORAY_RETURN_IF_ERROR(CheckFinite("states", states));
  FORAY_RETURN_IF_ERROR(CheckFinite("actions", actions));
  FORAY_RETURN_IF_ERROR(CheckFinite("next_states", next_states));
  FORAY_RETURN_IF_ERROR(CheckFinite("rewards", rewards));
  if (terminals.size() != 0) {
    FORAY_RETURN_IF_ERROR(CheckShape("terminals", terminals.rows(), 1, n, 1));
    for (Eigen::Index i = 0; i < n; ++i) {
      if (terminals[i] != 0.0f && terminals[i] != 1.0f) {
        return absl::InvalidArgumentError(
            absl::StrFormat("terminals[%d] is %g, expected 0 or 1", i, terminals[i]));
      }
    }
  }
  return absl::OkStatus();
}

absl::Status TrainingOptions::Validate() const {
  if (batch_size < 1 || batch_size > 65536) {
    return absl::InvalidArgumentError(
        absl::StrFormat("batch_size is %d, expected 1..65536", batch_size));
  }
  if (max_epochs < 1 || max_epochs > 10000) {
    return absl::InvalidArgumentError(
        absl::StrFormat("max_epochs is %d, expected 1..10000", max_epochs));
  }
  if (min_epoch_steps < 1 || min_epoch_steps > 100000) {
    return absl::InvalidArgumentError(
        absl::StrFormat("min_epoch_steps is %d, expected 1..100000", min_epoch_steps));
  }
  if (!(learning_rate > 0 && learning_rate < 1)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("learning_rate is %g, expected in (0, 1)", learning_rate));
  }
  if (!(weight_decay >= 0 && weight_decay < 1)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("weight_decay is %g, expected in [0, 1)", weight_decay));
  }
  if (!(adam_beta1 >= 0 && adam_beta1 < 1) || !(adam_beta2 >= 0 && adam_beta2 < 1) ||
      !(adam_epsilon > 0)) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "Adam settings are beta1 %g, beta2 %g, epsilon %g; expected betas in [0, 1) and "
        "epsilon > 0",
        adam_beta1, adam_beta2, adam_epsilon));
  }
  if (!(log_var_bound_penalty >= 0 && std::isfinite(log_var_bound_penalty))) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "log_var_bound_penalty is %g, expected finite and >= 0", log_var_bound_penalty));
  }
  if (!(holdout_fraction >= 0 && holdout_fraction <= 0.5)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("holdout_fraction is %g, expected in [0, 0.5]", holdout_fraction));
  }
  if (!(termination_weight >= 0 && std::isfinite(termination_weight))) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "termination_weight is %g, expected finite and >= 0", termination_weight));
  }
  if (!(max_terminal_pos_weight >= 1 && max_terminal_pos_weight <= 1000)) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "max_terminal_pos_weight is %g, expected in [1, 1000]", max_terminal_pos_weight));
  }
  if (!(nll_beta >= 0 && nll_beta <= 1)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("nll_beta is %g, expected in [0, 1]", nll_beta));
  }
  if (!(reward_nll_beta >= 0 && reward_nll_beta <= 1)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("reward_nll_beta is %g, expected in [0, 1]", reward_nll_beta));
  }
  if (patience < 1 || patience > 10000) {
    return absl::InvalidArgumentError(
        absl::StrFormat("patience is %d, expected 1..10000", patience));
  }
  return absl::OkStatus();
}

EnsembleTrainer::EnsembleTrainer(Ensemble start, const TrainingOptions& options)
    : options_(options), current_(std::move(start)), rng_(options.seed) {}

absl::StatusOr<std::unique_ptr<EnsembleTrainer>> EnsembleTrainer::Create(
    Ensemble start, const TransitionData& data, const TrainingOptions& options) {
  FORAY_RETURN_IF_ERROR(options.Validate());
  FORAY_RETURN_IF_ERROR(data.Validate(start.state_dim(), start.action_dim()));
  const int n = data.size();
  if (n < 2) {
    return absl::FailedPreconditionError(
        absl::StrFormat("training needs at least 2 transitions, got %d", n));
  }
  std::unique_ptr<EnsembleTrainer> t(new EnsembleTrainer(std::move(start), options));
  Ensemble& model = t->current_;

  Eigen::MatrixXf inputs(n, model.input_dim());
  inputs << data.states, data.actions;
  Eigen::MatrixXf targets(n, model.output_dim());
  targets << (data.next_states - data.states), data.rewards;

  // Holdout split on a random permutation.
  std::vector<int> order(n);
  for (int i = 0; i < n; ++i) order[i] = i;
  for (int i = n - 1; i > 0; --i) {
    std::swap(order[i], order[t->rng_.UniformInt(static_cast<uint64_t>(i) + 1)]);
  }
  int holdout = static_cast<int>(std::floor(options.holdout_fraction * n));
  holdout = std::min(holdout, n - 1);
  t->holdout_rows_.assign(order.begin(), order.begin() + holdout);
  t->train_rows_.assign(order.begin() + holdout, order.end());
  std::sort(t->holdout_rows_.begin(), t->holdout_rows_.end());
  std::sort(t->train_rows_.begin(), t->train_rows_.end());

  if (options.refit_normalizers) {
    // Fitted on every row, the holdout's too (their spreads only; no target is fitted): fitted
    // on the training rows alone, a target whose first change lands in the holdout (the first
    // reward, an object's first move) would be scored there at the constant's scale kMinStd,
    // and the holdout error of that round would read as millions of nats.
    FORAY_RETURN_IF_ERROR(model.mutable_input_normalizer().Fit(inputs));
    // A target that never changed in the data (an object that has never moved, a reward never
    // earned) is predicted as that constant, with no spread: with a scale of 1 its members'
    // untrained variances (about 1 in robot units: +-1 m per step for a puck at rest) made
    // every rollout scatter it.
    FORAY_RETURN_IF_ERROR(
        model.mutable_output_normalizer().Fit(targets, Normalizer<float>::kMinStd));
  }
  t->x_ = model.input_normalizer()
              .Apply(inputs)
              .cwiseMax(-Ensemble::kInputClip)
              .cwiseMin(Ensemble::kInputClip);
  const Eigen::MatrixXf y = model.output_normalizer().Apply(targets);
  const std::vector<int>& eval_rows = holdout > 0 ? t->holdout_rows_ : t->train_rows_;
  const int n_eval = static_cast<int>(eval_rows.size());
  t->holdout_x_ = GatherRows(t->x_, eval_rows.data(), n_eval);
  t->holdout_y_ = GatherRows(y, eval_rows.data(), n_eval);
  if (model.has_termination_head()) {
    // The terminal flag rides along as y's last column (not normalised): minibatches gather it
    // with the targets, and MemberLossAndGradient trains the head on it.
    const Eigen::VectorXf flags =
        data.terminals.size() == 0 ? Eigen::VectorXf::Zero(n) : data.terminals;
    t->y_.resize(n, model.output_dim() + 1);
    t->y_ << y, flags;
    t->holdout_terminal_.resize(n_eval);
    for (int i = 0; i < n_eval; ++i) t->holdout_terminal_[i] = flags[eval_rows[i]];
    int positives = 0;
    for (int row : t->train_rows_) positives += flags[row] != 0.0f ? 1 : 0;
    t->terminal_rows_ = static_cast<int>(flags.sum());
    const int negatives = static_cast<int>(t->train_rows_.size()) - positives;
    t->pos_weight_ = positives == 0 ? 1.0
                                    : std::clamp(static_cast<double>(negatives) / positives, 1.0,
                                                 options.max_terminal_pos_weight);
  } else {
    t->y_ = y;
  }

  const int n_train = static_cast<int>(t->train_rows_.size());
  t->member_rows_.resize(model.size());
  for (int b = 0; b < model.size(); ++b) {
    std::vector<int>& rows = t->member_rows_[b];
    if (options.bootstrap) {
      rows.resize(n_train);
      for (int i = 0; i < n_train; ++i) {
        rows[i] = t->train_rows_[t->rng_.UniformInt(static_cast<uint64_t>(n_train))];
      }
    } else {
      rows = t->train_rows_;
    }
  }

  const Eigen::Index p = model.num_member_params();
  const Eigen::Index d = model.output_dim();
  t->grad_ = Eigen::MatrixXf::Zero(p, model.size());
  t->m_ = Eigen::MatrixXf::Zero(p, model.size());
  t->v_ = Eigen::MatrixXf::Zero(p, model.size());
  for (Eigen::VectorXf* vec : {&t->grad_max_, &t->m_max_, &t->v_max_, &t->grad_min_,
                               &t->m_min_, &t->v_min_}) {
    *vec = Eigen::VectorXf::Zero(d);
  }
  t->best_ = t->current_;
  t->best_holdout_loss_ =
      t->HoldoutLoss(t->current_, {}, &t->best_holdout_nll_, &t->best_holdout_bce_);
  return t;
}

double EnsembleTrainer::HoldoutLoss(const Ensemble& model, const ParallelFor& parallel,
                                    double* nll, double* bce) const {
  // The same losses as Ensemble::MemberLossAndGradient, through the inference kernels: this
  // evaluation is a forward pass of every member over every holdout row, each epoch.
  const PackedEnsemble fast(model);
  const int n = static_cast<int>(holdout_y_.size());  // rows * output_dim
  const int rows = static_cast<int>(holdout_x_.rows());
  const bool head = holdout_terminal_.size() != 0;
  Eigen::ArrayXf mean(static_cast<Eigen::Index>(n) * model.size()), log_var(mean.size());
  Eigen::ArrayXf logit(head ? static_cast<Eigen::Index>(rows) * model.size() : 0);
  fast.ForwardAll(holdout_x_.data(), rows, mean.data(), log_var.data(), parallel,
                  head ? logit.data() : nullptr);
  const Eigen::Map<const Eigen::ArrayXf> y(holdout_y_.data(), n);
  Eigen::ArrayXf terms(n);
  double total = 0;
  for (int b = 0; b < model.size(); ++b) {
    const auto mu = mean.segment(static_cast<Eigen::Index>(b) * n, n);
    const auto lv = log_var.segment(static_cast<Eigen::Index>(b) * n, n);
    terms = 0.5f * ((mu - y).square() * (-lv).exp() + lv);
    // A plain loop: Eigen's vectorised sum groups the terms differently for other sizes and
    // alignments; this sum is the same for any build of the same inputs.
    double sum = 0;
    for (int i = 0; i < n; ++i) sum += terms[i];
    total += sum / n + kHalfLog2Pi;
  }
  double total_bce = 0;
  if (head) {
    const double w_pos = pos_weight_;
    for (int b = 0; b < model.size(); ++b) {
      double sum = 0;
      for (int i = 0; i < rows; ++i) {
        const double z = logit[static_cast<Eigen::Index>(b) * rows + i];
        const double t = holdout_terminal_[i];
        const double softplus_minus_z = std::max(-z, 0.0) + std::log1p(std::exp(-std::abs(z)));
        sum += (1 - t) * z + (1 + (w_pos - 1) * t) * softplus_minus_z;
      }
      total_bce += sum / rows;
    }
  }
  const double mean_nll = total / model.size();
  const double mean_bce = total_bce / model.size();
  if (nll != nullptr) *nll = mean_nll;
  if (bce != nullptr) *bce = mean_bce;
  return mean_nll + options_.termination_weight * mean_bce;
}

void EnsembleTrainer::AdamStep() {
  ++step_;
  const float b1 = static_cast<float>(options_.adam_beta1);
  const float b2 = static_cast<float>(options_.adam_beta2);
  const float eps = static_cast<float>(options_.adam_epsilon);
  const double bc1 = 1.0 - std::pow(options_.adam_beta1, static_cast<double>(step_));
  const double bc2 = 1.0 - std::pow(options_.adam_beta2, static_cast<double>(step_));
  const float step_size = static_cast<float>(options_.learning_rate / bc1);
  const float inv_sqrt_bc2 = static_cast<float>(1.0 / std::sqrt(bc2));
  const float decay = static_cast<float>(1.0 - options_.learning_rate * options_.weight_decay);

  // Same order of operations as a decoupled-decay Adam: decay, moments, update.
  auto update = [&](auto& param, auto& grad, auto& m, auto& v, float decay_factor) {
    param.array() *= decay_factor;
    m.array() = b1 * m.array() + (1 - b1) * grad.array();
    v.array() = b2 * v.array() + (1 - b2) * grad.array().square();
    param.array() -= step_size * m.array() / (v.array().sqrt() * inv_sqrt_bc2 + eps);
  };
  update(current_.mutable_params(), grad_, m_, v_, decay);
  update(current_.mutable_max_log_var(), grad_max_, m_max_, v_max_, 1.0f);
  update(current_.mutable_min_log_var(), grad_min_, m_min_, v_min_, 1.0f);
}

bool EnsembleTrainer::RunEpoch(const ParallelFor& parallel) {
  if (done_) return true;
  const int members = current_.size();
  const int rows_per_member = static_cast<int>(member_rows_[0].size());
  const int batch = options_.batch_size;
  const int pass_steps = (rows_per_member + batch - 1) / batch;
  const int passes = std::max(1, (options_.min_epoch_steps + pass_steps - 1) / pass_steps);
  const float penalty = static_cast<float>(options_.log_var_bound_penalty);
  const Eigen::Index d = current_.output_dim();
  member_steps_.resize(members);
  const Ensemble::LossOptions loss{.termination_weight = options_.termination_weight,
                                   .pos_weight = pos_weight_,
                                   .nll_beta = options_.nll_beta,
                                   .reward_nll_beta = options_.reward_nll_beta};
  double nll_sum = 0;
  for (int pass = 0; pass < passes; ++pass) {
    for (std::vector<int>& rows : member_rows_) {
      for (int i = static_cast<int>(rows.size()) - 1; i > 0; --i) {
        std::swap(rows[i], rows[rng_.UniformInt(static_cast<uint64_t>(i) + 1)]);
      }
    }
    for (int s = 0; s < pass_steps; ++s) {
      const int begin = s * batch;
      const int count = std::min(batch, rows_per_member - begin);
      // Members are independent within a step: each writes its own gradient column and parts.
      RunTasks(parallel, members, [&](int b) {
        MemberStep& m = member_steps_[b];
        const int* rows = member_rows_[b].data() + begin;
        GatherRowsInto(x_, rows, count, &m.x);
        GatherRowsInto(y_, rows, count, &m.y);
        m.grad_max.setZero(d);
        m.grad_min.setZero(d);
        m.nll = current_.MemberLossAndGradient(b, m.x, m.y, grad_.col(b).data(), &m.grad_max,
                                               &m.grad_min, &m.workspace, loss, &m.bce);
      });
      grad_max_.setZero();
      grad_min_.setZero();
      for (const MemberStep& m : member_steps_) {
        grad_max_ += m.grad_max;
        grad_min_ += m.grad_min;
        nll_sum += m.nll;
      }
      grad_max_.array() += penalty;
      grad_min_.array() -= penalty;
      AdamStep();
    }
  }
  const int steps = passes * pass_steps;
  last_train_nll_ = nll_sum / (static_cast<double>(steps) * members);
  ++epoch_;

  double holdout_nll = 0, holdout_bce = 0;
  const double holdout_loss = HoldoutLoss(current_, parallel, &holdout_nll, &holdout_bce);
  if (holdout_loss < best_holdout_loss_) {
    best_holdout_loss_ = holdout_loss;
    best_holdout_nll_ = holdout_nll;
    best_holdout_bce_ = holdout_bce;
    best_ = current_;
    best_epoch_ = epoch_;
    epochs_since_best_ = 0;
  } else {
    ++epochs_since_best_;
  }
  done_ = epochs_since_best_ >= options_.patience || epoch_ >= options_.max_epochs;
  return done_;
}

TrainingReport EnsembleTrainer::Report() const {
  TrainingReport r;
  r.epochs = epoch_;
  r.best_epoch = best_epoch_;
  r.transitions = static_cast<int>(x_.rows());
  r.train_rows = static_cast<int>(train_rows_.size());
  r.holdout_rows = static_cast<int>(holdout_rows_.size());
  r.train_nll = last_train_nll_;
  r.holdout_nll = best_holdout_nll_;
  if (best_.has_termination_head()) {
    r.terminal_rows = terminal_rows_;
    r.terminal_pos_weight = pos_weight_;
    r.holdout_termination_bce = best_holdout_bce_;
  }

  // Moment-matched mixture of the members: mean of means; mean of variances plus the
  // variance of the means.
  const Eigen::MatrixXf holdout_x = holdout_x_;  // column-major, as MemberForward takes it
  const Eigen::Index rows = holdout_x_.rows();
  const Eigen::Index d = best_.output_dim();
  Eigen::ArrayXXd mix_mean = Eigen::ArrayXXd::Zero(rows, d);
  Eigen::ArrayXXd second = Eigen::ArrayXXd::Zero(rows, d);
  Eigen::MatrixXf mean, log_var;
  for (int b = 0; b < best_.size(); ++b) {
    best_.MemberForward(b, holdout_x, &mean, &log_var);
    const Eigen::ArrayXXd m = mean.cast<double>().array();
    mix_mean += m;
    second += log_var.cast<double>().array().exp() + m.square();
  }
  mix_mean /= best_.size();
  const Eigen::ArrayXXd mix_var = (second / best_.size() - mix_mean.square()).max(0.0);
  const Eigen::ArrayXXd err = (holdout_y_.cast<double>().array() - mix_mean).abs();
  r.holdout_mse = err.square().mean();
  const Eigen::ArrayXXd sigma = mix_var.sqrt();
  for (Eigen::Index k = 0; k < d; ++k) {
    r.within_1sigma.push_back((err.col(k) <= sigma.col(k)).cast<double>().mean());
    r.within_2sigma.push_back((err.col(k) <= 2.0 * sigma.col(k)).cast<double>().mean());
    r.holdout_rmse.push_back(std::sqrt(err.col(k).square().mean()));
  }
  return r;
}

absl::StatusOr<std::pair<Ensemble, TrainingReport>> TrainEnsemble(
    Ensemble start, const TransitionData& data, const TrainingOptions& options) {
  FORAY_ASSIGN_OR_RETURN(std::unique_ptr<EnsembleTrainer> trainer,
                         EnsembleTrainer::Create(std::move(start), data, options));
  while (!trainer->RunEpoch()) {
  }
  return std::make_pair(trainer->best(), trainer->Report());
}

}  // namespace foray::model
