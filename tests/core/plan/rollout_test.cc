// Particle rollouts: propagation (TS-inf and TS1 of Chua et al. 2018, NeurIPS), sampling from
// the particle's own member, the discounted objective, the information term, and the learned
// ensemble's robot-unit predictions.
#include "core/plan/rollout.h"

#include <cmath>
#include <utility>
#include <vector>

#include "core/model/ensemble.h"
#include "core/plan/cem.h"
#include "core/util/random.h"
#include "gtest/gtest.h"
#include "tests/core/plan/test_models.h"

namespace foray::plan {
namespace {

using testing::OffsetMembersModel;

explore::ObjectiveOptions RewardOnly() {
  explore::ObjectiveOptions o;
  o.reward_weight = 1.0;
  o.information_weight = 0.0;
  return o;
}

TEST(RolloutTest, LinearModelMatchesHandSimulation) {
  // Reference: the double integrator x' = A x + B u simulated step by step in double precision,
  // scored with the quadratic reward r = -(x'-g)^T Q (x'-g) - c u^2 of the objective's definition.
  const double dt = 0.1;
  Eigen::MatrixXf a(2, 2), b(2, 1);
  a << 1, dt, 0, 1;
  b << 0.5 * dt * dt, dt;
  const LinearRolloutModel model(a, b, Eigen::VectorXf::Zero(2));
  explore::ObjectiveOptions objective = RewardOnly();
  objective.discount = 0.95;
  objective.known_reward.kind = explore::KnownReward::Kind::kQuadratic;
  objective.known_reward.target = {0.5, 0.0};
  objective.known_reward.state_weight = {2.0, 0.3};
  objective.known_reward.action_weight = {0.05};
  ASSERT_TRUE(objective.Validate(2, 1).ok());
  RolloutOptions options;
  options.horizon = 7;
  options.particles = 3;

  const int candidates = 4;
  Rng rng(3);
  std::vector<float> sequences(candidates * options.horizon);
  for (float& u : sequences) u = static_cast<float>(4.0 * rng.Uniform() - 2.0);
  const float initial[2] = {-1.0f, 0.3f};
  std::vector<float> scores(candidates);
  RolloutWorkspace ws;
  ScoreSequences(model, objective, options, initial, sequences.data(), candidates, 9,
                 scores.data(), &ws);

  for (int n = 0; n < candidates; ++n) {
    double x = initial[0], v = initial[1], total = 0.0, discount = 1.0;
    for (int t = 0; t < options.horizon; ++t) {
      const double u = sequences[n * options.horizon + t];
      const double x2 = x + dt * v + 0.5 * dt * dt * u;
      const double v2 = v + dt * u;
      x = x2;
      v = v2;
      const double r = -2.0 * (x - 0.5) * (x - 0.5) - 0.3 * v * v - 0.05 * u * u;
      total += discount * r;
      discount *= 0.95;
    }
    EXPECT_NEAR(scores[n], total, 1e-4 * std::max(1.0, std::abs(total))) << "candidate " << n;
  }
}

TEST(RolloutTest, TsInfKeepsEachParticleOnItsMember) {
  // Member b moves the state by offsets[b] per step with no noise and predicts reward b. Under
  // TS-inf particle p stays on member p mod B, so after t+1 steps the particles sit at
  // (t+1) * {0, 10, 20, 30, 40}: mean (t+1) * 20, population std (t+1) * sqrt(200).
  const OffsetMembersModel model(1, 1, {0, 10, 20, 30, 40}, 1e-12f);
  RolloutOptions options;
  options.horizon = 3;
  options.particles = 5;
  options.propagation = Propagation::kTsInf;
  const float initial = 0.0f;
  std::vector<float> sequence(options.horizon, 0.0f);
  float score = 0.0f;
  RolloutWorkspace ws;
  RolloutTrace trace;
  ScoreSequences(model, RewardOnly(), options, &initial, sequence.data(), 1, 4, &score, &ws,
                 &trace);
  for (int t = 0; t < options.horizon; ++t) {
    EXPECT_NEAR(trace.state_mean(t, 0), (t + 1) * 20.0, 1e-3);
    EXPECT_NEAR(trace.state_std(t, 0), (t + 1) * std::sqrt(200.0), 1e-3);
    EXPECT_NEAR(trace.expected_reward[t], 2.0, 1e-6);  // mean of member indices 0..4
  }
  EXPECT_NEAR(score, 3 * 2.0, 1e-5);
}

TEST(RolloutTest, Ts1DrawsAFreshMemberEveryStep) {
  // Offsets {0, 1, 2, 3, 4}, no noise, two steps. A uniform member index has variance 2. TS1
  // draws the member independently per step: Var(m_0 + m_1) = 2 + 2 = 4 (std 2). TS-inf keeps
  // it: Var(2 m) = 8 (std 2.83). 20,000 particles: the std's standard error is about 0.02.
  const OffsetMembersModel model(1, 1, {0, 1, 2, 3, 4}, 1e-12f);
  RolloutOptions options;
  options.horizon = 2;
  options.particles = 20000;
  options.propagation = Propagation::kTs1;
  const float initial = 0.0f;
  const std::vector<float> sequence(options.horizon, 0.0f);
  float score = 0.0f;
  RolloutWorkspace ws;
  RolloutTrace trace;
  ScoreSequences(model, RewardOnly(), options, &initial, sequence.data(), 1, 21, &score, &ws,
                 &trace);
  EXPECT_NEAR(trace.state_mean(1, 0), 4.0, 0.05);
  EXPECT_NEAR(trace.state_std(1, 0), 2.0, 0.08);

  options.propagation = Propagation::kTsInf;
  ScoreSequences(model, RewardOnly(), options, &initial, sequence.data(), 1, 21, &score, &ws,
                 &trace);
  EXPECT_NEAR(trace.state_std(1, 0), std::sqrt(8.0), 0.01);
}

TEST(RolloutTest, NextStateIsSampledFromTheMembersGaussian) {
  // One member, delta mean 0.3, variance 0.25: after one step the particles are N(0.3, 0.5^2).
  // 40,000 draws: standard error of the mean 0.0025, of the std about 0.0018 (textbook sampling
  // distributions of the mean and standard deviation).
  const OffsetMembersModel model(1, 1, {0.3f}, 0.25f);
  RolloutOptions options;
  options.horizon = 1;
  options.particles = 40000;
  const float initial = 0.0f, action = 0.0f;
  float score = 0.0f;
  RolloutWorkspace ws;
  RolloutTrace trace;
  ScoreSequences(model, RewardOnly(), options, &initial, &action, 1, 8, &score, &ws, &trace);
  EXPECT_NEAR(trace.state_mean(0, 0), 0.3, 0.012);
  EXPECT_NEAR(trace.state_std(0, 0), 0.5, 0.008);
}

TEST(RolloutTest, CandidatesShareRandomDraws) {
  // Common random numbers: equal sequences get equal scores, and a candidate's score does not
  // depend on its position in the batch.
  const OffsetMembersModel model(2, 1, {-0.2f, 0.0f, 0.1f, 0.4f}, 0.3f);
  RolloutOptions options;
  options.horizon = 5;
  options.particles = 4;
  options.propagation = Propagation::kTs1;
  explore::ObjectiveOptions objective;  // reward and information
  const float initial[2] = {0.1f, -0.4f};
  Rng rng(5);
  std::vector<float> seqs(3 * options.horizon);
  for (float& u : seqs) u = static_cast<float>(rng.Normal());
  std::vector<float> batch(seqs);
  batch.insert(batch.end(), seqs.begin(), seqs.begin() + options.horizon);  // copy of 0
  std::vector<float> scores(4);
  RolloutWorkspace ws;
  ScoreSequences(model, objective, options, initial, batch.data(), 4, 77, scores.data(), &ws);
  EXPECT_EQ(scores[0], scores[3]);

  std::vector<float> reversed;
  for (int n = 2; n >= 0; --n) {
    reversed.insert(reversed.end(), seqs.begin() + n * options.horizon,
                    seqs.begin() + (n + 1) * options.horizon);
  }
  std::vector<float> reversed_scores(3);
  ScoreSequences(model, objective, options, initial, reversed.data(), 3, 77,
                 reversed_scores.data(), &ws);
  for (int n = 0; n < 3; ++n) EXPECT_EQ(reversed_scores[2 - n], scores[n]) << n;
}

TEST(RolloutTest, DiscountGivesTheGeometricSeries) {
  // Reward 1 at every step (a region that holds every state): J = sum_{t<H} gamma^t
  // = (1 - gamma^H) / (1 - gamma), the geometric series.
  const OffsetMembersModel model(1, 1, {0.0f}, 0.01f);
  explore::ObjectiveOptions objective = RewardOnly();
  objective.discount = 0.9;
  objective.known_reward.kind = explore::KnownReward::Kind::kRegion;
  objective.known_reward.indices = {0};
  objective.known_reward.lower = {-1e30};
  objective.known_reward.upper = {1e30};
  RolloutOptions options;
  options.horizon = 10;
  options.particles = 3;
  const float initial = 0.0f;
  const std::vector<float> sequence(options.horizon, 0.5f);
  float score = 0.0f;
  RolloutWorkspace ws;
  ScoreSequences(model, objective, options, &initial, sequence.data(), 1, 1, &score, &ws);
  EXPECT_NEAR(score, (1.0 - std::pow(0.9, 10)) / (1.0 - 0.9), 1e-5);
}

// An objective of the information term alone, by the pairwise-KL estimator.
explore::ObjectiveOptions PairwiseKlInformationOnly() {
  explore::ObjectiveOptions objective;
  objective.reward_weight = 0.0;
  objective.information_weight = 1.0;
  objective.estimator = explore::Estimator::kPairwiseKl;
  return objective;
}

TEST(RolloutTest, InformationTermIsThePairwiseKlBoundAtEveryStep) {
  // Two members whose delta means differ by 2 with unit variances, everywhere. KL between them
  // is 1/2 * (mu_1 - mu_2)^2 / var = 2 both ways, so (Kolchinsky & Tracey 2017)
  // I_KL = -(1/2) sum_i ln((1 + e^-2) / 2) = ln 2 - ln(1 + e^-2) per step.
  const OffsetMembersModel model(1, 1, {-1.0f, 1.0f}, 1.0f);
  explore::ObjectiveOptions objective = PairwiseKlInformationOnly();
  RolloutOptions options;
  options.horizon = 4;
  options.particles = 6;
  const float initial = 0.0f;
  const std::vector<float> sequence(options.horizon, 0.0f);
  float score = 0.0f;
  RolloutWorkspace ws;
  RolloutTrace trace;
  ScoreSequences(model, objective, options, &initial, sequence.data(), 1, 3, &score, &ws, &trace);
  const double per_step = std::log(2.0) - std::log(1.0 + std::exp(-2.0));
  EXPECT_NEAR(score, 4 * per_step, 1e-5);
  for (int t = 0; t < 4; ++t) EXPECT_NEAR(trace.information_gain[t], per_step, 1e-6);
}

TEST(RolloutTest, ObservationNoiseFloorsTheVariancesOfTheInformationTerm) {
  // Members that differ by 0.002 model units with a collapsed variance of 1e-8 (a deterministic
  // region): with exact observations KL = 1/2 * 0.002^2 / 1e-8 = 200 both ways, so the pairwise
  // bound is at its ceiling ln 2. Measured with noise 0.05 (variance floor 0.0025) the same
  // members give KL = 1/2 * 0.002^2 / 0.0025 = 8e-4 both ways and I_KL = ln 2 - ln(1 + e^-8e-4)
  // (Kolchinsky & Tracey 2017, KL between Gaussians of equal variance).
  const OffsetMembersModel model(1, 1, {-0.001f, 0.001f}, 1e-8f);
  explore::ObjectiveOptions objective = PairwiseKlInformationOnly();
  RolloutOptions options;
  options.horizon = 2;
  options.particles = 4;
  const float initial = 0.0f;
  const std::vector<float> sequence(options.horizon, 0.0f);
  RolloutWorkspace ws;
  for (double noise : {0.0, 0.05}) {
    objective.observation_noise = noise;
    const double kl = noise == 0.0 ? 200.0 : 0.5 * 0.002 * 0.002 / (noise * noise);
    const double per_step = std::log(2.0) - std::log(1.0 + std::exp(-kl));
    float score = 0.0f;
    RolloutTrace trace;
    ScoreSequences(model, objective, options, &initial, sequence.data(), 1, 3, &score, &ws, &trace);
    for (int t = 0; t < options.horizon; ++t) {
      EXPECT_NEAR(trace.information_gain[t], per_step, 1e-4 * per_step + 1e-7) << "noise " << noise;
    }
  }
  // A variance above the floor is left as it is: the unit-variance members of the test above.
  const OffsetMembersModel wide(1, 1, {-1.0f, 1.0f}, 1.0f);
  objective.observation_noise = 0.5;
  float score = 0.0f;
  ScoreSequences(wide, objective, options, &initial, sequence.data(), 1, 3, &score, &ws);
  EXPECT_NEAR(score, 2 * (std::log(2.0) - std::log(1.0 + std::exp(-2.0))), 1e-5);
  objective.observation_noise = 1.5;
  EXPECT_FALSE(objective.Validate(1, 1).ok());
}

TEST(RolloutTest, StateBoundsHoldEveryParticleAtTheStop) {
  // s' = s + a (exact) against a stop at 1.0: the reference is the stop's definition,
  // s_{t+1} = min(s_t + a_t, 1.0), stepped by hand; the lower side is unbounded.
  const LinearRolloutModel model(Eigen::MatrixXf::Identity(1, 1), Eigen::MatrixXf::Ones(1, 1),
                                 Eigen::VectorXf::Zero(1));
  explore::ObjectiveOptions objective = RewardOnly();
  RolloutOptions options;
  options.horizon = 5;
  options.particles = 3;
  options.state_bounds.lower = Eigen::VectorXf::Constant(1, -INFINITY);
  options.state_bounds.upper = Eigen::VectorXf::Constant(1, 1.0f);
  const float initial = 0.2f;
  const std::vector<float> sequence = {0.5f, 0.5f, 0.5f, -0.5f, -2.0f};
  float score = 0.0f;
  RolloutWorkspace ws;
  RolloutTrace trace;
  ScoreSequences(model, objective, options, &initial, sequence.data(), 1, 3, &score, &ws, &trace);
  double s = initial;
  for (int t = 0; t < options.horizon; ++t) {
    s = std::min(s + sequence[t], 1.0);
    EXPECT_NEAR(trace.state_mean(t, 0), s, 1e-6) << "step " << t;
  }
  EXPECT_NEAR(trace.state_mean(4, 0), -1.5, 1e-6);  // unbounded below
}

TEST(RolloutTest, MembersThatDifferOnlyPastAStopAgreeAtIt) {
  // Two members predicting the delta a - 1 and a + 1 with unit variance, one step from 0, with
  // a stop at 0 above. Pairwise KL bound (Kolchinsky & Tracey 2017) for two equal-variance
  // Gaussians whose means differ by d: I = ln 2 - ln(1 + exp(-d^2 / 2)).
  //   a = +2: both predict past the stop (1 and 3), held at 0: d = 0, I = 0;
  //   a = 0: one inside (-1), one past (+1, held at 0): d = 1;
  //   a = -2: both inside (-3, -1): d = 2, as without the stop.
  const OffsetMembersModel model(1, 1, {-1.0f, 1.0f}, 1.0f);
  explore::ObjectiveOptions objective = PairwiseKlInformationOnly();
  objective.observation_noise = 0.0;
  RolloutOptions options;
  options.horizon = 1;
  options.particles = 2;
  const float initial = 0.0f;
  auto bound = [](double d) { return std::log(2.0) - std::log(1.0 + std::exp(-d * d / 2.0)); };
  RolloutWorkspace ws;
  for (const auto& [action, d] :
       std::vector<std::pair<float, double>>{{2.0f, 0.0}, {0.0f, 1.0}, {-2.0f, 2.0}}) {
    options.state_bounds.lower = Eigen::VectorXf::Constant(1, -INFINITY);
    options.state_bounds.upper = Eigen::VectorXf::Constant(1, 0.0f);
    float held = 0.0f, free = 0.0f;
    ScoreSequences(model, objective, options, &initial, &action, 1, 3, &held, &ws);
    EXPECT_NEAR(held, bound(d), 1e-6) << "action " << action;
    options.state_bounds = StateBounds();
    ScoreSequences(model, objective, options, &initial, &action, 1, 3, &free, &ws);
    EXPECT_NEAR(free, bound(2.0), 1e-6) << "action " << action;
  }
}

TEST(RolloutTest, StateBoundsValidateNamesTheDimension) {
  StateBounds bounds;
  EXPECT_TRUE(bounds.Validate(3).ok());  // none given
  bounds.lower = Eigen::VectorXf::Constant(2, -1.0f);
  bounds.upper = Eigen::VectorXf::Constant(2, 1.0f);
  EXPECT_NE(bounds.Validate(3).message().find("2 lower and 2 upper values, the state has 3"),
            std::string::npos);
  EXPECT_TRUE(bounds.Validate(2).ok());
  bounds.lower[1] = 2.0f;
  EXPECT_NE(bounds.Validate(2).message().find("state bound 1 is [2, 1]"), std::string::npos);
  bounds.lower[1] = INFINITY;
  bounds.upper[1] = INFINITY;
  EXPECT_FALSE(bounds.Validate(2).ok());
  bounds.lower[1] = NAN;
  EXPECT_FALSE(bounds.Validate(2).ok());
  bounds.lower[1] = -INFINITY;
  EXPECT_TRUE(bounds.Validate(2).ok());
}

TEST(RolloutTest, ADimensionThatNeverChangedCarriesNoInformation) {
  // Two members, two state dimensions. Dimension 1 has unit scale and means 2 apart with unit
  // variances: the pairwise KL bound (Kolchinsky & Tracey 2017) ln 2 - ln(1 + exp(-2)).
  // Dimension 0 has the scale of a constant target (its change never varied in the data) and
  // means 1 apart in model units, 1e-6 in robot units: it adds nothing.
  MemberPredictions pred;
  pred.members = 2;
  pred.rows = 1;
  pred.output_dim = 3;
  pred.mean = {0.0f, -1.0f, 0.0f, 1.0f, 1.0f, 0.0f};
  pred.log_var.assign(6, 0.0f);
  pred.scale = Eigen::Vector3f(model::Normalizer<float>::kMinStd, 1.0f, 1.0f);
  pred.offset = Eigen::Vector3f::Zero();
  std::vector<float> scratch;
  for (float noise : {0.0f, 0.05f}) {
    float information = 0.0f;
    explore::Information(explore::Estimator::kPairwiseKl, pred.ObservationSet(noise, &scratch),
                         &information, 0, 1);
    EXPECT_NEAR(information, std::log(2.0) - std::log(1.0 + std::exp(-2.0)), 1e-5)
        << "noise " << noise;
  }
  pred.scale[0] = 1.0f;  // the same members on a dimension that varied: both count
  float information = 0.0f;
  explore::Information(explore::Estimator::kPairwiseKl, pred.ObservationSet(0.0f, &scratch),
                       &information, 0, 1);
  EXPECT_NEAR(information, std::log(2.0) - std::log(1.0 + std::exp(-2.5)), 1e-5);
}

TEST(RolloutTest, InputsFarOutsideTheDataArePredictedAsAtTheClip) {
  // State 0 barely varied in the data (std 1e-4 around 0.2): a new value 0.03 away is 300 of
  // its standard deviations out. By the model's definition (ensemble.h) the input is clipped at
  // kInputClip of them, so the prediction there equals the one at 0.2 + 10 * 1e-4, through
  // Ensemble::Predict and through the rollouts' packed model alike, and stays finite.
  auto e = model::Ensemble::Create(2, 1, model::EnsembleOptions{}, 5);
  ASSERT_TRUE(e.ok()) << e.status();
  e->mutable_input_normalizer().mutable_mean()[0] = 0.2f;
  e->mutable_input_normalizer().mutable_std()[0] = 1e-4f;
  Eigen::MatrixXf far(1, 2), at_clip(1, 2), action(1, 1);
  far << 0.23f, 0.5f;
  at_clip << 0.2f + model::Ensemble::kInputClip * 1e-4f, 0.5f;
  action << 0.1f;
  std::vector<Eigen::MatrixXf> far_mean, far_var, clip_mean, clip_var;
  ASSERT_TRUE(e->Predict(far, action, &far_mean, &far_var).ok());
  ASSERT_TRUE(e->Predict(at_clip, action, &clip_mean, &clip_var).ok());
  const EnsembleRolloutModel rollout_model(*e);
  MemberPredictions far_pred, clip_pred;
  rollout_model.Evaluate(far.data(), action.data(), 1, &far_pred);
  rollout_model.Evaluate(at_clip.data(), action.data(), 1, &clip_pred);
  for (size_t b = 0; b < far_mean.size(); ++b) {
    EXPECT_TRUE(far_mean[b].allFinite() && far_var[b].allFinite());
    EXPECT_NEAR((far_mean[b] - clip_mean[b]).cwiseAbs().maxCoeff(), 0.0f, 1e-5f) << "member " << b;
  }
  for (size_t i = 0; i < far_pred.mean.size(); ++i) {
    EXPECT_NEAR(far_pred.mean[i], clip_pred.mean[i], 1e-5f);
    EXPECT_NEAR(far_pred.log_var[i], clip_pred.log_var[i], 1e-5f);
  }
}

TEST(RolloutTest, EnsembleModelGivesPredictInRobotUnits) {
  // The rollout model's (mean * scale + offset, exp(log_var) * scale^2) must equal
  // Ensemble::Predict, the reference forward in robot units, for every member.
  model::EnsembleOptions eo;
  eo.hidden_widths = {32, 32};
  auto ensemble = model::Ensemble::Create(3, 2, eo, 12);
  ASSERT_TRUE(ensemble.ok());
  Eigen::VectorXf in_mean(5), in_std(5), out_mean(4), out_std(4);
  in_mean << 0.5, -1, 2, 0.1, 0;
  in_std << 2, 0.5, 1, 3, 0.2;
  out_mean << 0.01, -0.02, 0.3, -1.5;
  out_std << 0.1, 0.2, 0.05, 2.0;
  ensemble->mutable_input_normalizer().mutable_mean() = in_mean;
  ensemble->mutable_input_normalizer().mutable_std() = in_std;
  ensemble->mutable_output_normalizer().mutable_mean() = out_mean;
  ensemble->mutable_output_normalizer().mutable_std() = out_std;

  const int rows = 37;
  Eigen::MatrixXf states = Eigen::MatrixXf::Random(rows, 3) * 2.0f;
  Eigen::MatrixXf actions = Eigen::MatrixXf::Random(rows, 2);
  std::vector<Eigen::MatrixXf> means, variances;
  ASSERT_TRUE(ensemble->Predict(states, actions, &means, &variances).ok());

  const EnsembleRolloutModel rollout(*ensemble);
  ASSERT_EQ(rollout.members(), 5);
  RowMatrixXf s = states, a = actions;
  MemberPredictions pred;
  rollout.Evaluate(s.data(), a.data(), rows, &pred);
  for (int b = 0; b < 5; ++b) {
    for (int r = 0; r < rows; ++r) {
      for (int k = 0; k < 4; ++k) {
        const size_t at = (static_cast<size_t>(b) * rows + r) * 4 + k;
        const float mean = pred.mean[at] * pred.scale[k] + pred.offset[k];
        const float var = std::exp(pred.log_var[at]) * pred.scale[k] * pred.scale[k];
        EXPECT_NEAR(mean, means[b](r, k), 1e-5f * (1.0f + std::abs(means[b](r, k))));
        EXPECT_NEAR(var, variances[b](r, k), 1e-4f * variances[b](r, k));
      }
    }
  }
  EXPECT_GT(rollout.FlopsPerMemberRow(), 0.0);
}

// Counts the rows of every Evaluate call and passes it on.
class RowCountingModel final : public RolloutModel {
 public:
  explicit RowCountingModel(const RolloutModel& inner) : inner_(inner) {}
  int members() const override { return inner_.members(); }
  int state_dim() const override { return inner_.state_dim(); }
  int action_dim() const override { return inner_.action_dim(); }
  void Evaluate(const float* states, const float* actions, int rows,
                MemberPredictions* out) const override {
    rows_.push_back(rows);
    inner_.Evaluate(states, actions, rows, out);
  }
  const std::vector<int>& rows() const { return rows_; }

 private:
  const RolloutModel& inner_;
  mutable std::vector<int> rows_;
};

class RolloutSimulationTest : public ::testing::TestWithParam<Propagation> {};

TEST_P(RolloutSimulationTest, MatchesEachParticleSimulatedAlone) {
  // Reference: the definition of the score (rollout.h; Chua et al. 2018 for the propagation),
  // simulated one particle at a time with one-row model calls: particle p of candidate n starts
  // at the initial state; at step t it takes the candidate's action, every member is evaluated
  // there, the information gain is the estimator over those members, the next state is drawn
  // from member m(t, p) with noise eps(t, p), the reward is that member's mean. The draws are
  // taken from Rng(seed) in the documented order (per step, per particle: the member for TS1,
  // then state_dim normals). The particle's survival falls by its member's termination
  // probability each step; the step's value is weighted by the survival before it, and
  // terminal_value is paid on the probability of ending there. The batched rollout evaluates
  // the first step once per candidate; this checks that sharing against the
  // particle-by-particle definition.
  model::EnsembleOptions eo;
  eo.hidden_widths = {24, 24};
  auto ensemble = model::Ensemble::Create(3, 2, eo, 31);
  ASSERT_TRUE(ensemble.ok());
  // Termination probabilities around one half, so that survival weighs in.
  const int head_bias = ensemble->bias_offset(ensemble->num_layers() - 1) + 2 * ensemble->output_dim();
  ensemble->mutable_params().row(head_bias).setConstant(0.3f);
  const EnsembleRolloutModel model(*ensemble);
  const RowCountingModel counting(model);
  explore::ObjectiveOptions objective;  // learned reward and pairwise-KL information
  objective.reward_weight = 0.7;
  objective.information_weight = 1.3;
  objective.discount = 0.9;
  objective.terminal_value = -2.5;
  RolloutOptions options;
  options.horizon = 4;
  options.particles = 4;
  options.propagation = GetParam();
  const int candidates = 3, sd = 3, ad = 2, od = sd + 1, nb = model.members();
  const uint64_t seed = 17;
  const float initial[sd] = {0.4f, -0.3f, 1.1f};
  Rng draws(5);
  std::vector<float> sequences(candidates * options.horizon * ad);
  for (float& u : sequences) u = static_cast<float>(2.0 * draws.Uniform() - 1.0);

  std::vector<float> scores(candidates);
  RolloutWorkspace ws;
  ScoreSequences(counting, objective, options, initial, sequences.data(), candidates, seed,
                 scores.data(), &ws);
  const std::vector<int> expected_rows = {candidates, candidates * options.particles,
                                          candidates * options.particles,
                                          candidates * options.particles};
  EXPECT_EQ(counting.rows(), expected_rows);

  Rng rng(seed);
  std::vector<int> member(options.horizon * options.particles);
  std::vector<double> eps(options.horizon * options.particles * sd);
  for (int t = 0; t < options.horizon; ++t) {
    for (int p = 0; p < options.particles; ++p) {
      member[t * options.particles + p] =
          GetParam() == Propagation::kTsInf ? p % nb : static_cast<int>(rng.UniformInt(nb));
      for (int k = 0; k < sd; ++k) eps[(t * options.particles + p) * sd + k] = rng.Normal();
    }
  }
  MemberPredictions pred;
  for (int n = 0; n < candidates; ++n) {
    double score = 0.0;
    for (int p = 0; p < options.particles; ++p) {
      std::vector<float> s(initial, initial + sd);
      double discount = 1.0, survival = 1.0;
      for (int t = 0; t < options.horizon; ++t) {
        const float* a = &sequences[(n * options.horizon + t) * ad];
        model.Evaluate(s.data(), a, 1, &pred);
        float information = 0.0f;
        explore::Information(objective.estimator, pred.StateDeltaSet(), &information);
        const int m = member[t * options.particles + p];
        const float* mu = &pred.mean[static_cast<size_t>(m) * od];
        const float* lv = &pred.log_var[static_cast<size_t>(m) * od];
        for (int k = 0; k < sd; ++k) {
          s[k] += static_cast<float>(
              (mu[k] + std::exp(0.5 * lv[k]) * eps[(t * options.particles + p) * sd + k]) *
                  pred.scale[k] + pred.offset[k]);
        }
        const double reward = mu[sd] * pred.scale[sd] + pred.offset[sd];
        const double ends = 1.0 / (1.0 + std::exp(-pred.term_logit[m]));
        score += discount * (survival * (objective.reward_weight * reward +
                                         objective.information_weight * information) +
                             survival * ends * objective.terminal_value);
        survival *= 1.0 - ends;
        discount *= objective.discount;
      }
    }
    score /= options.particles;
    EXPECT_NEAR(scores[n], score, 1e-5 * (1.0 + std::abs(score))) << "candidate " << n;
  }
}

INSTANTIATE_TEST_SUITE_P(Propagations, RolloutSimulationTest,
                         ::testing::Values(Propagation::kTsInf, Propagation::kTs1),
                         [](const ::testing::TestParamInfo<Propagation>& info) {
                           return info.param == Propagation::kTsInf ? "TsInf" : "Ts1";
                         });

TEST(RolloutTest, OptionsValidateNamesTheField) {
  RolloutOptions options;
  options.horizon = 0;
  EXPECT_EQ(options.Validate().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(options.Validate().message().find("horizon is 0"), std::string::npos);
  options.horizon = 5;
  options.particles = -2;
  EXPECT_NE(options.Validate().message().find("particles is -2"), std::string::npos);
}

}  // namespace
}  // namespace foray::plan
