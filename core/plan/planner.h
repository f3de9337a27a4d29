// The exploration planner: iCEM over action sequences scored by particle rollouts through the
// robot's model, objective J = mean_p sum_t gamma^t (w_r E[r_t] + w_i I_t). Plan() is a pure
// function of its arguments (the model is read-only, the warm start is only read); calls may run
// on several threads at once. Under a fixed options.seed the result is deterministic, whether
// or not the context splits the rollouts over threads.
//
//   EnsembleRolloutModel model(ensemble);      // once per published model version
//   PlannerOptions options;                    // horizon 20, population 200, elites 20, ...
//   PlanContext context;
//   context.deadline = absl::Now() + absl::Milliseconds(50);
//   auto plan = Plan(model, {.state = state, .limits = limits, .objective = objective,
//                            .options = options, .warm_start = &last->warm_start, .context = context});
#ifndef FORAY_CORE_PLAN_PLANNER_H_
#define FORAY_CORE_PLAN_PLANNER_H_

#include <functional>

#include "Eigen/Core"
#include "absl/status/statusor.h"
#include "absl/time/time.h"
#include "core/explore/objective.h"
#include "core/plan/cem.h"
#include "core/plan/rollout.h"

namespace foray::plan {

// The planner's settings: the optimiser's and the rollouts', each with its ranges beside it
// (cem.h, rollout.h). The plan's horizon is cem.horizon and rollout.horizon, which must agree:
// set both with set_horizon. cem.seed seeds the plan.
struct PlannerOptions {
  CemOptions cem;
  RolloutOptions rollout;
  // Particles of the final rollout of the chosen sequence that fills the result's predicted
  // states, rewards and information gains; 0 means rollout.particles. 0..kMaxParticles.
  int report_particles = 0;

  int horizon() const { return cem.horizon; }
  void set_horizon(int steps) { cem.horizon = rollout.horizon = steps; }
  // The first refused value, named by its field (without a prefix: "population is 0, ...").
  absl::Status Validate() const;
};

struct PlanResult {
  RowMatrixXf actions;            // (horizon, action_dim), robot units, within the limits
  RowMatrixXf state_mean;         // (horizon, state_dim): predicted state after each action
  RowMatrixXf state_std;          // (horizon, state_dim)
  Eigen::VectorXf expected_reward;   // (horizon), reward units
  Eigen::VectorXf information_gain;  // (horizon), nats
  // (horizon): probability that the episode has not ended by the end of each step (mean over
  // the report's particles); all 1 when the model cannot predict an end.
  Eigen::VectorXf survival;
  Eigen::VectorXf min_survival;  // (horizon): the lowest particle's survival
  // From the final rollout: J and its discounted parts sum_t gamma^t E[s_t r_t] and
  // sum_t gamma^t E[s_t I_t] (s_t: survival before step t; 1 without terminations).
  double objective = 0.0;
  double expected_return = 0.0;
  double total_information_gain = 0.0;
  // The value of the states the final rollout ended in, E[s_H V(x_H)] (unweighted,
  // undiscounted; 0 without a value or with value_weight 0): J adds w_v gamma^H times it.
  double value_beyond = 0.0;
  int iterations = 0;
  int evaluations = 0;
  double seconds = 0.0;          // wall time of Plan
  double model_seconds = 0.0;    // thread-seconds spent in the model's forward passes
  double model_flops = 0.0;      // floating-point operations of those passes
  CemWarmStart warm_start;       // pass to the next Plan of this robot
};

// How one call of Plan may use the caller's clock and threads.
struct PlanContext {
  // The optimiser stops between iterations when the next one would end after this.
  absl::Time deadline = absl::InfiniteFuture();
  // The clock; absl::Now when empty.
  std::function<absl::Time()> now;
  // Runs the rollouts of disjoint groups of candidates as `tasks` parallel tasks (each with its
  // own buffers); empty: all on the caller's thread. The result does not depend on it: every
  // candidate is scored on the same random draws whichever group it falls in.
  ParallelFor parallel;
  int tasks = 1;
};

// One plan: where from, within which limits, for which objective, with which settings.
struct PlanRequest {
  Eigen::VectorXf state;  // (state_dim), robot units, finite
  // The robot's action bounds, rate limits and (optionally) the last applied action.
  SequenceLimits limits;
  explore::ObjectiveOptions objective;
  PlannerOptions options;
  // The previous plan's warm_start, or null; shifted by `shift` executed steps (>= 0).
  const CemWarmStart* warm_start = nullptr;
  int shift = 1;
  PlanContext context;  // deadline, clock and threads
};

// Plans for `request` on `model`. Errors: InvalidArgument for bad options, limits or a state
// of the wrong size or non-finite; FailedPrecondition when the model gives non-finite
// predictions everywhere.
absl::StatusOr<PlanResult> Plan(const RolloutModel& model, const PlanRequest& request);

}  // namespace foray::plan

#endif  // FORAY_CORE_PLAN_PLANNER_H_
