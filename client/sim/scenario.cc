#include "client/sim/scenario.h"

#include <algorithm>
#include <cmath>

#include "absl/strings/str_format.h"
#include "client/sim/physics.h"

namespace foray::sim {
namespace {

Eigen::VectorXd Hold(const Dynamics& f, Eigen::VectorXd s, const Eigen::VectorXd& u, double period) {
  const int steps = static_cast<int>(std::lround(period / kSimulationStep));
  for (int i = 0; i < steps; ++i) s = Rk4(f, s, u, kSimulationStep);
  return s;
}

Eigen::VectorXd Clip(const Eigen::VectorXd& a, const std::vector<ActionRange>& ranges) {
  Eigen::VectorXd out = a;
  for (int j = 0; j < out.size(); ++j) out[j] = std::clamp(out[j], ranges[j].min, ranges[j].max);
  return out;
}

// Gantry: the cart runs on a 4 m rail (end stops at +-2 m stop it dead); the drop zone is a
// stretch of floor where the payload counts as delivered when it passes over it slowly.
class GantryScenario final : public Scenario {
 public:
  explicit GantryScenario(uint64_t seed) : rng_(seed), f_(GantryDynamics(params_)) {}
  std::string kind() const override { return "gantry"; }
  std::vector<Dim> state_dims() const override {
    return {{"cart_position", "m"}, {"cart_velocity", "m/s"}, {"swing_angle", "rad"},
            {"swing_rate", "rad/s"}};
  }
  std::vector<Dim> action_dims() const override { return {{"cart_force", "N"}}; }
  std::vector<ActionRange> action_ranges() const override { return {{-10.0, 10.0, 4.0}}; }
  // The rail's end stops, which stop the cart dead (Step).
  std::vector<StateRange> state_ranges() const override { return {{0, -kRailEnd, kRailEnd}}; }
  double control_period_s() const override { return 0.05; }
  int episode_steps() const override { return 100; }
  std::vector<int> coverage_indices() const override { return {0, 2}; }
  std::vector<double> coverage_lower() const override { return {-2.0, -1.0}; }
  std::vector<double> coverage_upper() const override { return {2.0, 1.0}; }

  Eigen::VectorXd Reset() override {
    std::uniform_real_distribution<double> jitter(-0.05, 0.05);
    s_ = Eigen::VectorXd::Zero(4);
    s_[0] = jitter(rng_);
    s_[2] = jitter(rng_);
    return s_;
  }
  Eigen::VectorXd Step(const Eigen::VectorXd& action) override {
    s_ = Hold(f_, s_, Clip(action, action_ranges()), control_period_s());
    if (std::abs(s_[0]) > kRailEnd) {
      s_[0] = std::copysign(kRailEnd, s_[0]);
      s_[1] = 0.0;
    }
    return s_;
  }
  Eigen::VectorXd Nominal(const Eigen::VectorXd& s) const override {
    return Eigen::VectorXd::Constant(1, -4.0 * s[0] - 4.0 * s[1]);
  }
  double Reward(const Eigen::VectorXd& s) const override {
    const double payload = s[0] + params_.cable_length * std::sin(s[2]);
    return payload >= kZoneLow && payload <= kZoneHigh && std::abs(s[1]) < 0.5 ? 1.0 : 0.0;
  }
  std::string ZoneDescription() const override {
    return absl::StrFormat("payload over [%.1f, %.1f] m moving slower than 0.5 m/s", kZoneLow,
                           kZoneHigh);
  }

 private:
  static constexpr double kRailEnd = 2.0, kZoneLow = 1.2, kZoneHigh = 1.5;
  GantryParams params_;
  std::mt19937_64 rng_;
  Dynamics f_;
  Eigen::VectorXd s_ = Eigen::VectorXd::Zero(4);
};

// Arm: a two-link arm in a horizontal plane (gravity acts along the joint axes, so it plays no
// part); the target is a disc in the workspace the arm is not told about.
class ArmScenario final : public Scenario {
 public:
  explicit ArmScenario(uint64_t seed) : rng_(seed) {
    params_.gravity = 0.0;
    f_ = ArmDynamics(params_);
  }
  std::string kind() const override { return "arm"; }
  std::vector<Dim> state_dims() const override {
    return {{"shoulder_angle", "rad"}, {"elbow_angle", "rad"}, {"shoulder_rate", "rad/s"},
            {"elbow_rate", "rad/s"}};
  }
  std::vector<Dim> action_dims() const override {
    return {{"shoulder_torque", "N m"}, {"elbow_torque", "N m"}};
  }
  std::vector<ActionRange> action_ranges() const override {
    return {{-2.0, 2.0, 1.0}, {-2.0, 2.0, 1.0}};
  }
  double control_period_s() const override { return 0.05; }
  int episode_steps() const override { return 100; }
  // No state ranges: the joint limits are springs (ArmParams) that a fast swing overruns.
  std::vector<int> coverage_indices() const override { return {0, 1}; }
  std::vector<double> coverage_lower() const override { return {params_.q1_min, params_.q2_min}; }
  std::vector<double> coverage_upper() const override { return {params_.q1_max, params_.q2_max}; }

  Eigen::VectorXd Reset() override {
    std::uniform_real_distribution<double> jitter(-0.05, 0.05);
    s_ = Eigen::VectorXd::Zero(4);
    s_[0] = -0.8 + jitter(rng_);
    s_[1] = 0.5 + jitter(rng_);
    return s_;
  }
  Eigen::VectorXd Step(const Eigen::VectorXd& action) override {
    s_ = Hold(f_, s_, Clip(action, action_ranges()), control_period_s());
    return s_;
  }
  Eigen::VectorXd Nominal(const Eigen::VectorXd& s) const override {
    return Eigen::Vector2d(-2.0 * (s[0] + 0.8) - 0.5 * s[2], -2.0 * (s[1] - 0.5) - 0.5 * s[3]);
  }
  double Reward(const Eigen::VectorXd& s) const override {
    return (ArmTip(params_, s) - kTarget).norm() <= kRadius ? 1.0 : 0.0;
  }
  std::string ZoneDescription() const override {
    return absl::StrFormat("tip within %.2f m of (%.2f, %.2f) m", kRadius, kTarget.x(), kTarget.y());
  }

 private:
  static constexpr double kRadius = 0.1;
  inline static const Eigen::Vector2d kTarget{0.15, 0.7};
  ArmParams params_;
  std::mt19937_64 rng_;
  Dynamics f_;
  Eigen::VectorXd s_ = Eigen::VectorXd::Zero(4);
};

}  // namespace

std::vector<double> BaselineAction(const Scenario& sim, const Eigen::VectorXd& state,
                                   const std::vector<double>& previous, Baseline kind,
                                   double noise_fraction, std::mt19937_64& rng) {
  static const double kCorrelation = std::exp(-1.0 / 10.0);
  std::normal_distribution<double> normal(0.0, 1.0);
  const std::vector<ActionRange> ranges = sim.action_ranges();
  const Eigen::VectorXd nominal = sim.Nominal(state);
  std::vector<double> action(ranges.size());
  for (size_t j = 0; j < ranges.size(); ++j) {
    const ActionRange& r = ranges[j];
    const double half = 0.5 * (r.max - r.min), centre = 0.5 * (r.max + r.min);
    if (kind == Baseline::kRandom) {
      action[j] = centre + kCorrelation * (previous[j] - centre) +
                  std::sqrt(1.0 - kCorrelation * kCorrelation) * 0.5 * half * normal(rng);
    } else {
      action[j] = nominal[j] + noise_fraction * half * normal(rng);
    }
    if (r.max_step > 0) {
      action[j] = std::clamp(action[j], previous[j] - r.max_step, previous[j] + r.max_step);
    }
    action[j] = std::clamp(action[j], r.min, r.max);
  }
  return action;
}

absl::StatusOr<std::unique_ptr<Scenario>> MakeScenario(const std::string& kind, uint64_t seed) {
  if (kind == "gantry") return std::unique_ptr<Scenario>(new GantryScenario(seed));
  if (kind == "arm") return std::unique_ptr<Scenario>(new ArmScenario(seed));
  if (kind == "bench") return MakeBenchScenario(seed);
  if (kind == "table") return MakeTableScenario(seed);
  return absl::InvalidArgumentError(
      absl::StrFormat("unknown robot \"%s\"; the simulated robots are \"gantry\", \"arm\", "
                      "\"bench\" and \"table\"",
                      kind));
}

}  // namespace foray::sim
