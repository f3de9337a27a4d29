// Rollouts: P particles per candidate action sequence propagated through a model of B members
// (Chua et al. 2018, "Deep Reinforcement Learning in a Handful of Trials using Probabilistic
// Dynamics Models", NeurIPS). At every step every member is evaluated at every particle in one
// batched call (at the first step, where a candidate's particles share the initial state and
// the action, once per candidate); the particle's next state is sampled from its own member
// (TS-inf: member p mod B for the whole horizon; TS1: a fresh uniform draw per step), and the
// information gain of the step is computed from all B members at the particle's state. Each
// particle carries its survival, the probability that its episode has not ended:
//   s_{p,0} = 1,  s_{p,t+1} = s_{p,t} (1 - q_{p,t}),
// with q_{p,t} the termination probability of step t under the particle's own member
// (sigmoid of its termination head), or 0/1 from the objective's known termination region at
// the sampled next state, or 0 when there is neither. A candidate scores
//   J = (1/P) sum_p sum_t gamma^t [ s_{p,t} ( w_r r_{p,t} + w_i I_{p,t} )
//                                   + (s_{p,t} - s_{p,t+1}) V_term ],
// with r_{p,t} the expected reward under the particle's member (or the known reward at the
// sampled next state, or with the objective's reward_estimate kNearby the rewards received
// near the sampled next state: RolloutOptions::nearby_reward) and V_term the objective's
// terminal_value: an ended episode earns no further reward and no further information, and pays
// V_term once. With a state value given (RolloutOptions::value, core/plan/value.h) and the
// objective's value_weight w_v not 0, a candidate also earns what the data say follows the state
// it ends in:
//   + w_v gamma^H (1/P) sum_p s_{p,H} V(x_{p,H}).
//
// Models are const and safe from several threads; a RolloutWorkspace belongs to one thread.
#ifndef FORAY_CORE_PLAN_ROLLOUT_H_
#define FORAY_CORE_PLAN_ROLLOUT_H_

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <functional>
#include <memory>
#include <vector>

#include "Eigen/Core"
#include "absl/status/status.h"
#include "core/explore/objective.h"
#include "core/model/ensemble.h"
#include "core/model/inference.h"
#include "core/plan/cem.h"
#include "core/plan/value.h"
#include "core/util/parallel.h"

namespace foray::plan {

enum class Propagation { kTsInf = 1, kTs1 = 2 };

// Every member's Gaussian over [state delta, reward] at a batch of rows, in "model units"
// related to robot units by robot = model * scale + offset per output dimension (variances by
// scale^2). Information gain is computed in model units (the estimators are invariant to one
// affine change applied to all members).
struct MemberPredictions {
  int members = 0;
  int rows = 0;
  int output_dim = 0;  // state_dim + 1
  // (members, rows, output_dim) each, index (b * rows + r) * output_dim + k.
  std::vector<float> mean;
  std::vector<float> log_var;
  // (members, rows), index b * rows + r: the termination head's logit; empty when the model
  // has no termination head.
  std::vector<float> term_logit;
  Eigen::VectorXf scale;   // (output_dim)
  Eigen::VectorXf offset;  // (output_dim)
  // Scratch a model may use between calls.
  std::vector<float> input;
  model::PackedEnsemble::Workspace forward;

  // The members' Gaussians over the state delta (the first output_dim - 1 outputs) at every
  // row, in model units: what the information gain is computed on. Borrows this object.
  explore::GaussianSet<float> StateDeltaSet() const {
    explore::GaussianSet<float> set;
    set.members = members;
    set.rows = rows;
    set.dim = output_dim - 1;
    set.mean = mean.data();
    set.log_var = log_var.data();
    set.member_stride = static_cast<std::ptrdiff_t>(rows) * output_dim;
    set.row_stride = output_dim;
    return set;
  }
  // The same Gaussians as seen by a sensor with noise of standard deviation `noise` in model
  // units (a fraction of each dimension's per-step change in the data): every variance floored
  // at noise^2, so that no predicted observation is more precise than it can be measured (a
  // floor of max(var, noise^2), within a factor 2 of the sum var + noise^2). Without it, where
  // the data are deterministic (a part at rest, a joint at its stop) the predicted variances
  // collapse and sub-resolution disagreements between members look like nats of information.
  // A dimension whose change never varied in the data has a scale of at most the normaliser's
  // kMinStd (model::Normalizer): its predictions sit at that constant in robot units, and what
  // its members say in model units is sub-resolution; it is measured as carrying no information
  // (a variance far above any disagreement). With noise 0 and no such dimension:
  // StateDeltaSet(). The floored log-variances go to `scratch`, which the set borrows.
  explore::GaussianSet<float> ObservationSet(float noise, std::vector<float>* scratch) const {
    explore::GaussianSet<float> set = StateDeltaSet();
    constexpr float kUnmeasured = 60.0f;
    const int dim = output_dim - 1;  // the state dimensions; the reward's output is not read
    bool constant = false;
    for (int k = 0; k < dim; ++k) constant |= scale[k] <= kConstantScale;
    if (noise <= 0.0f && !constant) return set;
    const float floor = noise > 0.0f ? 2.0f * std::log(noise) : -INFINITY;
    scratch->resize(log_var.size());
    for (size_t at = 0; at < log_var.size(); at += output_dim) {  // one member's row
      for (int k = 0; k < dim; ++k) {
        const float lowest = scale[k] <= kConstantScale ? kUnmeasured : floor;
        (*scratch)[at + k] = std::max(log_var[at + k], lowest);
      }
      (*scratch)[at + dim] = log_var[at + dim];
    }
    set.log_var = scratch->data();
    return set;
  }
  // Scales up to this are those of constant targets (model::Normalizer::kMinStd).
  static constexpr float kConstantScale = model::Normalizer<float>::kMinStd;
};

// What a rollout needs from a dynamics-and-reward model.
class RolloutModel {
 public:
  virtual ~RolloutModel() = default;
  virtual int members() const = 0;
  virtual int state_dim() const = 0;
  virtual int action_dim() const = 0;
  // Multiply-adds of one member at one row (for the speed report); 0 when unknown.
  virtual double FlopsPerMemberRow() const { return 0.0; }
  // Every member at `rows` rows. states: (rows, state_dim), actions: (rows, action_dim),
  // row-major, robot units. Fills *out (resizing its buffers).
  virtual void Evaluate(const float* states, const float* actions, int rows,
                        MemberPredictions* out) const = 0;
};

// The learned ensemble through its packed copy (model::PackedEnsemble: the weights laid out for
// the SIMD kernels). Built once per published model version. Not copyable (holds the packed
// copy by value; share it with std::shared_ptr<const>).
class EnsembleRolloutModel final : public RolloutModel {
 public:
  explicit EnsembleRolloutModel(const model::Ensemble& ensemble);
  EnsembleRolloutModel(const EnsembleRolloutModel&) = delete;
  EnsembleRolloutModel& operator=(const EnsembleRolloutModel&) = delete;

  int members() const override { return packed_.size(); }
  int state_dim() const override { return state_dim_; }
  int action_dim() const override { return action_dim_; }
  double FlopsPerMemberRow() const override { return flops_per_member_row_; }
  void Evaluate(const float* states, const float* actions, int rows,
                MemberPredictions* out) const override;

 private:
  const int state_dim_;
  const int action_dim_;
  const model::PackedEnsemble packed_;
  Eigen::VectorXf input_mean_, input_inv_std_;  // (input_dim)
  Eigen::VectorXf output_mean_, output_std_;    // (output_dim)
  double flops_per_member_row_ = 0.0;
};

// Known linear dynamics s' = A s + B a + c with zero noise (a one-member "ensemble" whose
// variance is negligible) and reward 0: for robots with a known model and for checking the
// planner against optimal control. A: (state_dim, state_dim), B: (state_dim, action_dim),
// c: (state_dim).
class LinearRolloutModel final : public RolloutModel {
 public:
  LinearRolloutModel(Eigen::MatrixXf a, Eigen::MatrixXf b, Eigen::VectorXf c);

  int members() const override { return 1; }
  int state_dim() const override { return static_cast<int>(a_.rows()); }
  int action_dim() const override { return static_cast<int>(b_.cols()); }
  void Evaluate(const float* states, const float* actions, int rows,
                MemberPredictions* out) const override;

 private:
  const Eigen::MatrixXf a_, b_;
  const Eigen::VectorXf c_;
};

// Ranges the robot's state cannot leave (travel stops, joint limits), per state dimension, in
// robot units; -inf or +inf where a side is unbounded. A rollout holds every member's predicted
// mean next state inside them before it computes the information gain, and every sampled
// particle state after: a predicted observation past a stop is one at the stop. Without them a
// model extrapolates past a stop it has seen only from inside (it cannot know that the motion
// ends there), its members disagree about how far, and the information gain pays the planner
// to push against the stop; held there, members that differ only beyond it agree.
struct StateBounds {
  Eigen::VectorXf lower, upper;  // both empty (no bounds) or state_dim values each

  bool given() const { return lower.size() > 0 || upper.size() > 0; }
  // Sizes state_dim, no NaN, lower <= upper, and every bound finite or the infinity of its side.
  absl::Status Validate(int state_dim) const;
};

// The rollouts' settings. Validate() refuses a value outside the range given beside it.
struct RolloutOptions {
  int horizon = 20;    // steps; 1..CemOptions::kMaxHorizon
  int particles = 5;   // particles per candidate; 1..kMaxParticles
  Propagation propagation = Propagation::kTsInf;  // kTsInf or kTs1
  StateBounds state_bounds;  // none by default; checked against the model's state by Plan
  // The value of the states a rollout ends in (read only when the objective's value_weight is
  // not 0); none by default; its state_dim is checked against the model's by Plan.
  std::shared_ptr<const StateValue> value;
  // The rewards received on arriving near a state (a StateValue fitted to the rewards on the
  // next states; read only when the objective's reward_estimate is kNearby and the reward is
  // learned); none by default, and then the model's reward output stands in.
  std::shared_ptr<const StateValue> nearby_reward;
  static constexpr int kMaxParticles = 1000;
  absl::Status Validate() const;
};

// Per-step detail of a rollout, for the plan result: (horizon, state_dim) means and standard
// deviations of the particles' states after each step, and per-step particle means of the
// expected reward and information gain (undiscounted; each weighted by the particle's survival
// before the step, so that an ended episode counts as earning nothing).
// survival: (horizon) the particles' mean probability that the episode has not ended by the
// end of each step (all 1 when nothing can end it); min_survival: the lowest particle's.
// value_beyond: the particles' mean of s_{p,H} V(x_{p,H}), undiscounted and unweighted (0
// without a value or with value_weight 0).
struct RolloutTrace {
  Eigen::MatrixXf state_mean, state_std;
  Eigen::VectorXf expected_reward, information_gain, survival, min_survival;
  double value_beyond = 0.0;
};

// Time spent by a Score call, for the speed report.
struct RolloutStats {
  double model_seconds = 0.0;
  double model_flops = 0.0;
  double information_seconds = 0.0;
};

// Reused buffers of one thread's rollouts.
struct RolloutWorkspace {
  MemberPredictions predictions;
  std::vector<float> states, actions, first_actions, reward, information, noise, survival, ends,
      value;
  std::vector<float> observed_log_var;  // the members' log-variances with the sensor floor
  std::vector<float> alive_before;  // the trace's particles' survival before the step
  std::vector<int> member_of;
};

using ::foray::ParallelFor;  // core/util/parallel.h

// Scores `candidates` action sequences. sequences: (candidates, horizon * action_dim)
// row-major, step t of candidate n at [n * horizon * action_dim + t * action_dim]; robot units.
// initial_state: (state_dim). Random draws (member choices and sampling noise) depend only on
// `seed` and the particle, not the candidate (common random numbers, so candidates are
// compared on the same draws). scores: (candidates). trace and stats may be null.
void ScoreSequences(const RolloutModel& model, const explore::ObjectiveOptions& objective,
                    const RolloutOptions& options, const float* initial_state,
                    const float* sequences, int candidates, uint64_t seed, float* scores,
                    RolloutWorkspace* workspace, RolloutTrace* trace = nullptr,
                    RolloutStats* stats = nullptr);

}  // namespace foray::plan

#endif  // FORAY_CORE_PLAN_ROLLOUT_H_
