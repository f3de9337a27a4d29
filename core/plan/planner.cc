#include "core/plan/planner.h"

#include <chrono>
#include <cmath>
#include <vector>

#include "absl/strings/str_format.h"
#include "core/util/random.h"

namespace foray::plan {

absl::Status PlannerOptions::Validate() const {
  if (absl::Status s = cem.Validate(); !s.ok()) return s;
  if (absl::Status s = rollout.Validate(); !s.ok()) return s;
  if (rollout.horizon != cem.horizon) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "the rollouts' horizon is %d, the optimiser's %d; they must agree (set_horizon)",
        rollout.horizon, cem.horizon));
  }
  if (report_particles < 0 || report_particles > RolloutOptions::kMaxParticles) {
    return absl::InvalidArgumentError(absl::StrFormat("report_particles is %d, must be in 0..%d",
                                                      report_particles,
                                                      RolloutOptions::kMaxParticles));
  }
  return absl::OkStatus();
}

absl::StatusOr<PlanResult> Plan(const RolloutModel& model, const PlanRequest& request) {
  const auto start = std::chrono::steady_clock::now();
  const explore::ObjectiveOptions& objective = request.objective;
  const PlannerOptions& options = request.options;
  const SequenceLimits& limits = request.limits;
  const Eigen::VectorXf& state = request.state;
  const CemWarmStart* const warm_start = request.warm_start;
  const int shift = request.shift;
  const PlanContext& context = request.context;
  if (absl::Status s = options.Validate(); !s.ok()) return s;
  if (absl::Status s = objective.Validate(model.state_dim(), model.action_dim()); !s.ok()) return s;
  if (absl::Status s = options.rollout.state_bounds.Validate(model.state_dim()); !s.ok()) {
    return s;
  }
  if (options.rollout.value != nullptr && options.rollout.value->state_dim() != model.state_dim()) {
    return absl::InvalidArgumentError(
        absl::StrFormat("the state value has %d state dimensions, the model has %d",
                        options.rollout.value->state_dim(), model.state_dim()));
  }
  if (options.rollout.nearby_reward != nullptr &&
      options.rollout.nearby_reward->state_dim() != model.state_dim()) {
    return absl::InvalidArgumentError(
        absl::StrFormat("the nearby reward has %d state dimensions, the model has %d",
                        options.rollout.nearby_reward->state_dim(), model.state_dim()));
  }
  if (limits.dim() != model.action_dim()) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "limits have %d action values, the model has %d", limits.dim(), model.action_dim()));
  }
  if (state.size() != model.state_dim()) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "state has %d values, the model expects %d", state.size(), model.state_dim()));
  }
  for (int k = 0; k < state.size(); ++k) {
    if (!std::isfinite(state[k])) {
      return absl::InvalidArgumentError(absl::StrFormat("state[%d] is %g, must be finite", k, state[k]));
    }
  }

  if (context.tasks < 1) {
    return absl::InvalidArgumentError(absl::StrFormat("tasks is %d, must be >= 1", context.tasks));
  }

  const RolloutOptions& rollout = options.rollout;
  const int tasks = context.parallel ? context.tasks : 1;
  std::vector<RolloutWorkspace> workspaces(tasks);
  std::vector<RolloutStats> task_stats(tasks);
  const std::ptrdiff_t width = static_cast<std::ptrdiff_t>(options.horizon()) * limits.dim();
  // A fresh draw of particles per iteration keeps the optimiser from fitting one draw's noise;
  // candidates within an iteration share draws (so groups of them may be scored apart).
  uint64_t iteration = 0;  // streams 1, 2, ... of options.cem.seed; 0 is the report's
  ScoreFunction score = [&](const float* sequences, int n, float* scores) {
    const uint64_t seed = DeriveSeed(options.cem.seed, ++iteration);
    auto group = [&](int task) {
      const int first = static_cast<int>(static_cast<int64_t>(n) * task / tasks);
      const int last = static_cast<int>(static_cast<int64_t>(n) * (task + 1) / tasks);
      if (last <= first) return;
      ScoreSequences(model, objective, rollout, state.data(), sequences + first * width,
                     last - first, seed, scores + first, &workspaces[task], nullptr,
                     &task_stats[task]);
    };
    if (tasks == 1) {
      group(0);
    } else {
      context.parallel(tasks, group);
    }
  };
  absl::StatusOr<CemResult> cem = MaximizeCem(
      options.cem, limits, score,
      {.warm_start = warm_start, .shift = shift, .deadline = context.deadline, .now = context.now});
  if (!cem.ok()) return cem.status();

  PlanResult result;
  result.actions = cem->best;
  result.iterations = cem->iterations;
  result.evaluations = cem->evaluations;
  result.warm_start = std::move(cem->next);

  // The reported prediction: a separate rollout of the chosen sequence with its own draws.
  RolloutOptions report = rollout;
  report.particles = options.report_particles > 0 ? options.report_particles : rollout.particles;
  RolloutTrace trace;
  float objective_value = 0.0f;
  ScoreSequences(model, objective, report, state.data(), result.actions.data(), 1,
                 DeriveSeed(options.cem.seed, 0), &objective_value, &workspaces[0], &trace,
                 &task_stats[0]);
  result.state_mean = trace.state_mean;
  result.state_std = trace.state_std;
  result.expected_reward = trace.expected_reward;
  result.information_gain = trace.information_gain;
  result.survival = trace.survival;
  result.min_survival = trace.min_survival;
  result.objective = objective_value;
  double discount = 1.0;
  for (int t = 0; t < options.horizon(); ++t) {
    result.expected_return += discount * trace.expected_reward[t];
    result.total_information_gain += discount * trace.information_gain[t];
    discount *= objective.discount;
  }
  result.value_beyond = trace.value_beyond;
  for (const RolloutStats& stats : task_stats) {
    result.model_seconds += stats.model_seconds;
    result.model_flops += stats.model_flops;
  }
  result.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
  return result;
}

}  // namespace foray::plan
