// Trains an ensemble on a robot's transitions: Gaussian NLL with the log-variance bound
// penalty, AdamW, minibatches, a bootstrap resample per member, a holdout split with early
// stopping, and warm start from the given weights. Deterministic under a seed.
// A trainer is not thread-safe; it owns its own copy of the model, so the published model
// can be read by planners while a trainer runs.
//
//   FORAY_ASSIGN_OR_RETURN(auto trainer, EnsembleTrainer::Create(published, data, options));
//   while (!trainer->RunEpoch()) {}           // or one epoch per scheduler slice
//   Ensemble next = trainer->best();
//   TrainingReport report = trainer->Report();
#ifndef FORAY_CORE_MODEL_TRAINER_H_
#define FORAY_CORE_MODEL_TRAINER_H_

#include <cstdint>
#include <memory>
#include <utility>
#include <vector>

#include "Eigen/Core"
#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "core/model/ensemble.h"
#include "core/model/inference.h"
#include "core/util/parallel.h"
#include "core/util/random.h"

namespace foray::model {

// A robot's transitions, a row per transition, in robot units.
struct TransitionData {
  Eigen::MatrixXf states;       // (n, state_dim)
  Eigen::MatrixXf actions;      // (n, action_dim)
  Eigen::MatrixXf next_states;  // (n, state_dim)
  Eigen::VectorXf rewards;      // (n)
  // (n): 1 where the transition ended the episode in an irrecoverable state (the client's
  // terminal flag), else 0; empty means no terminals. An episode cut by a time limit (the
  // next transition has a new episode id) is not a terminal: only the flag teaches the
  // termination head.
  Eigen::VectorXf terminals;

  int size() const { return static_cast<int>(states.rows()); }
  // InvalidArgument naming the array and both sizes when shapes disagree with the dimensions
  // or with each other, when a value is not finite, or when a terminal flag is not 0 or 1.
  absl::Status Validate(int state_dim, int action_dim) const;
};

struct TrainingOptions {
  // Rows per minibatch, per member. Range 1..65536.
  int batch_size = 256;
  // Epochs at most; an epoch is one pass over each member's bootstrap resample, or as many
  // whole passes as reach min_epoch_steps minibatch steps. Range 1..10000.
  int max_epochs = 50;
  // Fewest minibatch steps (Adam updates) in an epoch: with few transitions a pass is a step or
  // two, and max_epochs and patience would stop training after a few dozen updates. Passes
  // over the resample repeat (each reshuffled) until this many steps have run; 1 is one pass.
  // Range 1..100000.
  int min_epoch_steps = 1;
  // AdamW step size and decoupled weight decay (Kingma & Ba 2015; Loshchilov & Hutter 2019),
  // per step. The decay applies to weights and biases, not to the log-variance bounds.
  double learning_rate = 1e-3;
  double weight_decay = 1e-5;
  double adam_beta1 = 0.9;
  double adam_beta2 = 0.999;
  double adam_epsilon = 1e-8;
  // Weight of the bound penalty c * (sum(max_lv) - sum(min_lv)) (Chua et al. 2018).
  double log_var_bound_penalty = 0.01;
  // Termination head: weight of its binary cross-entropy beside the NLL (>= 0, finite), and
  // the largest weight of a terminal row. Terminal rows are weighted by
  // w_pos = min(non-terminal rows / terminal rows, max_terminal_pos_weight) among the training
  // rows (PyTorch's documentation of BCEWithLogitsLoss: pos_weight = negatives / positives);
  // the cap (range 1..1000) is common practice, so that a handful of terminals does not make
  // the head predict termination wherever the model is unsure.
  double termination_weight = 1.0;
  double max_terminal_pos_weight = 10.0;
  // beta of the beta-NLL (Seitzer et al., ICLR 2022; Ensemble::MemberLossAndGradient): each
  // element's NLL weighted by its predicted variance^beta, held constant. 0 is the plain
  // Gaussian NLL; the paper recommends 0.5. Range [0, 1]. Early stopping and the report use
  // the plain NLL either way.
  double nll_beta = 0.0;
  // beta of the reward's column alone. Its variance plays no part in a plan (the objective
  // reads the expected reward), and with a sparse reward (a few rewarded rows among thousands)
  // the NLL lets the predicted variance absorb the rare rows: the mean stays near zero where
  // the reward was earned. At 1 the mean's gradient is that of the squared error (Seitzer et
  // al. 2022, the beta = 1 case), while the variance is still fitted. Range [0, 1].
  double reward_nll_beta = 0.0;
  // Fraction of transitions held out for early stopping and the report. Range [0, 0.5].
  double holdout_fraction = 0.1;
  // Stop after this many epochs without a holdout improvement. Range 1..10000.
  int patience = 5;
  // Resample each member's training rows with replacement (the bootstrap). When false every
  // member sees all training rows in its own order.
  bool bootstrap = true;
  // Refit the normalisers to the data before training (also on warm start).
  bool refit_normalizers = true;
  uint64_t seed = 1;

  absl::Status Validate() const;
};

struct TrainingReport {
  int epochs = 0;       // epochs run
  int best_epoch = 0;   // epoch whose weights were kept (0: the starting weights)
  int transitions = 0;  // rows used in all
  int train_rows = 0;
  int holdout_rows = 0;
  // Mean Gaussian NLL per output element, nats, in normalised units, averaged over members:
  // train over the last epoch's minibatches, holdout for the kept weights. When there is no
  // holdout, holdout figures are computed on the training rows.
  double train_nll = 0;
  double holdout_nll = 0;
  // Mean squared error of the ensemble mean on the holdout, normalised units.
  double holdout_mse = 0;
  // Termination head (0 without one): terminal rows among all rows, the weight w_pos of a
  // terminal row, and the weighted BCE (nats per row) of the kept weights on the holdout,
  // averaged over members. Early stopping watches holdout_nll + termination_weight * this.
  int terminal_rows = 0;
  double terminal_pos_weight = 0;
  double holdout_termination_bce = 0;
  // Per output dimension (state deltas, then reward): fraction of holdout targets inside the
  // ensemble's predicted 1-sigma and 2-sigma intervals (moment-matched mixture Gaussian).
  std::vector<double> within_1sigma;
  std::vector<double> within_2sigma;
  // Per output dimension: root mean square error of the ensemble mean on the holdout,
  // normalised units (what the model does not fit, of each dimension's spread).
  std::vector<double> holdout_rmse;
};

class EnsembleTrainer {
 public:
  // Not copyable or movable (holds views into its own buffers); pass by unique_ptr.
  EnsembleTrainer(const EnsembleTrainer&) = delete;
  EnsembleTrainer& operator=(const EnsembleTrainer&) = delete;

  // Starts training from `start` (warm start: its weights are the first iterate).
  // InvalidArgument for bad options or data; FailedPrecondition with fewer than 2 transitions.
  static absl::StatusOr<std::unique_ptr<EnsembleTrainer>> Create(
      Ensemble start, const TransitionData& data, const TrainingOptions& options);

  // Runs one epoch. Returns true when training has finished (early stop or max_epochs);
  // further calls do nothing and return true. `parallel` may run the members' gradient passes
  // of each minibatch step, and the evaluation, on several threads; the result is the same bit
  // for bit however the work is split (each member's figures are summed in member order).
  bool RunEpoch(const ParallelFor& parallel = {});
  bool done() const { return done_; }

  // The weights with the lowest holdout NLL so far.
  const Ensemble& best() const { return best_; }
  // The report for best(); computes the holdout statistics.
  TrainingReport Report() const;

 private:
  EnsembleTrainer(Ensemble start, const TrainingOptions& options);
  // The holdout loss early stopping watches: NLL + termination_weight * BCE; *nll and *bce
  // (may be null) get the parts.
  double HoldoutLoss(const Ensemble& model, const ParallelFor& parallel, double* nll,
                     double* bce) const;
  void AdamStep();

  const TrainingOptions options_;
  Ensemble current_;
  Ensemble best_;
  // Normalised inputs (n, input_dim) and targets (n, output_dim).
  Eigen::MatrixXf x_;
  Eigen::MatrixXf y_;
  std::vector<int> train_rows_;
  std::vector<int> holdout_rows_;
  std::vector<std::vector<int>> member_rows_;  // bootstrap resample per member
  // The evaluation rows (the holdout, or the training rows when there is none), row-major for
  // the inference kernels.
  PackedEnsemble::RowMatrix holdout_x_;
  PackedEnsemble::RowMatrix holdout_y_;     // (rows, output_dim)
  Eigen::VectorXf holdout_terminal_;           // (rows), empty without a termination head
  double pos_weight_ = 1.0;                    // w_pos of a terminal row
  int terminal_rows_ = 0;
  // AdamW state: gradients and moments of params (num_member_params, B) and of the bounds.
  Eigen::MatrixXf grad_, m_, v_;
  Eigen::VectorXf grad_max_, m_max_, v_max_, grad_min_, m_min_, v_min_;
  // Per member, reused across steps: its minibatch, the gradient pass's buffers, its part of
  // the bound gradients and its loss.
  struct MemberStep {
    Eigen::MatrixXf x, y;
    Ensemble::GradientWorkspace workspace;
    Eigen::VectorXf grad_max, grad_min;
    double nll = 0;
    float bce = 0;
  };
  std::vector<MemberStep> member_steps_;
  int64_t step_ = 0;
  int epoch_ = 0;
  int best_epoch_ = 0;
  int epochs_since_best_ = 0;
  double best_holdout_loss_ = 0;
  double best_holdout_nll_ = 0;
  double best_holdout_bce_ = 0;
  double last_train_nll_ = 0;
  bool done_ = false;
  Rng rng_;
};

// Convenience: trains to completion.
absl::StatusOr<std::pair<Ensemble, TrainingReport>> TrainEnsemble(
    Ensemble start, const TransitionData& data, const TrainingOptions& options);

}  // namespace foray::model

#endif  // FORAY_CORE_MODEL_TRAINER_H_
