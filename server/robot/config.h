// A robot's settings in domain terms (dimensions, limits, model, training, planner, objective),
// as the robot runtime uses them. Built from the wire's RobotSpec by the api layer. A value;
// safe to read from several threads.
#ifndef FORAY_SERVER_ROBOT_CONFIG_H_
#define FORAY_SERVER_ROBOT_CONFIG_H_

#include <cstdint>
#include <string>
#include <vector>

#include "core/explore/objective.h"
#include "core/model/ensemble.h"
#include "core/model/trainer.h"
#include "core/plan/cem.h"
#include "core/plan/planner.h"

namespace foray::robot {

// When the runtime retrains.
struct TrainingPolicy {
  int every_n_transitions = 500;  // new transitions since the last round
  bool at_episode_end = true;     // also when an episode ends (terminal or a new episode id)
  int min_transitions = 200;      // before the first model
};

struct RobotConfig {
  std::string name;
  int state_dim = 0;
  int action_dim = 0;
  // Bounds (action_dim each) and per-step rate limits (0: none) of the actions.
  plan::SequenceLimits limits;
  double control_period_s = 0.0;  // seconds
  model::EnsembleOptions ensemble;
  model::TrainingOptions training;
  TrainingPolicy policy;
  plan::PlannerOptions planner;
  explore::ObjectiveOptions objective;
  // The coverage grid: two state indices, their ranges (empty: the data's own range) and the
  // cells per side.
  std::vector<int> coverage_indices = {0, 1};
  std::vector<double> coverage_lower, coverage_upper;
  int coverage_cells = 20;
  // An episode succeeds when its return is greater than this (reward units).
  double success_return = 0.0;
};

}  // namespace foray::robot

#endif  // FORAY_SERVER_ROBOT_CONFIG_H_
