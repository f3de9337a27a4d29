// The MuJoCo world of the simulated robots against textbook mechanics, and its error handling.
// MuJoCo's contacts are soft (a spring-damper constraint whose normal force settles within a
// few milliseconds, solref 0.02 s by default), so the checks allow a few percent where contact
// forces decide the motion; momentum exchange between two bodies is exact up to rounding.
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <functional>
#include <random>
#include <string>
#include <vector>

#include "client/sim/mujoco_world.h"
#include "client/sim/scenario.h"
#include "gtest/gtest.h"

namespace foray::sim {
namespace {

constexpr double kG = 9.81;

std::unique_ptr<MujocoWorld> Must(absl::StatusOr<std::unique_ptr<MujocoWorld>> world) {
  EXPECT_TRUE(world.ok()) << world.status();
  return world.ok() ? *std::move(world) : nullptr;
}

// A block sliding on a level plane with Coulomb friction mu decelerates at mu g and stops after
// v0^2 / (2 mu g) (textbook kinematics of kinetic friction). Elliptic friction cone: the
// friction force is mu N in any sliding direction.
TEST(MujocoPhysicsTest, SlidingBlockDeceleratesAtMuGAndStopsWhereKinematicsSays) {
  const double mu = 0.3, v0 = 1.0;
  auto world = Must(MujocoWorld::FromText(R"(
    <mujoco><option timestep="0.001" cone="elliptic"/>
      <worldbody>
        <geom type="plane" size="5 5 0.1" friction="0.3 0 0"/>
        <body pos="0 0 0.05"><freejoint/><geom type="box" size="0.05 0.05 0.05" mass="1" friction="0.3 0 0"/></body>
      </worldbody></mujoco>)", "sliding.xml"));
  ASSERT_NE(world, nullptr);
  ASSERT_TRUE(world->Step(200).ok());  // settle on the plane (0.2 s)
  mjData* d = world->data();
  d->qvel[0] = v0;
  const double x0 = d->qpos[0];
  ASSERT_TRUE(world->Step(100).ok());  // 0.1 s of sliding
  const double decel = (v0 - d->qvel[0]) / 0.1;
  EXPECT_NEAR(decel / (mu * kG), 1.0, 0.03) << "deceleration " << decel << " m/s^2";
  while (d->qvel[0] > 1e-4 && d->time < 5.0) ASSERT_TRUE(world->Step(1).ok());
  const double distance = d->qpos[0] - x0;
  const double expected = v0 * v0 / (2 * mu * kG);
  EXPECT_NEAR(distance / expected, 1.0, 0.03) << "stopped after " << distance << " m, expected " << expected;
  std::printf("sliding block: deceleration %.4f m/s^2 (mu g = %.4f), stop distance %.4f m (%.4f)\n",
              decel, mu * kG, distance, expected);
}

// Rolling without slipping down an incline of angle theta: a solid cylinder accelerates at
// (2/3) g sin(theta), a solid sphere at (5/7) g sin(theta) (I = m r^2 / 2 and 2 m r^2 / 5). The
// incline is a level plane under gravity tilted by theta; friction 1 keeps them from slipping.
double RollingAcceleration(const std::string& geom) {
  const double theta = 0.2;
  char mjcf[1024];
  std::snprintf(mjcf, sizeof(mjcf), R"(
    <mujoco><option timestep="0.0005" gravity="%.17g 0 %.17g"/>
      <worldbody>
        <geom type="plane" size="50 5 0.1" friction="1 0 0"/>
        <body pos="0 0 0.1"><freejoint/>%s</body>
      </worldbody></mujoco>)",
                kG * std::sin(theta), -kG * std::cos(theta), geom.c_str());
  auto world = Must(MujocoWorld::FromText(mjcf, "incline.xml"));
  if (world == nullptr) return NAN;
  mjData* d = world->data();
  // Start at rest on the surface: a short settle with the body held, then measure 0.5 s.
  for (int i = 0; i < 400; ++i) {
    EXPECT_TRUE(world->Step(1).ok());
    for (int k = 0; k < 6; ++k) d->qvel[k] = 0.0;
  }
  const double x0 = d->qpos[0];
  EXPECT_TRUE(world->Step(1000).ok());
  return 2.0 * (d->qpos[0] - x0) / (0.5 * 0.5) / (kG * std::sin(theta));  // a / (g sin theta)
}

TEST(MujocoPhysicsTest, SolidCylinderRollsDownAnInclineAtTwoThirdsGSinTheta) {
  const double ratio = RollingAcceleration(
      R"(<geom type="cylinder" size="0.1 0.05" euler="90 0 0" mass="1" friction="1 0 0"/>)");  // axis along y
  EXPECT_NEAR(ratio, 2.0 / 3.0, 0.02 * 2.0 / 3.0);
  std::printf("cylinder: a / (g sin theta) = %.4f (2/3 = %.4f)\n", ratio, 2.0 / 3.0);
}

TEST(MujocoPhysicsTest, SolidSphereRollsDownAnInclineAtFiveSeventhsGSinTheta) {
  const double ratio = RollingAcceleration(R"(<geom type="sphere" size="0.1" mass="1" friction="1 0 0"/>)");
  EXPECT_NEAR(ratio, 5.0 / 7.0, 0.02 * 5.0 / 7.0);
  std::printf("sphere: a / (g sin theta) = %.4f (5/7 = %.4f)\n", ratio, 5.0 / 7.0);
}

// Two bodies colliding along a line with no gravity and no friction: the contact forces are
// equal and opposite, so the total momentum is conserved (Newton's third law), whatever energy
// the soft contact absorbs.
TEST(MujocoPhysicsTest, ImpactConservesMomentum) {
  auto world = Must(MujocoWorld::FromText(R"(
    <mujoco><option timestep="0.001" gravity="0 0 0"/>
      <worldbody>
        <body pos="0 0 0"><joint name="a" type="slide" axis="1 0 0"/><geom type="box" size="0.05 0.05 0.05" mass="2"/></body>
        <body pos="0.3 0 0"><joint name="b" type="slide" axis="1 0 0"/><geom type="box" size="0.05 0.05 0.05" mass="0.5"/></body>
      </worldbody></mujoco>)", "impact.xml"));
  ASSERT_NE(world, nullptr);
  mjData* d = world->data();
  const int a = world->QvelOf("a"), b = world->QvelOf("b");
  d->qvel[a] = 1.5;
  const double before = 2.0 * 1.5;
  ASSERT_TRUE(world->Step(500).ok());
  ASSERT_GT(d->qvel[b], 1.0) << "the light body was struck";
  EXPECT_NEAR(2.0 * d->qvel[a] + 0.5 * d->qvel[b], before, 1e-9 * before);
}

// The states of a fresh `kind` robot (seed `seed`), from its Reset, under actions(t), t < steps.
std::vector<double> Trace(const std::string& kind, uint64_t seed, int steps,
                          const std::function<Eigen::VectorXd(int)>& actions) {
  auto scenario = MakeScenario(kind, seed);
  EXPECT_TRUE(scenario.ok()) << scenario.status();
  if (!scenario.ok()) return {};
  std::vector<double> trace;
  (*scenario)->Reset();
  for (int t = 0; t < steps; ++t) {
    const Eigen::VectorXd s = (*scenario)->Step(actions(t));
    trace.insert(trace.end(), s.data(), s.data() + s.size());
  }
  return trace;
}

// Bit for bit the same: memcmp, so that -0.0 and 0.0 or two NaNs would differ too.
void ExpectSameBits(const std::vector<double>& first, const std::vector<double>& second) {
  ASSERT_EQ(first.size(), second.size());
  EXPECT_EQ(0, std::memcmp(first.data(), second.data(), first.size() * sizeof(double)));
}

// The same seed and actions give the same trajectory bit for bit.
TEST(MujocoSceneTest, BenchIsDeterministicForASeed) {
  auto actions = [](int t) { return Eigen::VectorXd::Constant(1, 0.9 * std::sin(0.2 * t) + 0.3); };
  ExpectSameBits(Trace("bench", 7, 80, actions), Trace("bench", 7, 80, actions));
}

// Striking the puck hard from close by sends it off the open end (lost, terminal); holding the
// carriage still leaves it where it was, earning nothing.
TEST(MujocoSceneTest, BenchPuckIsLostOffTheOpenEndAndRestsWhenLeftAlone) {
  auto scenario = MakeScenario("bench", 3);
  ASSERT_TRUE(scenario.ok()) << scenario.status();
  Scenario& bench = **scenario;
  Eigen::VectorXd s = bench.Reset();
  const double start = s[2];
  for (int t = 0; t < 20; ++t) s = bench.Step(Eigen::VectorXd::Zero(1));
  EXPECT_NEAR(s[2], start, 1e-3);
  EXPECT_FALSE(bench.Terminal(s));
  EXPECT_EQ(bench.Reward(s), 0.0);
  bool lost = false;
  for (int t = 0; t < 120 && !lost; ++t) {
    s = bench.Step(Eigen::VectorXd::Constant(1, 1.2));
    lost = bench.Terminal(s);
  }
  EXPECT_TRUE(lost) << "puck at " << s[2] << " m";
}

// The table robot: the same seed and actions give the same trajectory bit for bit.
TEST(MujocoSceneTest, TableIsDeterministicForASeed) {
  auto actions = [](int t) -> Eigen::VectorXd {
    return Eigen::Vector2d(0.3 * std::sin(0.1 * t) + 0.1, 0.2 * std::cos(0.13 * t));
  };
  ExpectSameBits(Trace("table", 11, 120, actions), Trace("table", 11, 120, actions));
}

// Left alone the puck stays where it started (no reward); driven straight along +x the rod
// pushes it ahead of itself and off the open edge at 0.25 m (lost, terminal) before the stage's
// travel ends at 0.28 m.
TEST(MujocoSceneTest, TablePuckRestsWhenLeftAloneAndIsLostOffAnEdge) {
  auto scenario = MakeScenario("table", 5);
  ASSERT_TRUE(scenario.ok()) << scenario.status();
  Scenario& table = **scenario;
  Eigen::VectorXd s = table.Reset();
  const Eigen::Vector2d start = s.segment<2>(4);
  for (int t = 0; t < 20; ++t) s = table.Step(Eigen::Vector2d::Zero());
  EXPECT_LT((s.segment<2>(4) - start).norm(), 1e-3);
  EXPECT_FALSE(table.Terminal(s));
  EXPECT_EQ(table.Reward(s), 0.0);
  // Line the rod up behind the puck's centre first, then drive through it, keeping the rod on
  // the puck's line (a round rod pushes a round puck sideways off it otherwise).
  bool lost = false;
  Eigen::Vector2d command = Eigen::Vector2d::Zero();
  for (int t = 0; t < 160 && !lost; ++t) {
    const double dy = std::clamp(4.0 * (s[5] - s[1]), -0.4, 0.4);
    const Eigen::Vector2d want(t < 30 ? 0.0 : 0.3, dy);
    command += (want - command).cwiseMax(-0.1).cwiseMin(0.1);  // the robot's rate limit
    s = table.Step(command);
    lost = table.Terminal(s);
  }
  EXPECT_TRUE(lost) << "puck at " << s[4] << ", " << s[5] << " m";
}

// A hand-written pusher (not the planner) that steers the puck to the hidden goal: the goal can
// be reached and held within one episode under the robot's speed and acceleration limits.
// Behind the puck on the line from the goal through it, then push along that line, slowing as
// the puck nears the goal; back off once it is there.
Eigen::Vector2d ScriptedPush(const Eigen::VectorXd& s, const Eigen::Vector2d& goal) {
  const Eigen::Vector2d rod = s.segment<2>(0), puck = s.segment<2>(4);
  const Eigen::Vector2d to_goal = goal - puck;
  const double remaining = to_goal.norm();
  const Eigen::Vector2d d = to_goal / std::max(remaining, 1e-9);
  const Eigen::Vector2d behind = puck - d * 0.045;  // the rod touching the puck from behind
  Eigen::Vector2d v;
  if (remaining < 0.015) {
    v = -d * 0.1;  // leave it there
  } else if ((rod - behind).norm() > 0.015 || (rod - puck).dot(d) > -0.03) {
    // Approach a point further behind first, so that the rod does not strike the puck sideways.
    const Eigen::Vector2d staging = puck - d * 0.08;
    const Eigen::Vector2d target =
        (rod - staging).norm() > 0.02 && (rod - puck).dot(d) > -0.06 ? staging : behind;
    v = 3.0 * (target - rod);
  } else {
    const Eigen::Vector2d lateral = (behind - rod) - d * d.dot(behind - rod);
    v = d * std::min(0.25, 1.5 * remaining) + 3.0 * lateral;
  }
  return v.cwiseMax(-0.4).cwiseMin(0.4);
}

Eigen::Vector2d RateLimited(const Eigen::Vector2d& want, const Eigen::Vector2d& previous,
                            double step) {
  return previous + (want - previous).cwiseMax(-step).cwiseMin(step);
}

TEST(MujocoSceneTest, TableGoalIsReachableByAScriptedPusher) {
  int reached = 0;
  for (uint64_t seed = 1; seed <= 5; ++seed) {
    auto scenario = MakeScenario("table", seed);
    ASSERT_TRUE(scenario.ok()) << scenario.status();
    Scenario& table = **scenario;
    Eigen::VectorXd s = table.Reset();
    Eigen::Vector2d previous = Eigen::Vector2d::Zero();
    double ret = 0.0;
    bool lost = false;
    for (int t = 0; t < table.episode_steps() && !lost; ++t) {
      previous = RateLimited(ScriptedPush(s, {0.15, 0.15}), previous, 0.1);
      s = table.Step(previous);
      ret += table.Reward(s);
      lost = table.Terminal(s);
    }
    std::printf("seed %d: return %g, puck at (%.3f, %.3f) m%s\n", static_cast<int>(seed), ret, s[4],
                s[5], lost ? ", lost" : "");
    reached += ret > 0 && !lost ? 1 : 0;
  }
  EXPECT_EQ(reached, 5);
}

// The design check of the table robot (client/sim/table_scenario.cc), kept: random pushing (the
// benchmark's "random" baseline, an Ornstein-Uhlenbeck velocity command over the whole range)
// reaches the hidden goal in at most 3 of 10 seeds of 24 episodes, and at least a quarter of
// its episodes that move the puck more than 5 cm lose it. A scenario where random pushing
// succeeds, or where careless pushing costs nothing, cannot show what exploration is for.
TEST(MujocoSceneTest, TableRandomPushingRarelyReachesTheGoalAndOftenLosesThePuck) {
  int seeds_found = 0, episodes = 0, moved = 0, lost = 0;
  for (uint64_t seed = 1; seed <= 10; ++seed) {
    auto scenario = MakeScenario("table", seed * 1000 + 1);
    ASSERT_TRUE(scenario.ok()) << scenario.status();
    Scenario& table = **scenario;
    std::mt19937_64 rng(seed * 7919 + 1);
    bool found = false;
    for (int e = 0; e < 24; ++e, ++episodes) {
      Eigen::VectorXd s = table.Reset();
      const Eigen::Vector2d start = s.segment<2>(4);
      std::vector<double> previous(2, 0.0);
      double farthest = 0.0;
      bool this_lost = false;
      for (int t = 0; t < table.episode_steps() && !this_lost; ++t) {
        previous = BaselineAction(table, s, previous, Baseline::kRandom, 0.3, rng);
        s = table.Step(Eigen::Map<const Eigen::VectorXd>(previous.data(), 2));
        farthest = std::max(farthest, (s.segment<2>(4) - start).norm());
        found = found || table.Reward(s) > 0;
        this_lost = table.Terminal(s);
      }
      moved += farthest > 0.05 ? 1 : 0;
      lost += this_lost ? 1 : 0;
    }
    seeds_found += found ? 1 : 0;
  }
  std::printf("random pushing: goal reached in %d of 10 seeds; of %d episodes %d moved the puck "
              "more than 5 cm, %d lost it\n",
              seeds_found, episodes, moved, lost);
  EXPECT_LE(seeds_found, 3);
  EXPECT_GE(lost * 4, moved);
}

TEST(MujocoErrorTest, MissingAndMalformedModelsAreNamed) {
  auto missing = MujocoWorld::Load("/nonexistent/bench.xml");
  EXPECT_EQ(missing.status().code(), absl::StatusCode::kNotFound);
  EXPECT_NE(missing.status().message().find("/nonexistent/bench.xml"), std::string::npos);
  auto malformed = MujocoWorld::FromText("<mujoco>\n<worldbody>\n<body><geom type=\"box\"/></body>\n"
                                         "<bogus/>\n</worldbody></mujoco>", "broken.xml");
  EXPECT_EQ(malformed.status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(malformed.status().message().find("broken.xml"), std::string::npos) << malformed.status();
  EXPECT_NE(malformed.status().message().find("line"), std::string::npos) << malformed.status();
}

// MuJoCo answers diverging accelerations by resetting the state and a warning; the world says
// so instead of going on from a silently reset state.
TEST(MujocoErrorTest, DivergenceIsReported) {
  auto world = Must(MujocoWorld::FromText(R"(
    <mujoco><worldbody><body><joint name="j" type="hinge"/><geom type="capsule" size="0.02 0.2" mass="1"/></body>
    </worldbody></mujoco>)", "diverging.xml"));
  ASSERT_NE(world, nullptr);
  world->data()->qvel[0] = 1e300;
  world->data()->qfrc_applied[0] = 1e308;
  const absl::Status s = world->Step(5);
  EXPECT_EQ(s.code(), absl::StatusCode::kFailedPrecondition) << s;
  EXPECT_NE(s.message().find("diverged"), std::string::npos) << s;
  world->Reset();
  EXPECT_TRUE(world->Step(5).ok());
}

// An error inside MuJoCo (here an integrator the engine does not know, set behind the
// compiler's back) ends the step with a Status; the process goes on.
TEST(MujocoErrorTest, EngineErrorBecomesAStatus) {
  auto world = Must(MujocoWorld::FromText(R"(
    <mujoco><worldbody>
      <geom type="plane" size="1 1 0.1"/>
      <body pos="0 0 0.1"><freejoint/><geom type="box" size="0.05 0.05 0.05"/></body>
    </worldbody></mujoco>)", "broken-option.xml"));
  ASSERT_NE(world, nullptr);
  const_cast<mjModel*>(world->model())->opt.integrator = 99;
  const absl::Status s = world->Step(10);
  EXPECT_EQ(s.code(), absl::StatusCode::kInternal) << s;
  EXPECT_NE(s.message().find("MuJoCo error"), std::string::npos) << s;
}

}  // namespace
}  // namespace foray::sim
