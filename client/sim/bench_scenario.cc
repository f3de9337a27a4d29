// The "bench" robot on MuJoCo (client/sim/models/bench.xml): a paddle on a carriage moves a
// puck only through contact. Its parameters were fixed before any learning run:
//   control period 0.05 s (25 physics steps of 2 ms), 160 steps per episode (8 s);
//   action: the carriage's velocity command in [-1.2, 1.2] m/s, at most 0.3 m/s change per
//   period (a drive's acceleration limit, 6 m/s^2);
//   state: carriage position (m) and velocity (m/s), puck position (m) and velocity (m/s);
//   start: carriage at 0 m, puck at rest at U(0.10, 0.25) m;
//   hidden goal: the puck at rest (|v| < 0.03 m/s) with its centre in the parking bay
//   0.80..0.88 m: reward 1 per such step, else 0;
//   lost (terminal): the puck's centre past the open end (0.95 m) or fallen below the bench.
// The carriage stops at 0.65 m, so the bay is reached only by striking the puck at the right
// speed (sliding friction 0.2: it slides v^2 / (2 * 0.2 * 9.81) after release); too fast and it
// slides off the end.
#include <algorithm>
#include <cmath>
#include <random>

#include "absl/strings/str_format.h"
#include "client/sim/mujoco_world.h"
#include "client/sim/scenario.h"

namespace foray::sim {
namespace {

constexpr double kBayLower = 0.80, kBayUpper = 0.88, kAtRest = 0.03;  // m, m/s
constexpr double kOpenEnd = 0.95;                                        // m
constexpr int kPhysicsSteps = 25;                                        // of 2 ms per period

class BenchScenario final : public Scenario {
 public:
  BenchScenario(std::unique_ptr<MujocoWorld> world, uint64_t seed)
      : world_(std::move(world)),
        rng_(seed),
        carriage_q_(world_->QposOf("carriage")),
        carriage_v_(world_->QvelOf("carriage")),
        puck_x_(world_->QposOf("puck_x")),
        puck_z_(world_->QposOf("puck_z")),
        puck_v_(world_->QvelOf("puck_x")) {}

  std::string kind() const override { return "bench"; }
  std::vector<Dim> state_dims() const override {
    return {{"carriage_position", "m"}, {"carriage_velocity", "m/s"}, {"puck_position", "m"},
            {"puck_velocity", "m/s"}};
  }
  std::vector<Dim> action_dims() const override { return {{"carriage_velocity_command", "m/s"}}; }
  std::vector<ActionRange> action_ranges() const override { return {{-1.2, 1.2, 0.3}}; }
  // The carriage's travel (the joint's range in bench.xml).
  std::vector<StateRange> state_ranges() const override { return {{0, 0.0, 0.65}}; }
  double control_period_s() const override { return kPhysicsSteps * world_->model()->opt.timestep; }
  int episode_steps() const override { return 160; }
  // 1.5 s: from the start, the carriage needs about 0.9 s to carry the puck to the end of its
  // travel at the 0.8 m/s that parks it (0.13 s to accelerate at 6 m/s^2, then 0.6 m), and the
  // puck slides about 0.4 s more before it rests (0.8 / (0.2 * 9.81)); 15 steps (0.75 s) would
  // not see a strike's outcome from the start of an episode.
  int plan_horizon() const override { return 30; }
  std::vector<int> coverage_indices() const override { return {2, 3}; }
  std::vector<double> coverage_lower() const override { return {0.0, -1.5}; }
  std::vector<double> coverage_upper() const override { return {1.0, 1.5}; }

  Eigen::VectorXd Reset() override {
    world_->Reset();
    std::uniform_real_distribution<double> start(0.10, 0.25);
    // The puck body sits at 0.15 m in the model; its slide joint is the offset from there.
    world_->data()->qpos[puck_x_] = start(rng_) - 0.15;
    if (absl::Status s = world_->Forward(); !s.ok()) AbortSimulation(kind(), s);
    return State();
  }
  Eigen::VectorXd Step(const Eigen::VectorXd& action) override {
    world_->data()->ctrl[0] = std::clamp(action[0], -1.2, 1.2);
    if (absl::Status s = world_->Step(kPhysicsSteps); !s.ok()) AbortSimulation(kind(), s);
    return State();
  }
  Eigen::VectorXd Nominal(const Eigen::VectorXd& s) const override {
    return Eigen::VectorXd::Constant(1, std::clamp(-2.0 * s[0], -1.2, 1.2));  // hold at 0 m
  }
  double Reward(const Eigen::VectorXd& s) const override {
    return s[2] >= kBayLower && s[2] <= kBayUpper && std::abs(s[3]) < kAtRest ? 1.0 : 0.0;
  }
  bool Terminal(const Eigen::VectorXd& s) const override {
    return s[2] > kOpenEnd || world_->data()->qpos[puck_z_] < -0.03;
  }
  std::string ZoneDescription() const override {
    return absl::StrFormat("puck at rest (|v| < %g m/s) in the bay %.2f..%.2f m; lost past %.2f m",
                           kAtRest, kBayLower, kBayUpper, kOpenEnd);
  }

 private:
  Eigen::VectorXd State() const {
    const mjData* d = world_->data();
    Eigen::VectorXd s(4);
    s << d->qpos[carriage_q_], d->qvel[carriage_v_], 0.15 + d->qpos[puck_x_], d->qvel[puck_v_];
    return s;
  }
  const std::unique_ptr<MujocoWorld> world_;
  std::mt19937_64 rng_;
  const int carriage_q_, carriage_v_, puck_x_, puck_z_, puck_v_;
};

}  // namespace

absl::StatusOr<std::unique_ptr<Scenario>> MakeBenchScenario(uint64_t seed) {
  absl::StatusOr<std::unique_ptr<MujocoWorld>> world = LoadModelFile("bench.xml");
  if (!world.ok()) return world.status();
  return std::unique_ptr<Scenario>(new BenchScenario(*std::move(world), seed));
}

}  // namespace foray::sim
