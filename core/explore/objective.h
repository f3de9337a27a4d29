// The planning objective: weights of expected reward and information gain, the discount, the
// estimator, and the known reward functions a robot's spec may give instead of the learned
// reward head. Values; reading from several threads is safe.
//
//   J = mean_p sum_t gamma^t [ s_t ( w_r E[r_t] + w_i I_t ) + (s_t - s_{t+1}) V_term ],
// with s_t the particle's probability of not having ended the episode before step t
// (core/plan/rollout.h).
#ifndef FORAY_CORE_EXPLORE_OBJECTIVE_H_
#define FORAY_CORE_EXPLORE_OBJECTIVE_H_

#include <vector>

#include "absl/status/status.h"
#include "core/explore/information_gain.h"

namespace foray::explore {

// A reward given as a function of the transition instead of learned.
struct KnownReward {
  enum class Kind {
    kLearned = 0,    // use the ensemble's reward head
    kQuadratic = 1,  // r = -sum_k q_k (s'_k - target_k)^2 - sum_j c_j a_j^2
    kRegion = 2,     // r = 1 when lower_i <= s'_{indices_i} <= upper_i for every i, else 0
  };
  Kind kind = Kind::kLearned;

  // kQuadratic. target: state_dim values (state units); state_weight: state_dim values
  // (1/unit^2), empty means all 1; action_weight: action_dim values, empty means all 0.
  std::vector<double> target;
  std::vector<double> state_weight;
  std::vector<double> action_weight;

  // kRegion. indices into the state; lower and upper the same length, lower <= upper.
  std::vector<int> indices;
  std::vector<double> lower;
  std::vector<double> upper;

  // InvalidArgument naming the field and the sizes when a vector does not fit the robot.
  absl::Status Validate(int state_dim, int action_dim) const;

  // Reward of `rows` transitions. next_states: (rows, state_dim) with row stride
  // `state_stride`; actions: (rows, action_dim) with row stride `action_stride`; row-major,
  // robot units. out: (rows). Requires kind != kLearned and a valid function.
  void Evaluate(const float* next_states, int state_stride, const float* actions,
                int action_stride, int rows, int state_dim, int action_dim, float* out) const;
};

// States that end the episode, given instead of learned (the same region syntax as
// KnownReward's kRegion): a transition ends the episode when its next state lies inside the box
// lower_i <= s'_{indices_i} <= upper_i for every i, or, with `outside`, when it lies outside it
// (the usual way to say "the object left the workspace"). Empty indices: none given.
struct KnownTermination {
  std::vector<int> indices;
  std::vector<double> lower;
  std::vector<double> upper;
  bool outside = false;

  bool given() const { return !indices.empty(); }
  // InvalidArgument naming the field and the values when the region does not fit the state.
  absl::Status Validate(int state_dim) const;
  // out[r] = 1 when row r's next state ends the episode, else 0. next_states: (rows,
  // state_dim) with row stride `state_stride`, robot units. Requires given().
  void Evaluate(const float* next_states, int state_stride, int rows, float* out) const;
};

// How the value of a state is estimated from the returns seen after nearby states
// (core/plan/value.h).
enum class ValueEstimate {
  kAverage = 0,  // the average continuation (Nadaraya-Watson): what the data's policy earned
  kBest = 1,     // the best continuation seen
};

// Where a plan's expected reward comes from when the reward is learned (no known_reward).
enum class RewardEstimate {
  kModel = 0,   // the ensemble's reward output under the particle's member
  kNearby = 1,  // the rewards observed on arriving near the particle's sampled next state
};

struct ObjectiveOptions {
  double reward_weight = 1.0;       // w_r, per reward unit
  double information_weight = 1.0;  // w_i, per nat
  double discount = 1.0;            // gamma, in (0, 1]
  Estimator estimator = Estimator::kPairwiseKl;
  // The information gain is that of measured observations: each state dimension is measured
  // with noise of this standard deviation, as a fraction of the dimension's per-step change in
  // the data (its standard deviation), in [0, 1]; 0: exact observations. 0.05 by default: a
  // sensor that resolves a twentieth of a typical step's change (a Foray default, not a
  // published value; set it from the robot's sensors when known).
  double observation_noise = 0.05;
  int monte_carlo_samples = 1000;   // per row, kMonteCarlo only
  KnownReward known_reward;
  // Paid once, in reward units, when a rollout ends the episode: V_term above, weighted by the
  // probability of ending at that step. 0 (the default) means an ended episode simply earns
  // nothing more: no reward, no information. Beware: when rewards are costs (negative per
  // step), ending early then looks attractive; give a terminal_value at least as low as the
  // rest of an episode's cost (e.g. horizon * the worst step cost) to make it a loss. Finite.
  double terminal_value = 0.0;
  // When given, termination comes from this region instead of the model's termination head.
  KnownTermination known_termination;
  // w_v: weight of the value of the state a rollout ends in (core/plan/value.h), in reward
  // units per unit of value; 0 (the default) plans on the horizon alone. Finite.
  double value_weight = 0.0;
  // gamma_v of the returns the value is fitted to, in (0, 1) (plan::ValueOptions::discount).
  double value_discount = 0.95;
  ValueEstimate value_estimate = ValueEstimate::kAverage;
  // kNearby: each step's reward is a kernel regression of the rewards the robot received on
  // arriving at states near the predicted next state (plan::StateValue fitted to the rewards,
  // core/plan/value.h), instead of the ensemble's reward output. A sparse reward (a zone met a
  // handful of times in thousands of transitions) is one a network's mean fits poorly; the
  // regression keeps every rewarded arrival. Ignored with a known_reward.
  RewardEstimate reward_estimate = RewardEstimate::kModel;

  absl::Status Validate(int state_dim, int action_dim) const;
};

}  // namespace foray::explore

#endif  // FORAY_CORE_EXPLORE_OBJECTIVE_H_
