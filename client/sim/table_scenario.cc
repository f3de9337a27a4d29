// The "table" robot on MuJoCo (client/sim/models/table.xml): a rod on a two-axis stage pushes a
// puck over a table with open edges. Its parameters were fixed before any learning run:
//   control period 0.05 s (25 physics steps of 2 ms), 160 steps per episode (8 s);
//   action: the stage's velocity command on x and y, each in [-0.8, 0.8] m/s, at most 0.2 m/s
//   change per period (a drive's acceleration limit, 4 m/s^2);
//   state: rod position x, y (m) and velocity (m/s), puck position x, y (m) and velocity (m/s);
//   start: rod at (-0.20, 0) m, puck at rest at (-0.05, 0) m plus U(-0.03, 0.03) m on each axis;
//   hidden goal: the puck at rest (speed < 0.02 m/s) with its centre within 0.05 m of
//   (0.15, 0.15) m: reward 1 per such step, else 0;
//   lost (terminal): the puck's centre past an edge of the table (|x| or |y| > 0.25 m) or fallen
//   below it; the stage's travel (+-0.28 m) reaches past the edges, so the rod can push it off.
// The goal is 0.25 m from the puck's start, diagonally, 0.10 m from two open edges: the puck
// must be pushed there along a bent path (a round rod on a round puck pushes it along the line
// through both centres, so the push must be steered) and left there; a push that goes on slides
// it off the corner. Sliding friction 0.1 lets a released puck slide v^2 / (2 * 0.1 * 9.81):
// 5 cm after a push at 0.3 m/s, 33 cm (off the table) after a strike at the rod's top speed.
// Design check against random pushing (Baseline::kRandom, 10 seeds of 24 episodes), kept as a
// test (tests/client/sim/mujoco_test.cc): it reaches the goal in at most 3 of 10 seeds, and at
// least a quarter of its episodes that move the puck (more than 5 cm) lose it. Run before any
// learning run; the design went through three versions against it (friction 0.3, table
// 0.60 m, 0.4 m/s: the puck was never lost; friction 0.2, table 0.50 m: still never lost;
// then this one), never against a planner.
#include <algorithm>
#include <cmath>
#include <random>

#include "absl/strings/str_format.h"
#include "client/sim/mujoco_world.h"
#include "client/sim/scenario.h"

namespace foray::sim {
namespace {

constexpr double kGoalX = 0.15, kGoalY = 0.15, kGoalRadius = 0.05, kAtRest = 0.02;  // m, m/s
constexpr double kEdge = 0.25;                                                      // m
constexpr double kTravel = 0.28;        // m: the stage's travel from the centre, each axis
constexpr double kStageStartX = -0.20;  // m: the stage_x body's position in the model
constexpr double kPuckStartX = -0.05, kPuckJitter = 0.03;  // m
constexpr double kSpeed = 0.8, kSpeedStep = 0.2;           // m/s, m/s per period
constexpr int kPhysicsSteps = 25;                          // of 2 ms per period

class TableScenario final : public Scenario {
 public:
  TableScenario(std::unique_ptr<MujocoWorld> world, uint64_t seed)
      : world_(std::move(world)),
        rng_(seed),
        stage_x_q_(world_->QposOf("stage_x")),
        stage_y_q_(world_->QposOf("stage_y")),
        stage_x_v_(world_->QvelOf("stage_x")),
        stage_y_v_(world_->QvelOf("stage_y")),
        puck_x_q_(world_->QposOf("puck_x")),
        puck_y_q_(world_->QposOf("puck_y")),
        puck_z_q_(world_->QposOf("puck_z")),
        puck_x_v_(world_->QvelOf("puck_x")),
        puck_y_v_(world_->QvelOf("puck_y")) {}

  std::string kind() const override { return "table"; }
  std::vector<Dim> state_dims() const override {
    return {
        {"rod_x", "m"},  {"rod_y", "m"},  {"rod_velocity_x", "m/s"},  {"rod_velocity_y", "m/s"},
        {"puck_x", "m"}, {"puck_y", "m"}, {"puck_velocity_x", "m/s"}, {"puck_velocity_y", "m/s"}};
  }
  std::vector<Dim> action_dims() const override {
    return {{"stage_velocity_command_x", "m/s"}, {"stage_velocity_command_y", "m/s"}};
  }
  std::vector<ActionRange> action_ranges() const override {
    return {{-kSpeed, kSpeed, kSpeedStep}, {-kSpeed, kSpeed, kSpeedStep}};
  }
  // The stage's travel on each axis (the joints' ranges in table.xml).
  std::vector<StateRange> state_ranges() const override {
    return {{0, -kTravel, kTravel}, {1, -kTravel, kTravel}};
  }
  double control_period_s() const override { return kPhysicsSteps * world_->model()->opt.timestep; }
  int episode_steps() const override { return 160; }
  // 1.5 s: from the start the rod needs about 0.4 s to reach the puck (0.12 m, accelerating at
  // 4 m/s^2 and slowing down before contact) and about 0.9 s more to push it the 0.25 m to the
  // goal at 0.3 m/s; 15 steps (0.75 s) would not see a push's outcome from the start.
  int plan_horizon() const override { return 30; }
  std::vector<int> coverage_indices() const override { return {4, 5}; }
  std::vector<double> coverage_lower() const override { return {-kEdge, -kEdge}; }
  std::vector<double> coverage_upper() const override { return {kEdge, kEdge}; }

  Eigen::VectorXd Reset() override {
    world_->Reset();
    std::uniform_real_distribution<double> jitter(-kPuckJitter, kPuckJitter);
    world_->data()->qpos[puck_x_q_] = kPuckStartX + jitter(rng_);
    world_->data()->qpos[puck_y_q_] = jitter(rng_);
    if (absl::Status s = world_->Forward(); !s.ok()) AbortSimulation(kind(), s);
    return State();
  }
  Eigen::VectorXd Step(const Eigen::VectorXd& action) override {
    world_->data()->ctrl[0] = std::clamp(action[0], -kSpeed, kSpeed);
    world_->data()->ctrl[1] = std::clamp(action[1], -kSpeed, kSpeed);
    if (absl::Status s = world_->Step(kPhysicsSteps); !s.ok()) AbortSimulation(kind(), s);
    return State();
  }
  Eigen::VectorXd Nominal(const Eigen::VectorXd& s) const override {
    return Eigen::Vector2d(std::clamp(-2.0 * (s[0] - kStageStartX), -kSpeed, kSpeed),
                           std::clamp(-2.0 * s[1], -kSpeed, kSpeed));  // hold the start pose
  }
  double Reward(const Eigen::VectorXd& s) const override {
    const bool inside = std::hypot(s[4] - kGoalX, s[5] - kGoalY) <= kGoalRadius;
    return inside && std::hypot(s[6], s[7]) < kAtRest ? 1.0 : 0.0;
  }
  bool Terminal(const Eigen::VectorXd& s) const override {
    return std::abs(s[4]) > kEdge || std::abs(s[5]) > kEdge ||
           world_->data()->qpos[puck_z_q_] < -0.02;
  }
  std::string ZoneDescription() const override {
    return absl::StrFormat(
        "puck at rest (speed < %g m/s) within %.2f m of (%.2f, %.2f) m; lost past the table's "
        "edges at +-%.2f m",
        kAtRest, kGoalRadius, kGoalX, kGoalY, kEdge);
  }

 private:
  Eigen::VectorXd State() const {
    const mjData* d = world_->data();
    Eigen::VectorXd s(8);
    s << kStageStartX + d->qpos[stage_x_q_], d->qpos[stage_y_q_], d->qvel[stage_x_v_],
        d->qvel[stage_y_v_], d->qpos[puck_x_q_], d->qpos[puck_y_q_], d->qvel[puck_x_v_],
        d->qvel[puck_y_v_];
    return s;
  }
  const std::unique_ptr<MujocoWorld> world_;
  std::mt19937_64 rng_;
  const int stage_x_q_, stage_y_q_, stage_x_v_, stage_y_v_;
  const int puck_x_q_, puck_y_q_, puck_z_q_, puck_x_v_, puck_y_v_;
};

}  // namespace

absl::StatusOr<std::unique_ptr<Scenario>> MakeTableScenario(uint64_t seed) {
  absl::StatusOr<std::unique_ptr<MujocoWorld>> world = LoadModelFile("table.xml");
  if (!world.ok()) return world.status();
  return std::unique_ptr<Scenario>(new TableScenario(*std::move(world), seed));
}

}  // namespace foray::sim
