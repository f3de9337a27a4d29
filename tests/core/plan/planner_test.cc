// The planner end to end: optimal control of a known linear system against the LQR optimum
// (numpy/scipy reference, lqr_reference.py), exploration toward where the ensemble disagrees,
// limits that hold over many random configurations, deadlines, and errors.
#include "core/plan/planner.h"

#include <cmath>
#include <memory>
#include <thread>
#include <vector>

#include "core/model/ensemble.h"
#include "core/model/trainer.h"
#include "core/util/random.h"
#include "gtest/gtest.h"
#include "tests/core/plan/test_models.h"
#include "tests/testing/reference.h"

namespace foray::plan {
namespace {

using testing::OffsetMembersModel;

TEST(PlannerTest, LinearQuadraticPlanIsWithinFivePercentOfTheLqrOptimum) {
  // Reference: the optimal finite-horizon cost of the double integrator from the backward
  // Riccati recursion (lqr_reference.py, checked there against scipy's solve_discrete_are).
  const auto dir = foray::testing::FreshDir("lqr");
  std::string output;
  ASSERT_EQ(foray::testing::RunPython("tests/core/plan/lqr_reference.py", "--out " + dir.string(),
                                      &output),
            0)
      << output;
  const auto arrays = foray::testing::LoadArrays(dir);
  const Eigen::MatrixXd& problem = arrays.at("problem");
  const double dt = problem(0, 0), r = problem(0, 4);
  const int horizon = static_cast<int>(problem(0, 3));
  const Eigen::MatrixXd& q = arrays.at("q");
  const double optimal = arrays.at("cost")(0, 0);
  ASSERT_LT(arrays.at("actions").cwiseAbs().maxCoeff(), 20.0);  // the bounds below never bind

  Eigen::MatrixXf a(2, 2), b(2, 1);
  a << 1, dt, 0, 1;
  b << 0.5 * dt * dt, dt;
  const LinearRolloutModel model(a, b, Eigen::VectorXf::Zero(2));
  explore::ObjectiveOptions objective;
  objective.reward_weight = 1.0;
  objective.information_weight = 0.0;
  objective.known_reward.kind = explore::KnownReward::Kind::kQuadratic;
  objective.known_reward.target = {0.0, 0.0};
  objective.known_reward.state_weight = {q(0, 0), q(0, 1)};
  objective.known_reward.action_weight = {r};
  PlannerOptions options;
  options.set_horizon(horizon);
  options.rollout.particles = 1;
  options.cem.population = 500;
  options.cem.elites = 50;
  options.cem.iterations = 60;
  options.cem.seed = 4;
  const SequenceLimits limits = SequenceLimits::Box(Eigen::VectorXf::Constant(1, -20),
                                                    Eigen::VectorXf::Constant(1, 20));
  const Eigen::Vector2f x0(problem(0, 1), problem(0, 2));
  absl::StatusOr<PlanResult> plan =
      Plan(model, {.state = x0, .limits = limits, .objective = objective, .options = options});
  ASSERT_TRUE(plan.ok()) << plan.status();

  // Charge the returned plan exactly, in double precision.
  double x = x0[0], v = x0[1], cost = 0.0;
  for (int t = 0; t < horizon; ++t) {
    const double u = plan->actions(t, 0);
    x += dt * v + 0.5 * dt * dt * u;
    v += dt * u;
    cost += q(0, 0) * x * x + q(0, 1) * v * v + r * u * u;
  }
  EXPECT_GE(cost, optimal * (1 - 1e-6));  // nothing beats the optimum
  EXPECT_LE(cost, optimal * 1.05) << "optimal " << optimal;
  EXPECT_NEAR(plan->expected_return, -cost, 1e-3 * cost);
}

// One state, one action, delta = action; the five members agree below x = 2 and disagree
// (offsets -0.3 .. 0.3 per step) above it. From x = 0 with |a| <= 0.5 and 10 steps the
// planner can reach x = 5.
OffsetMembersModel DisagreeAboveTwo() {
  return OffsetMembersModel(1, 1, {-0.3f, -0.15f, 0.0f, 0.15f, 0.3f}, 0.01f, 0.0f, 2.0f);
}

PlannerOptions SmallPlanner() {
  PlannerOptions options;
  options.set_horizon(10);
  options.cem.population = 200;
  options.cem.elites = 20;
  options.cem.iterations = 5;
  options.cem.seed = 12;
  return options;
}

SequenceLimits UnitHalfBox() {
  return SequenceLimits::Box(Eigen::VectorXf::Constant(1, -0.5f), Eigen::VectorXf::Constant(1, 0.5f));
}

TEST(PlannerTest, PureExplorationSteersWhereTheMembersDisagree) {
  const OffsetMembersModel model = DisagreeAboveTwo();
  explore::ObjectiveOptions objective;
  objective.reward_weight = 0.0;
  objective.information_weight = 1.0;
  absl::StatusOr<PlanResult> plan = Plan(model, {.state = Eigen::VectorXf::Zero(1),
                                                 .limits = UnitHalfBox(),
                                                 .objective = objective,
                                                 .options = SmallPlanner()});
  ASSERT_TRUE(plan.ok()) << plan.status();
  EXPECT_GT(plan->state_mean(9, 0), 2.5);
  EXPECT_GT(plan->total_information_gain, 0.5);
  EXPECT_GT(plan->actions.topRows(4).mean(), 0.4);  // heads there at once
}

TEST(PlannerTest, RewardOnlyPlanIgnoresTheDisagreement) {
  // Same model, reward only (quadratic reward around x = 0): the plan stays near the origin and
  // never enters the region, so its information gain is zero.
  const OffsetMembersModel model = DisagreeAboveTwo();
  explore::ObjectiveOptions objective;
  objective.reward_weight = 1.0;
  objective.information_weight = 0.0;
  objective.known_reward.kind = explore::KnownReward::Kind::kQuadratic;
  objective.known_reward.target = {0.0};
  absl::StatusOr<PlanResult> plan = Plan(model, {.state = Eigen::VectorXf::Zero(1),
                                                 .limits = UnitHalfBox(),
                                                 .objective = objective,
                                                 .options = SmallPlanner()});
  ASSERT_TRUE(plan.ok()) << plan.status();
  EXPECT_LT(plan->state_mean.col(0).cwiseAbs().maxCoeff(), 0.5);
  EXPECT_NEAR(plan->total_information_gain, 0.0, 1e-6);
}

TEST(PlannerTest, TrainedEnsembleExploresBeyondItsData) {
  // A learned ensemble of x' = x + a, trained on x in [-2, 0] only: its members agree there and
  // disagree beyond, on either side. A pure-exploration plan from x = -1 leaves the data range
  // (by 0.5 or more); its predicted information gain per step grows as it does.
  Rng rng(3);
  const int n = 1500;
  model::TransitionData data;
  data.states.resize(n, 1);
  data.actions.resize(n, 1);
  data.next_states.resize(n, 1);
  data.rewards = Eigen::VectorXf::Zero(n);
  for (int i = 0; i < n; ++i) {
    data.states(i, 0) = static_cast<float>(-2.0 + 2.0 * rng.Uniform());
    data.actions(i, 0) = static_cast<float>(0.4 * rng.Uniform() - 0.2);
    data.next_states(i, 0) = data.states(i, 0) + data.actions(i, 0) +
                             static_cast<float>(0.01 * rng.Normal());
  }
  model::EnsembleOptions eo;
  eo.hidden_widths = {32, 32};
  auto start = model::Ensemble::Create(1, 1, eo, 5);
  ASSERT_TRUE(start.ok());
  model::TrainingOptions to;
  to.max_epochs = 60;
  to.learning_rate = 3e-3;
  to.seed = 2;
  auto trained = model::TrainEnsemble(*start, data, to);
  ASSERT_TRUE(trained.ok()) << trained.status();
  const EnsembleRolloutModel model(trained->first);

  explore::ObjectiveOptions objective;
  objective.reward_weight = 0.0;
  objective.information_weight = 1.0;
  PlannerOptions options = SmallPlanner();
  options.set_horizon(15);
  const SequenceLimits limits = SequenceLimits::Box(Eigen::VectorXf::Constant(1, -0.2f),
                                                    Eigen::VectorXf::Constant(1, 0.2f));
  absl::StatusOr<PlanResult> plan = Plan(model, {.state = Eigen::VectorXf::Constant(1, -1.0f),
                                                 .limits = limits,
                                                 .objective = objective,
                                                 .options = options});
  ASSERT_TRUE(plan.ok()) << plan.status();
  const float end = plan->state_mean(14, 0);
  EXPECT_TRUE(end > 0.5f || end < -2.5f) << "ends at " << end;
  EXPECT_GT(plan->information_gain[14], 2.0 * plan->information_gain[0]);
}

TEST(PlannerTest, ActionsStayInsideBoundsAndRateLimitsOverRandomConfigurations) {
  // Property test: 150 random robots (dimensions, linear dynamics, bounds, rate limits, objective),
  // each planning 4 consecutive steps with the warm start and the executed action carried over.
  Rng rng(2024);
  for (int trial = 0; trial < 150; ++trial) {
    const int sd = 1 + static_cast<int>(rng.UniformInt(4));
    const int ad = 1 + static_cast<int>(rng.UniformInt(3));
    Eigen::MatrixXf a = Eigen::MatrixXf::Identity(sd, sd), b(sd, ad);
    for (int i = 0; i < sd; ++i) {
      for (int j = 0; j < sd; ++j) a(i, j) += static_cast<float>(0.2 * rng.Normal());
      for (int j = 0; j < ad; ++j) b(i, j) = static_cast<float>(rng.Normal());
    }
    const LinearRolloutModel model(a, b, Eigen::VectorXf::Zero(sd));
    SequenceLimits limits;
    limits.lower.resize(ad);
    limits.upper.resize(ad);
    limits.max_step.resize(ad);
    limits.previous.resize(ad);
    for (int j = 0; j < ad; ++j) {
      limits.lower[j] = static_cast<float>(-5.0 * rng.Uniform());
      limits.upper[j] = limits.lower[j] + static_cast<float>(0.01 + 5.0 * rng.Uniform());
      limits.max_step[j] = rng.Uniform() < 0.3 ? 0.0f : static_cast<float>(0.5 * rng.Uniform());
      limits.previous[j] = limits.lower[j] + static_cast<float>(rng.Uniform()) *
                                                 (limits.upper[j] - limits.lower[j]);
    }
    explore::ObjectiveOptions objective;
    objective.known_reward.kind = explore::KnownReward::Kind::kQuadratic;
    objective.known_reward.target.assign(sd, 10.0 * rng.Normal());
    PlannerOptions options;
    options.set_horizon(1 + static_cast<int>(rng.UniformInt(12)));
    options.cem.population = 30;
    options.cem.elites = 5;
    options.cem.iterations = 1 + static_cast<int>(rng.UniformInt(3));
    options.rollout.particles = 2;
    options.cem.noise_beta = 3.0 * rng.Uniform();
    options.cem.seed = trial;
    Eigen::VectorXf state = Eigen::VectorXf::Random(sd);
    CemWarmStart warm;
    for (int step = 0; step < 4; ++step) {
      absl::StatusOr<PlanResult> plan = Plan(model, {.state = state,
                                                     .limits = limits,
                                                     .objective = objective,
                                                     .options = options,
                                                     .warm_start = step == 0 ? nullptr : &warm});
      ASSERT_TRUE(plan.ok()) << plan.status();
      for (int t = 0; t < options.horizon(); ++t) {
        for (int j = 0; j < ad; ++j) {
          const float u = plan->actions(t, j);
          const float before = t == 0 ? limits.previous[j] : plan->actions(t - 1, j);
          ASSERT_GE(u, limits.lower[j]) << "trial " << trial << " t " << t;
          ASSERT_LE(u, limits.upper[j]) << "trial " << trial << " t " << t;
          if (limits.max_step[j] > 0) {
            // Exact arithmetic: a client comparing in double must see the limit hold.
            ASSERT_LE(std::abs(static_cast<double>(u) - before), limits.max_step[j])
                << "trial " << trial << " step " << step << " t " << t;
          }
        }
      }
      limits.previous = plan->actions.row(0).transpose();
      state = a * state + b * limits.previous;
      warm = plan->warm_start;
    }
  }
}

// Advances a fake clock by 1 ms on every batched model call (once per rollout step).
class SlowModel final : public RolloutModel {
 public:
  SlowModel(const RolloutModel& inner, absl::Time* clock) : inner_(inner), clock_(clock) {}
  int members() const override { return inner_.members(); }
  int state_dim() const override { return inner_.state_dim(); }
  int action_dim() const override { return inner_.action_dim(); }
  void Evaluate(const float* s, const float* a, int rows, MemberPredictions* out) const override {
    *clock_ += absl::Milliseconds(1);
    inner_.Evaluate(s, a, rows, out);
  }

 private:
  const RolloutModel& inner_;
  absl::Time* clock_;
};

TEST(PlannerTest, DeadlineCutsIterationsAndStillReturnsAValidPlan) {
  // Each iteration costs horizon (10) model calls = 10 ms on the fake clock; with 25 ms the
  // planner runs two of its twenty iterations.
  const OffsetMembersModel inner = DisagreeAboveTwo();
  absl::Time clock = absl::UnixEpoch();
  const SlowModel model(inner, &clock);
  PlannerOptions options = SmallPlanner();
  options.cem.iterations = 20;
  options.cem.population_decay = 1.0;
  PlanContext context;
  context.deadline = absl::UnixEpoch() + absl::Milliseconds(25);
  context.now = [&] { return clock; };
  absl::StatusOr<PlanResult> plan = Plan(model, {.state = Eigen::VectorXf::Zero(1),
                                                 .limits = UnitHalfBox(),
                                                 .objective = explore::ObjectiveOptions{},
                                                 .options = options,
                                                 .context = context});
  ASSERT_TRUE(plan.ok()) << plan.status();
  EXPECT_EQ(plan->iterations, 2);
  EXPECT_EQ(plan->actions.rows(), 10);
  EXPECT_TRUE(plan->actions.allFinite());
}

TEST(PlannerTest, ParallelTasksGiveTheSameResultAsOneThread) {
  // Candidates are scored on common random draws, so splitting them over threads must not
  // change a single bit of the plan.
  const OffsetMembersModel model(3, 2, {-0.1f, 0.0f, 0.05f, 0.2f}, 0.05f);
  PlannerOptions options = SmallPlanner();
  options.rollout.propagation = Propagation::kTs1;
  const SequenceLimits limits = SequenceLimits::Box(Eigen::Vector2f(-1, -1), Eigen::Vector2f(1, 1));
  const Eigen::Vector3f state(0.1f, 0.2f, 0.3f);
  absl::StatusOr<PlanResult> serial = Plan(model, {.state = state,
                                                   .limits = limits,
                                                   .objective = explore::ObjectiveOptions{},
                                                   .options = options});
  ASSERT_TRUE(serial.ok());
  for (int tasks : {2, 3, 7}) {
    PlanContext context;
    context.tasks = tasks;
    int calls = 0;
    context.parallel = [&](int n, const std::function<void(int)>& task) {
      ++calls;
      std::vector<std::thread> threads;
      for (int i = 1; i < n; ++i) threads.emplace_back(task, i);
      task(0);
      for (std::thread& t : threads) t.join();
    };
    absl::StatusOr<PlanResult> parallel = Plan(model, {.state = state,
                                                       .limits = limits,
                                                       .objective = explore::ObjectiveOptions{},
                                                       .options = options,
                                                       .context = context});
    ASSERT_TRUE(parallel.ok());
    EXPECT_EQ(calls, options.cem.iterations);
    EXPECT_EQ(parallel->actions, serial->actions) << tasks << " tasks";
    EXPECT_EQ(parallel->objective, serial->objective);
  }
}

TEST(PlannerTest, ResultHasTheDocumentedShapes) {
  const OffsetMembersModel model(3, 2, {0.0f, 0.1f, 0.2f}, 0.05f);
  PlannerOptions options = SmallPlanner();
  options.set_horizon(7);
  const SequenceLimits limits = SequenceLimits::Box(Eigen::Vector2f(-1, -1), Eigen::Vector2f(1, 1));
  absl::StatusOr<PlanResult> plan = Plan(model, {.state = Eigen::Vector3f(0.1f, 0.2f, 0.3f),
                                                 .limits = limits,
                                                 .objective = explore::ObjectiveOptions{},
                                                 .options = options});
  ASSERT_TRUE(plan.ok()) << plan.status();
  EXPECT_EQ(plan->actions.rows(), 7);
  EXPECT_EQ(plan->actions.cols(), 2);
  EXPECT_EQ(plan->state_mean.rows(), 7);
  EXPECT_EQ(plan->state_mean.cols(), 3);
  EXPECT_EQ(plan->state_std.cols(), 3);
  EXPECT_EQ(plan->expected_reward.size(), 7);
  EXPECT_EQ(plan->information_gain.size(), 7);
  EXPECT_EQ(plan->iterations, options.cem.iterations);
  EXPECT_EQ(plan->warm_start.mean.rows(), 7);
  EXPECT_GT(plan->evaluations, 0);
}

TEST(PlannerTest, BadInputNamesTheFieldAndValues) {
  const OffsetMembersModel model(2, 1, {0.0f, 0.1f}, 0.05f);
  const explore::ObjectiveOptions objective;
  const PlannerOptions options = SmallPlanner();
  absl::StatusOr<PlanResult> plan = Plan(model, {.state = Eigen::VectorXf::Zero(3),
                                                 .limits = UnitHalfBox(),
                                                 .objective = objective,
                                                 .options = options});
  EXPECT_EQ(plan.status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(plan.status().message().find("state has 3 values, the model expects 2"),
            std::string::npos);

  plan = Plan(model, {.state = Eigen::Vector2f(0.0f, NAN),
                      .limits = UnitHalfBox(),
                      .objective = objective,
                      .options = options});
  EXPECT_NE(plan.status().message().find("state[1] is nan"), std::string::npos);

  const SequenceLimits two = SequenceLimits::Box(Eigen::Vector2f(-1, -1), Eigen::Vector2f(1, 1));
  plan = Plan(model, {.state = Eigen::VectorXf::Zero(2),
                      .limits = two,
                      .objective = objective,
                      .options = options});
  EXPECT_NE(plan.status().message().find("limits have 2 action values, the model has 1"),
            std::string::npos);

  PlannerOptions bad = options;
  bad.rollout.particles = 0;
  plan = Plan(model, {.state = Eigen::VectorXf::Zero(2),
                      .limits = UnitHalfBox(),
                      .objective = objective,
                      .options = bad});
  EXPECT_NE(plan.status().message().find("particles is 0"), std::string::npos);

  bad = options;
  bad.rollout.state_bounds.lower = Eigen::VectorXf::Zero(3);
  bad.rollout.state_bounds.upper = Eigen::VectorXf::Ones(3);
  plan = Plan(model, {.state = Eigen::VectorXf::Zero(2),
                      .limits = UnitHalfBox(),
                      .objective = objective,
                      .options = bad});
  EXPECT_NE(plan.status().message().find("3 lower and 3 upper values, the state has 2"),
            std::string::npos);

  explore::ObjectiveOptions wrong_target;
  wrong_target.known_reward.kind = explore::KnownReward::Kind::kQuadratic;
  wrong_target.known_reward.target = {1.0};
  plan = Plan(model, {.state = Eigen::VectorXf::Zero(2),
                      .limits = UnitHalfBox(),
                      .objective = wrong_target,
                      .options = options});
  EXPECT_NE(plan.status().message().find("target has 1 values, the state has 2"),
            std::string::npos);
}

}  // namespace
}  // namespace foray::plan
