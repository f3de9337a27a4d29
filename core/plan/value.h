// The value of the states a plan ends in: what the robot's own episodes earned after passing
// near them. A plan sees reward only within its horizon; where the reward is sparse (a zone
// reached after a long approach, an object that must come to rest in a bay), a plan that stops
// short of it sees nothing to aim at. The value carries what followed a state in the data back
// to it, so a plan is scored
//   J = J_horizon + w_v gamma^H mean_p s_{p,H} V(x_{p,H})
// (core/plan/rollout.h), with s_{p,H} the particle's survival at the end of the horizon.
//
// V is a Nadaraya-Watson kernel regression (Nadaraya 1964, Watson 1964; Wasserman, "All of
// Nonparametric Statistics", 2006, section 5.4) of each stored transition's discounted return
// after it,
//   G_i = sum_{k>=1} gamma_v^(k-1) (r_{i+k} + [transition i+k ended the episode] V_term),
// summed within the transition's episode (a Monte Carlo return; an episode cut by its time
// limit contributes nothing past its last transition), on its next state x_i:
//   V(x) = sum_i w_i K(x, x_i) G_i / (w_0 + sum_i w_i K(x, x_i)),
//   K(x, x_i) = exp(-|z(x) - z(x_i)|^2 / (2 h^2)),
// with z the state standardised per dimension by the data's mean and standard deviation, h
// Scott's rule n^(-1/(d+4)) (Scott, "Multivariate Density Estimation", 1992, eq. 6.42; scipy's
// gaussian_kde "scott" factor), and w_0 a pseudo-observation of value 0 at every state (the
// estimate shrinks to 0 away from the data instead of copying its nearest point). Above
// max_points transitions a deterministic subsample is kept: the rows with G != 0 and those with
// G = 0 each keep up to half the points (what one group leaves unused goes to the other), at an
// even stride, each kept point weighted by the rows it stands for (w_i); below it every w_i is 1.
//
// That average is what the policy that gathered the data earned after states near x. Where
// that policy mostly failed (an exploring robot that loses the object more often than it parks
// it), the average says "don't go there" even where a success was seen. The best estimate
// instead takes the best continuation seen near x,
//   V_best(x) = max(0, max_i K(x, x_i) G_i),
// (in the spirit of episodic control: Blundell et al. 2016, "Model-Free Episodic Control",
// which keeps the highest return seen after a state); losses are left to the rollout's own
// termination within the horizon. Its points are the rows with G > 0 (the largest first when
// there are more than max_points).
//
// Immutable once built; Evaluate is safe from several threads.
#ifndef FORAY_CORE_PLAN_VALUE_H_
#define FORAY_CORE_PLAN_VALUE_H_

#include <cstdint>
#include <vector>

#include "Eigen/Core"
#include "absl/status/statusor.h"
#include "core/explore/objective.h"
#include "core/util/matrix.h"

namespace foray::plan {

using ValueEstimate = explore::ValueEstimate;  // kAverage or kBest (objective.h)

struct ValueOptions {
  ValueEstimate estimate = ValueEstimate::kAverage;
  // gamma_v of the returns, in (0, 1): 0.95 weighs about the next 20 steps (a Foray default,
  // not a published value).
  double discount = 0.95;
  // V_term: paid when a transition ended the episode (the objective's terminal_value). Finite.
  double terminal_value = 0.0;
  // w_0, > 0 and finite: the weight of the pseudo-observation of value 0.
  double prior_weight = 1.0;
  // Points kept, 1..1,000,000: the cost of a value is one kernel per point per row.
  int max_points = 2048;

  absl::Status Validate() const;
};

// G_i above for rows in the order they were recorded. episodes: each row's episode id; rows of
// one episode are consecutive. terminals: 1 where the row ended its episode in an irrecoverable
// state, else 0 (empty: none). InvalidArgument naming the array when sizes disagree.
absl::StatusOr<std::vector<double>> ReturnsAfter(const std::vector<float>& rewards,
                                                 const std::vector<uint64_t>& episodes,
                                                 const std::vector<float>& terminals,
                                                 double discount, double terminal_value);

class StateValue {
 public:
  // next_states: (rows, state_dim) row-major, robot units, finite; returns: (rows), finite.
  // InvalidArgument naming what is wrong (no rows, sizes, a non-finite value, options).
  static absl::StatusOr<StateValue> Fit(const float* next_states, int rows, int state_dim,
                                        const std::vector<double>& returns,
                                        const ValueOptions& options);

  int state_dim() const { return static_cast<int>(mean_.size()); }
  int points() const { return count_; }
  // h, in standard deviations of the data.
  double bandwidth() const { return bandwidth_; }
  // V at `rows` states (rows, state_dim), row-major with row stride `stride`, robot units.
  void Evaluate(const float* states, int stride, int rows, float* out) const;

 private:
  StateValue() = default;

  Eigen::VectorXf mean_, inv_std_;  // (state_dim)
  // Points padded to a multiple of kPadPoints (weight and value 0 past count_).
  static constexpr int kPadPoints = 16;
  int count_ = 0;
  Eigen::MatrixXf points_;          // (padded points, state_dim), standardised, column-major
  Eigen::VectorXf weight_, value_;  // (padded points)
  // No point with a value other than 0 (kBest with no positive return, a sparse reward not met
  // yet): the estimate is 0 everywhere.
  bool all_zero_ = true;
  ValueEstimate estimate_ = ValueEstimate::kAverage;
  float inv_two_h2_ = 0.0f;
  float prior_ = 1.0f;
  double bandwidth_ = 0.0;
};

}  // namespace foray::plan

#endif  // FORAY_CORE_PLAN_VALUE_H_
