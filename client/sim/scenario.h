// Simulated robots of our own, each a physics model stepped with RK4 at kSimulationStep under
// a zero-order hold of the action for one control period, with a sparse reward inside a zone
// the planner is not told about. A scenario object is one robot: not thread-safe.
//
//   auto robot = MakeScenario("gantry", /*seed=*/3);
//   Eigen::VectorXd s = robot->Reset();
//   Eigen::VectorXd next = robot->Step(action);
//   double r = robot->Reward(next);
#ifndef FORAY_CLIENT_SIM_SCENARIO_H_
#define FORAY_CLIENT_SIM_SCENARIO_H_

#include <memory>
#include <random>
#include <string>
#include <vector>

#include "Eigen/Core"
#include "absl/status/statusor.h"

namespace foray::sim {

struct Dim {
  std::string label, unit;
};

struct ActionRange {
  double min, max, max_step;  // action units; max_step per control period, 0: none
};

// A range a state dimension cannot leave (a hard travel stop), in the dimension's unit.
struct StateRange {
  int index;
  double min, max;
};

class Scenario {
 public:
  virtual ~Scenario() = default;
  virtual std::string kind() const = 0;
  virtual std::vector<Dim> state_dims() const = 0;
  virtual std::vector<Dim> action_dims() const = 0;
  virtual std::vector<ActionRange> action_ranges() const = 0;
  virtual double control_period_s() const = 0;
  virtual int episode_steps() const = 0;
  // Planning horizon in control steps: long enough to see an action's consequence on the
  // reward (the robot's own time scale, derived from its physics, not from planner results).
  virtual int plan_horizon() const { return 15; }
  // The hard stops of the robot's own travel, as a lab would put them in the spec (empty: none
  // guaranteed; soft limits that the robot can be pushed past are not listed).
  virtual std::vector<StateRange> state_ranges() const { return {}; }
  // Two state indices for the coverage map, and their ranges.
  virtual std::vector<int> coverage_indices() const = 0;
  virtual std::vector<double> coverage_lower() const = 0;
  virtual std::vector<double> coverage_upper() const = 0;
  // The state at the start of an episode.
  virtual Eigen::VectorXd Reset() = 0;
  // The state one control period later; the action is clipped to the ranges first.
  virtual Eigen::VectorXd Step(const Eigen::VectorXd& action) = 0;
  // The action of a fixed nominal controller (a PD hold of the start pose), the base of the
  // "noise" baseline that adds Gaussian noise to it.
  virtual Eigen::VectorXd Nominal(const Eigen::VectorXd& state) const = 0;
  // 1 inside the hidden zone, else 0.
  virtual double Reward(const Eigen::VectorXd& state) const = 0;
  // Whether `state` is irrecoverable (the episode ends there: an object lost, a fall). The
  // gantry and the arm have no such states.
  virtual bool Terminal(const Eigen::VectorXd& /*state*/) const { return false; }
  // A description of the zone, for the terminal.
  virtual std::string ZoneDescription() const = 0;
};

// The action of a baseline without a model, given the state and the previous action. kNoise:
// the scenario's nominal action plus Gaussian noise of `noise_fraction` of each half range.
// kRandom: an Ornstein-Uhlenbeck process around the range's centre (correlation time 10 control
// periods, stationary standard deviation half the half range), so the robot wanders over its
// whole range as random pushing would. Both are then clipped to the rate limit and the bounds.
enum class Baseline { kNoise, kRandom };
std::vector<double> BaselineAction(const Scenario& sim, const Eigen::VectorXd& state,
                                   const std::vector<double>& previous, Baseline kind,
                                   double noise_fraction, std::mt19937_64& rng);

// "gantry", "arm" (our own RK4 physics), "bench" (MuJoCo: a paddle strikes a puck, which can be
// lost off the open end of the bench) or "table" (MuJoCo: a rod on a two-axis stage pushes a
// puck, which can be lost off any edge of the table); InvalidArgument for another name, NotFound
// or InvalidArgument naming the file when a MuJoCo robot's MJCF model is missing or malformed.
absl::StatusOr<std::unique_ptr<Scenario>> MakeScenario(const std::string& kind, uint64_t seed);
absl::StatusOr<std::unique_ptr<Scenario>> MakeBenchScenario(uint64_t seed);
absl::StatusOr<std::unique_ptr<Scenario>> MakeTableScenario(uint64_t seed);

}  // namespace foray::sim

#endif  // FORAY_CLIENT_SIM_SCENARIO_H_
