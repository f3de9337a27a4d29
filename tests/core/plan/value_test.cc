// The value of the states a plan ends in: the discounted returns it is fitted to (worked by
// hand from their definition), the Nadaraya-Watson regression (Wasserman, "All of
// Nonparametric Statistics", 2006, eq. 5.52, computed here directly in double precision),
// Scott's bandwidth factor n^(-1/(d+4)) (Scott 1992, eq. 6.42; the factor scipy's gaussian_kde
// uses by default), the subsample's weights, and the rollout's term w_v gamma^H E[s_H V(x_H)];
// the same regression of the rewards as a plan's nearby reward, summed over the horizon.
#include "core/plan/value.h"

#include <cmath>
#include <vector>

#include "core/plan/planner.h"
#include "core/plan/rollout.h"
#include "gtest/gtest.h"
#include "tests/testing/simd_targets.h"

namespace foray::plan {
namespace {

TEST(ValueTest, ReturnsAfterFollowTheirDefinition) {
  // Episode 7: rewards 0, 0, 1, 1 (time up after the fourth); episode 9: 0, then a terminal
  // transition with reward 0. gamma 0.5, V_term -10. G_i = sum_{k>=1} gamma^(k-1) (r_{i+k} +
  // [i+k ended it] V_term) within the episode:
  //   G_3 = 0 (its episode's last row), G_2 = 1, G_1 = 1 + 0.5 * 1 = 1.5, G_0 = 0 + 0.5 * 1.5;
  //   G_5 = 0 (terminal), G_4 = 0 + (-10).
  const auto g =
      ReturnsAfter({0, 0, 1, 1, 0, 0}, {7, 7, 7, 7, 9, 9}, {0, 0, 0, 0, 0, 1}, 0.5, -10.0);
  ASSERT_TRUE(g.ok()) << g.status();
  const std::vector<double> expected = {0.75, 1.5, 1.0, 0.0, -10.0, 0.0};
  ASSERT_EQ(g->size(), expected.size());
  for (size_t i = 0; i < expected.size(); ++i) EXPECT_DOUBLE_EQ((*g)[i], expected[i]) << i;

  // A terminal flag ends its episode even when the next row carries the same id.
  const auto same_id = ReturnsAfter({0, 5, 1}, {3, 3, 3}, {0, 1, 0}, 0.9, 0.0);
  ASSERT_TRUE(same_id.ok());
  EXPECT_DOUBLE_EQ((*same_id)[0], 5.0);
  EXPECT_DOUBLE_EQ((*same_id)[1], 0.0);

  const auto bad = ReturnsAfter({0, 1}, {1}, {}, 0.9, 0.0);
  ASSERT_FALSE(bad.ok());
  EXPECT_NE(bad.status().message().find("2 rewards, 1 episode ids"), std::string::npos)
      << bad.status();
}

TEST(ValueTest, MatchesTheNadarayaWatsonEstimateWithScottsBandwidth) {
  // 16 two-dimensional states on a skewed grid with returns that vary over it.
  const int n = 16, d = 2;
  std::vector<float> x(n * d);
  std::vector<double> g(n);
  for (int i = 0; i < n; ++i) {
    x[i * d] = static_cast<float>(0.3 * (i % 4) + 0.05 * i);
    x[i * d + 1] = static_cast<float>(2.0 * (i / 4) - 1.0);
    g[i] = std::sin(0.7 * i) + 0.5;
  }
  ValueOptions options;
  options.prior_weight = 0.25;
  const auto value = StateValue::Fit(x.data(), n, d, g, options);
  ASSERT_TRUE(value.ok()) << value.status();
  const double h = std::pow(16.0, -1.0 / 6.0);  // Scott: n^(-1/(d+4)), in standard deviations
  EXPECT_NEAR(value->bandwidth(), h, 1e-12);
  EXPECT_EQ(value->points(), n);

  // The estimate at query points, from the formula: standardise by the data's mean and
  // (population) standard deviation, Gaussian kernel of width h, w_0 = 0.25.
  double mean[2] = {0, 0}, sd[2] = {0, 0};
  for (int k = 0; k < d; ++k) {
    for (int i = 0; i < n; ++i) mean[k] += x[i * d + k] / n;
    for (int i = 0; i < n; ++i) sd[k] += std::pow(x[i * d + k] - mean[k], 2) / n;
    sd[k] = std::sqrt(sd[k]);
  }
  const std::vector<float> queries = {0.2f, -0.5f, 1.1f, 3.0f, 0.6f, 1.0f, 5.0f, 20.0f};
  std::vector<float> got(4);
  testing::ForEachSimdTarget([&] {
    value->Evaluate(queries.data(), d, 4, got.data());
    for (int q = 0; q < 4; ++q) {
      double num = 0, den = 0.25;
      for (int i = 0; i < n; ++i) {
        double dist2 = 0;
        for (int k = 0; k < d; ++k) {
          dist2 += std::pow((queries[q * d + k] - x[i * d + k]) / sd[k], 2);
        }
        const double kernel = std::exp(-dist2 / (2 * h * h));
        num += kernel * g[i];
        den += kernel;
      }
      EXPECT_NEAR(got[q], num / den, 1e-5 * (1 + std::abs(num / den))) << "query " << q;
    }
    // Far from every state the pseudo-observation wins: the value falls to 0.
    EXPECT_NEAR(got[3], 0.0, 1e-6);
  });
}

// Points not filling whole vectors (13 of them): the padding counts for nothing, on every target.
TEST(ValueTest, ThePaddingPointsCountForNothing) {
  const int n = 13;
  std::vector<float> x(n);
  std::vector<double> g(n);
  for (int i = 0; i < n; ++i) {
    x[i] = static_cast<float>(0.1 * i);
    g[i] = i % 3 == 0 ? 2.0 : -1.0;
  }
  ValueOptions average;
  const auto value = StateValue::Fit(x.data(), n, 1, g, average);
  ValueOptions best_options;
  best_options.estimate = ValueEstimate::kBest;
  const auto best = StateValue::Fit(x.data(), n, 1, g, best_options);
  ASSERT_TRUE(value.ok() && best.ok());
  double mean = 0, var = 0;
  for (float v : x) mean += v / n;
  for (float v : x) var += (v - mean) * (v - mean) / n;
  const double h = std::pow(n, -1.0 / 5.0), sd = std::sqrt(var);
  const std::vector<float> queries = {-0.3f, 0.0f, 0.55f, 1.2f, 3.0f};
  testing::ForEachSimdTarget([&] {
    std::vector<float> got(queries.size()), got_best(queries.size());
    value->Evaluate(queries.data(), 1, static_cast<int>(queries.size()), got.data());
    best->Evaluate(queries.data(), 1, static_cast<int>(queries.size()), got_best.data());
    for (size_t q = 0; q < queries.size(); ++q) {
      double num = 0, den = 1.0, top = 0.0;
      for (int i = 0; i < n; ++i) {
        const double k = std::exp(-std::pow((queries[q] - x[i]) / sd, 2) / (2 * h * h));
        num += k * g[i];
        den += k;
        top = std::max(top, k * g[i]);
      }
      EXPECT_NEAR(got[q], num / den, 1e-5 * (1 + std::abs(num / den))) << "query " << q;
      EXPECT_NEAR(got_best[q], top, 1e-5 * (1 + top)) << "query " << q;
    }
  });
}

TEST(ValueTest, TheSubsampleKeepsRareReturnsAndWeighsTheRest) {
  // 10,000 states on a line, 40 of them (near x = 3) followed by reward; 256 points kept.
  const int n = 10000;
  std::vector<float> x(n);
  std::vector<double> g(n, 0.0);
  for (int i = 0; i < n; ++i) x[i] = static_cast<float>(10.0 * i / n);
  for (int i = 3000; i < 3040; ++i) g[i] = 2.0;
  ValueOptions few;
  few.max_points = 256;
  ValueOptions all;
  all.max_points = n;
  const auto sub = StateValue::Fit(x.data(), n, 1, g, few);
  const auto full = StateValue::Fit(x.data(), n, 1, g, all);
  ASSERT_TRUE(sub.ok() && full.ok());
  EXPECT_EQ(sub->points(), 256);
  EXPECT_EQ(full->points(), n);
  // Every rewarded row is kept (40 < 128), the 9,960 others stand in at 216 points, each
  // weighted 9960/216: the estimate is the full one's within the subsample's spacing.
  const std::vector<float> queries = {3.02f, 2.5f, 7.0f};
  std::vector<float> a(3), b(3);
  sub->Evaluate(queries.data(), 1, 3, a.data());
  full->Evaluate(queries.data(), 1, 3, b.data());
  for (int q = 0; q < 3; ++q) EXPECT_NEAR(a[q], b[q], 0.02 * std::max(1e-3f, std::abs(b[q]))) << q;
  EXPECT_GT(b[0], 10 * b[2]);  // the value is where the reward followed
}

TEST(ValueTest, TheBestEstimateTakesTheBestContinuationSeenNearby) {
  // 1-D states 0, 1, 2 with returns 3, -10, 1 (std sqrt(2/3), h = 3^(-1/5)): the best estimate
  // is max(0, max_i K(x, x_i) G_i); only the two positive rows are kept.
  const std::vector<float> x = {0.0f, 1.0f, 2.0f};
  ValueOptions options;
  options.estimate = ValueEstimate::kBest;
  const auto best = StateValue::Fit(x.data(), 3, 1, {3.0, -10.0, 1.0}, options);
  ASSERT_TRUE(best.ok()) << best.status();
  EXPECT_EQ(best->points(), 2);
  const double sd = std::sqrt(2.0 / 3.0), h = std::pow(3.0, -0.2);
  auto kernel = [&](double d) { return std::exp(-(d / sd) * (d / sd) / (2 * h * h)); };
  const std::vector<float> queries = {0.0f, 1.0f, 2.0f, 9.0f};
  std::vector<float> got(4);
  best->Evaluate(queries.data(), 1, 4, got.data());
  EXPECT_NEAR(got[0], 3.0, 1e-6);
  EXPECT_NEAR(got[1], std::max(3.0 * kernel(1.0), 1.0 * kernel(1.0)), 1e-6);  // the loss ignored
  EXPECT_NEAR(got[2], std::max(3.0 * kernel(2.0), 1.0), 1e-6);
  EXPECT_NEAR(got[3], 0.0, 1e-6);
  // The average estimate at the loss's own state is negative: it says "avoid".
  const auto average = StateValue::Fit(x.data(), 3, 1, {3.0, -10.0, 1.0}, ValueOptions());
  float at_loss = 0;
  average->Evaluate(&queries[1], 1, 1, &at_loss);
  EXPECT_LT(at_loss, -1.0f);
  // No positive return anywhere: nothing is worth seeking.
  const auto none = StateValue::Fit(x.data(), 3, 1, {0.0, -10.0, 0.0}, options);
  ASSERT_TRUE(none.ok());
  EXPECT_EQ(none->points(), 0);
  none->Evaluate(queries.data(), 1, 4, got.data());
  for (float v : got) EXPECT_EQ(v, 0.0f);
}

TEST(ValueTest, BadInputIsNamed) {
  std::vector<float> x = {0.0f, 1.0f};
  ValueOptions bad;
  bad.discount = 1.0;
  auto v = StateValue::Fit(x.data(), 2, 1, {0.0, 1.0}, bad);
  ASSERT_FALSE(v.ok());
  EXPECT_NE(v.status().message().find("value discount is 1"), std::string::npos) << v.status();
  v = StateValue::Fit(x.data(), 2, 1, {0.0}, ValueOptions());
  ASSERT_FALSE(v.ok());
  EXPECT_NE(v.status().message().find("1 returns for 2 rows"), std::string::npos) << v.status();
  x[1] = NAN;
  v = StateValue::Fit(x.data(), 2, 1, {0.0, 1.0}, ValueOptions());
  ASSERT_FALSE(v.ok());
  EXPECT_NE(v.status().message().find("row 1"), std::string::npos) << v.status();
}

// A deterministic double integrator (x, v): the state after H steps is known exactly.
LinearRolloutModel DoubleIntegrator() {
  Eigen::MatrixXf a(2, 2), b(2, 1);
  a << 1, 0.1f, 0, 1;
  b << 0.005f, 0.1f;
  return LinearRolloutModel(a, b, Eigen::VectorXf::Zero(2));
}

// The status of a plan on `model` (a 2-D state, a 1-D action) whose rollout options carry, in
// `field`, a fit of another robot's 3-D state.
absl::Status PlanWithAnotherRobotsFit(const RolloutModel& model,
                                      const explore::ObjectiveOptions& objective,
                                      std::shared_ptr<const StateValue> RolloutOptions::*field) {
  std::vector<float> three = {0, 0, 0, 1, 1, 1};
  auto other = StateValue::Fit(three.data(), 2, 3, {0.0, 1.0}, ValueOptions());
  EXPECT_TRUE(other.ok());
  if (!other.ok()) return other.status();
  PlanRequest request;
  request.state = Eigen::Vector2f(0.2f, 0.0f);
  request.limits.lower = Eigen::VectorXf::Constant(1, -1.0f);
  request.limits.upper = Eigen::VectorXf::Constant(1, 1.0f);
  request.objective = objective;
  request.options.set_horizon(5);
  request.options.rollout.*field = std::make_shared<const StateValue>(*std::move(other));
  return Plan(model, request).status();
}

TEST(ValueTest, TheRolloutAddsTheDiscountedValueOfWhereItEnds) {
  const LinearRolloutModel model = DoubleIntegrator();
  // Returns that grow with the position: the value pays for ending farther along.
  std::vector<float> x;
  std::vector<double> g;
  for (int i = 0; i < 200; ++i) {
    x.push_back(0.01f * i);
    x.push_back(0.0f);
    g.push_back(0.5 * i);
  }
  auto value = StateValue::Fit(x.data(), 200, 2, g, ValueOptions());
  ASSERT_TRUE(value.ok());
  explore::ObjectiveOptions objective;
  objective.information_weight = 0.0;
  objective.known_reward.kind = explore::KnownReward::Kind::kQuadratic;  // r = -|x'|^2
  objective.known_reward.target = {0.0, 0.0};
  objective.discount = 0.9;
  RolloutOptions options;
  options.horizon = 5;
  options.particles = 3;
  const std::vector<float> sequence = {1.0f, 1.0f, 1.0f, 0.5f, 0.0f};
  const float initial[2] = {0.2f, 0.0f};
  RolloutWorkspace ws;
  float without = 0, with = 0;
  ScoreSequences(model, objective, options, initial, sequence.data(), 1, 5, &without, &ws);
  options.value = std::make_shared<const StateValue>(*value);
  ScoreSequences(model, objective, options, initial, sequence.data(), 1, 5, &without, &ws);
  objective.value_weight = 2.0;
  RolloutTrace trace;
  ScoreSequences(model, objective, options, initial, sequence.data(), 1, 5, &with, &ws, &trace);
  // The end state by hand: x_{t+1} = x_t + 0.1 v_t + 0.005 u_t, v_{t+1} = v_t + 0.1 u_t.
  float s[2] = {0.2f, 0.0f};
  for (float u : sequence) {
    s[0] = s[0] + 0.1f * s[1] + 0.005f * u;
    s[1] = s[1] + 0.1f * u;
  }
  float v_end = 0;
  value->Evaluate(s, 2, 1, &v_end);
  EXPECT_GT(v_end, 1.0f);
  EXPECT_NEAR(trace.value_beyond, v_end, 1e-4 * v_end);
  EXPECT_NEAR(with - without, 2.0 * std::pow(0.9, 5) * v_end, 1e-4 * v_end);

  // An episode that has ended earns nothing beyond it: every state is terminal.
  objective.known_termination.indices = {0};
  objective.known_termination.lower = {-1e30};
  objective.known_termination.upper = {1e30};
  ScoreSequences(model, objective, options, initial, sequence.data(), 1, 5, &with, &ws, &trace);
  EXPECT_EQ(trace.value_beyond, 0.0);

  // Plan refuses a value of another robot's state.
  const absl::Status plan = PlanWithAnotherRobotsFit(model, objective, &RolloutOptions::value);
  ASSERT_FALSE(plan.ok());
  EXPECT_NE(plan.message().find("state value has 3 state dimensions, the model has 2"),
            std::string::npos)
      << plan;
}

// The nearby reward: with the objective's reward_estimate kNearby, each step's reward is the
// regression of the rewards received on the next states, evaluated at the rollout's state.
TEST(ValueTest, TheNearbyRewardIsTheRewardsRegressedOnWhereEachStepArrives) {
  const LinearRolloutModel model = DoubleIntegrator();  // predicts a reward of 0 everywhere
  // Rewards of 1 on arriving in [0.25, 0.35] at rest, 0 elsewhere on a grid of positions.
  std::vector<float> x;
  std::vector<double> r;
  for (int i = 0; i < 300; ++i) {
    x.push_back(0.002f * i);
    x.push_back(0.0f);
    r.push_back(0.25 <= 0.002 * i && 0.002 * i <= 0.35 ? 1.0 : 0.0);
  }
  auto nearby = StateValue::Fit(x.data(), 300, 2, r, ValueOptions());
  ASSERT_TRUE(nearby.ok());
  explore::ObjectiveOptions objective;
  objective.information_weight = 0.0;
  objective.discount = 0.9;
  RolloutOptions options;
  options.horizon = 5;
  options.particles = 2;
  options.nearby_reward = std::make_shared<const StateValue>(*nearby);
  const std::vector<float> sequence = {1.0f, 1.0f, 0.0f, -1.0f, -1.0f};
  const float initial[2] = {0.25f, 0.0f};
  RolloutWorkspace ws;
  RolloutTrace trace;
  float model_score = 1, nearby_score = 0;
  ScoreSequences(model, objective, options, initial, sequence.data(), 1, 5, &model_score, &ws);
  EXPECT_EQ(model_score, 0.0f);  // the model's reward output: 0
  objective.reward_estimate = explore::RewardEstimate::kNearby;
  ScoreSequences(model, objective, options, initial, sequence.data(), 1, 5, &nearby_score, &ws,
                 &trace);
  // By hand: x_{t+1} = x_t + 0.1 v_t + 0.005 u_t, v_{t+1} = v_t + 0.1 u_t; J = sum 0.9^t
  // R(s_{t+1}).
  float s[2] = {0.25f, 0.0f};
  double expected = 0.0, discount = 1.0;
  for (int t = 0; t < 5; ++t) {
    s[0] = s[0] + 0.1f * s[1] + 0.005f * sequence[t];
    s[1] = s[1] + 0.1f * sequence[t];
    float reward = 0;
    nearby->Evaluate(s, 2, 1, &reward);
    EXPECT_NEAR(trace.expected_reward[t], reward, 1e-5) << "step " << t;
    if (t == 0) EXPECT_GT(reward, 0.1f);
    expected += discount * reward;
    discount *= 0.9;
  }
  EXPECT_NEAR(nearby_score, expected, 1e-5 * (1 + expected));

  // A known reward wins over either estimate: r = -|x'|^2 is never positive.
  objective.known_reward.kind = explore::KnownReward::Kind::kQuadratic;
  objective.known_reward.target = {0.0, 0.0};
  ScoreSequences(model, objective, options, initial, sequence.data(), 1, 5, &nearby_score, &ws);
  EXPECT_LT(nearby_score, 0.0f);

  // Plan refuses a nearby reward of another robot's state.
  const absl::Status plan =
      PlanWithAnotherRobotsFit(model, explore::ObjectiveOptions(), &RolloutOptions::nearby_reward);
  ASSERT_FALSE(plan.ok());
  EXPECT_NE(plan.message().find("nearby reward has 3 state dimensions, the model has 2"),
            std::string::npos)
      << plan;
}

}  // namespace
}  // namespace foray::plan
