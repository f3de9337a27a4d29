// CEM and iCEM (Pinneri et al. 2020, "Sample-efficient Cross-Entropy Method for Real-time
// Planning", CoRL): minima of standard test functions, coloured noise, limits, warm start,
// best-seen result, deadlines and errors.
#include "core/plan/cem.h"

#include <cmath>
#include <complex>
#include <vector>

#include "core/util/random.h"
#include "gtest/gtest.h"

namespace foray::plan {
namespace {

constexpr double kPi = 3.14159265358979323846;

// Rosenbrock's function, sum_i 100 (x_{i+1} - x_i^2)^2 + (1 - x_i)^2: global minimum 0 at
// x = (1, ..., 1) (Rosenbrock 1960; the standard optimisation test function).
double Rosenbrock(const float* x, int d) {
  double f = 0.0;
  for (int i = 0; i + 1 < d; ++i) {
    const double a = x[i + 1] - static_cast<double>(x[i]) * x[i], b = 1.0 - x[i];
    f += 100.0 * a * a + b * b;
  }
  return f;
}

// Rastrigin's function, 10 d + sum_i (x_i^2 - 10 cos(2 pi x_i)): global minimum 0 at the origin,
// a local minimum near every integer point (Rastrigin 1974; standard domain [-5.12, 5.12]^d).
double Rastrigin(const float* x, int d) {
  double f = 10.0 * d;
  for (int i = 0; i < d; ++i) f += static_cast<double>(x[i]) * x[i] - 10.0 * std::cos(2 * kPi * x[i]);
  return f;
}

// Minimises f over a box in d dimensions as one step of a d-wide "action".
template <typename F>
CemResult Minimize(F f, int d, float bound, const CemOptions& options) {
  const SequenceLimits limits = SequenceLimits::Box(Eigen::VectorXf::Constant(d, -bound),
                                                    Eigen::VectorXf::Constant(d, bound));
  ScoreFunction score = [&](const float* seqs, int n, float* scores) {
    for (int i = 0; i < n; ++i) scores[i] = static_cast<float>(-f(seqs + i * d, d));
  };
  absl::StatusOr<CemResult> result = MaximizeCem(options, limits, score);
  EXPECT_TRUE(result.ok()) << result.status();
  return *result;
}

CemOptions PlainCem() {
  CemOptions o;
  o.horizon = 1;
  o.noise_beta = 0.0;
  o.keep_fraction = 0.0;
  o.population_decay = 1.0;
  o.momentum = 0.0;
  return o;
}

CemOptions ICem() {
  CemOptions o;
  o.horizon = 1;
  return o;
}

class TestFunctionTest : public ::testing::TestWithParam<bool> {
 protected:
  CemOptions Options() const { return GetParam() ? ICem() : PlainCem(); }
};

// Smoothing of the mean and spread between iterations is part of the method (de Boer et al.
// 2005, "A Tutorial on the Cross-Entropy Method", which suggests smoothing factors of 0.4-0.9;
// quoted from memory). A diagonal Gaussian cannot align with Rosenbrock's curved valley, so the
// spread collapses to the valley's width and progress along it is slow: with slow smoothing
// (momentum 0.9) both variants reached f < 0.02 in 20 of 20 seeds in 2-D (measured during
// development); in 3-D and above they stall near f = 0.3-2.5 (a known weakness of CEM on
// ill-conditioned problems), so the check stays in two dimensions.
TEST_P(TestFunctionTest, RosenbrockTwoDimensions) {
  CemOptions o = Options();
  o.population = 200;
  o.elites = 20;
  o.iterations = 400;
  o.momentum = 0.9;
  o.seed = 3;
  const CemResult r = Minimize(Rosenbrock, 2, 2.048f, o);
  EXPECT_NEAR(r.best(0, 0), 1.0, 0.15);
  EXPECT_NEAR(r.best(0, 1), 1.0, 0.3);
  EXPECT_LT(Rosenbrock(r.best.data(), 2), 0.02);
}

TEST_P(TestFunctionTest, RastriginTwoDimensions) {
  CemOptions o = Options();
  o.population = 300;
  o.elites = 30;
  o.iterations = 60;
  o.seed = 5;
  const CemResult r = Minimize(Rastrigin, 2, 5.12f, o);
  for (int i = 0; i < 2; ++i) EXPECT_NEAR(r.best(0, i), 0.0, 0.01) << "x" << i;
  EXPECT_LT(Rastrigin(r.best.data(), 2), 1e-2);
}

TEST_P(TestFunctionTest, RastriginFourDimensions) {
  CemOptions o = Options();
  o.population = 1000;
  o.elites = 100;
  o.iterations = 100;
  o.seed = 6;
  const CemResult r = Minimize(Rastrigin, 4, 5.12f, o);
  for (int i = 0; i < 4; ++i) EXPECT_NEAR(r.best(0, i), 0.0, 0.01) << "x" << i;
  EXPECT_LT(Rastrigin(r.best.data(), 4), 1e-2);
}

// In six dimensions plain CEM still finds the global minimum (20 of 20 seeds in development),
// while iCEM's kept elites and shrinking population, made for small real-time budgets, settle
// in a neighbouring local minimum (1 of 20): only plain CEM is held to it.
TEST(CemTestFunctionTest, PlainCemRastriginSixDimensions) {
  CemOptions o = PlainCem();
  o.population = 1000;
  o.elites = 100;
  o.iterations = 100;
  o.seed = 6;
  const CemResult r = Minimize(Rastrigin, 6, 5.12f, o);
  for (int i = 0; i < 6; ++i) EXPECT_NEAR(r.best(0, i), 0.0, 0.01) << "x" << i;
  EXPECT_LT(Rastrigin(r.best.data(), 6), 1e-2);
}

INSTANTIATE_TEST_SUITE_P(PlainAndImproved, TestFunctionTest, ::testing::Values(false, true),
                         [](const auto& info) { return info.param ? "iCEM" : "CEM"; });

TEST(ColoredNoiseTest, WhiteNoiseHasIdentityCovariance) {
  // beta = 0 must give independent unit-variance steps: the sample covariance of 40,000
  // sequences is I within sampling error (standard error of a covariance entry ~ 1/sqrt(n)).
  const int h = 12, n = 40000;
  const ColoredNoise noise(h, 0.0);
  Rng rng(2);
  Eigen::MatrixXd cov = Eigen::MatrixXd::Zero(h, h);
  std::vector<float> x(h);
  for (int i = 0; i < n; ++i) {
    noise.Sample([&] { return rng.Normal(); }, x.data(), 1);
    Eigen::Map<Eigen::VectorXf> v(x.data(), h);
    cov += (v.cast<double>() * v.cast<double>().transpose());
  }
  cov /= n;
  EXPECT_LT((cov - Eigen::MatrixXd::Identity(h, h)).cwiseAbs().maxCoeff(), 0.03);
}

TEST(ColoredNoiseTest, PowerSpectrumFallsAsOneOverFToTheBeta) {
  // Coloured noise of exponent beta has power S(f) proportional to f^-beta (the definition used
  // by Pinneri et al. 2020). Averaged periodogram of 20,000 sequences, slope of ln S against
  // ln f over the interior frequencies, fitted by least squares: -beta within 0.1.
  const int h = 32, n = 20000;
  for (double beta : {1.0, 2.0, 3.0}) {
    const ColoredNoise noise(h, beta);
    Rng rng(11);
    std::vector<double> power(h / 2 + 1, 0.0);
    std::vector<float> x(h);
    double variance = 0.0;
    for (int i = 0; i < n; ++i) {
      noise.Sample([&] { return rng.Normal(); }, x.data(), 1);
      for (int t = 0; t < h; ++t) variance += static_cast<double>(x[t]) * x[t] / (n * h);
      for (int k = 1; k <= h / 2; ++k) {
        std::complex<double> c = 0;
        for (int t = 0; t < h; ++t) c += static_cast<double>(x[t]) * std::polar(1.0, -2 * kPi * k * t / h);
        power[k] += std::norm(c) / n;
      }
    }
    EXPECT_NEAR(variance, 1.0, 0.02) << "beta " << beta;  // unit variance per step
    double sx = 0, sy = 0, sxx = 0, sxy = 0;
    int m = 0;
    for (int k = 1; k < h / 2; ++k, ++m) {
      const double lx = std::log(static_cast<double>(k) / h), ly = std::log(power[k]);
      sx += lx;
      sy += ly;
      sxx += lx * lx;
      sxy += lx * ly;
    }
    const double slope = (m * sxy - sx * sy) / (m * sxx - sx * sx);
    EXPECT_NEAR(slope, -beta, 0.1) << "beta " << beta;
  }
}

TEST(SequenceLimitsTest, ProjectionKeepsBoundsAndRateLimitWithPreviousAction) {
  SequenceLimits limits = SequenceLimits::Box(Eigen::Vector2f(-1, 0), Eigen::Vector2f(1, 5));
  limits.max_step = Eigen::Vector2f(0.1f, 0.0f);  // second action: no rate limit
  limits.previous = Eigen::Vector2f(0.5f, 2.0f);
  ASSERT_TRUE(limits.Validate().ok());
  const int h = 30;
  Rng rng(7);
  for (int trial = 0; trial < 200; ++trial) {
    std::vector<float> seq(h * 2);
    for (float& v : seq) v = static_cast<float>(20.0 * rng.Normal());
    if (trial == 0) seq[3] = std::nanf("");
    limits.Project(seq.data(), h);
    float before = limits.previous[0];
    for (int t = 0; t < h; ++t) {
      EXPECT_GE(seq[2 * t], -1.0f);
      EXPECT_LE(seq[2 * t], 1.0f);
      // Exact arithmetic, as a client checking in double would.
      EXPECT_LE(std::abs(static_cast<double>(seq[2 * t]) - before), 0.1f) << "t " << t;
      EXPECT_GE(seq[2 * t + 1], 0.0f);
      EXPECT_LE(seq[2 * t + 1], 5.0f);
      before = seq[2 * t];
    }
  }
}

TEST(CemTest, ReturnsTheBestCandidateEverScored) {
  // The score is noisy, so the final distribution's mean is not the best seen; the result must
  // be exactly the highest-scoring candidate over all iterations.
  CemOptions o;
  o.horizon = 3;
  o.population = 50;
  o.elites = 5;
  o.iterations = 6;
  const SequenceLimits limits = SequenceLimits::Box(Eigen::VectorXf::Constant(1, -1),
                                                    Eigen::VectorXf::Constant(1, 1));
  Rng noise(13);
  float best_seen = -1e30f;
  std::vector<float> best_sequence;
  int scored = 0;
  ScoreFunction score = [&](const float* seqs, int n, float* scores) {
    for (int i = 0; i < n; ++i) {
      scores[i] = -std::abs(seqs[i * 3] - 0.3f) + static_cast<float>(0.5 * noise.Normal());
      if (scores[i] > best_seen) {
        best_seen = scores[i];
        best_sequence.assign(seqs + i * 3, seqs + i * 3 + 3);
      }
    }
    scored += n;
  };
  absl::StatusOr<CemResult> r = MaximizeCem(o, limits, score);
  ASSERT_TRUE(r.ok());
  EXPECT_EQ(r->best_score, best_seen);
  for (int t = 0; t < 3; ++t) EXPECT_EQ(r->best(t, 0), best_sequence[t]);
  EXPECT_EQ(r->evaluations, scored);
  EXPECT_EQ(r->iterations, 6);
}

TEST(CemTest, PopulationDecaysAndElitesAreKept) {
  // N_i = max(N decay^-i, 2K) fresh samples, plus round(keep * K) kept elites from iteration 1
  // on, plus the mean in the last iteration (Pinneri et al. 2020, Algorithm 1).
  CemOptions o;
  o.horizon = 2;
  o.population = 100;
  o.elites = 10;
  o.iterations = 4;
  o.population_decay = 2.0;
  o.keep_fraction = 0.3;
  const SequenceLimits limits = SequenceLimits::Box(Eigen::VectorXf::Constant(1, -1),
                                                    Eigen::VectorXf::Constant(1, 1));
  std::vector<int> counts;
  std::vector<std::vector<float>> first_rows;
  ScoreFunction score = [&](const float* seqs, int n, float* scores) {
    counts.push_back(n);
    first_rows.emplace_back(seqs, seqs + 2 * 3);
    for (int i = 0; i < n; ++i) scores[i] = -(seqs[2 * i] * seqs[2 * i]);
  };
  std::vector<std::vector<float>> elites_before;
  absl::StatusOr<CemResult> r = MaximizeCem(o, limits, score);
  ASSERT_TRUE(r.ok());
  EXPECT_EQ(counts, (std::vector<int>{100, 3 + 50, 3 + 25, 3 + 20 + 1}));
  ASSERT_EQ(r->next.elites.size(), 10u);
}

TEST(CemTest, WarmStartIsShiftedByTheExecutedSteps) {
  // A warm start whose rows are 0.1, 0.2, ..., 0.5 shifted by 2 gives mean rows
  // 0.3, 0.4, 0.5, 0.5, 0.5; with a tiny spread every fresh sample sits on that mean, and the
  // kept elites (shifted the same way) come first in the population.
  CemOptions o;
  o.horizon = 5;
  o.population = 20;
  o.elites = 10;
  o.iterations = 1;
  o.keep_fraction = 0.2;  // 2 elites kept
  o.initial_std_fraction = 1e-6;
  o.min_std_fraction = 0.0;
  const SequenceLimits limits = SequenceLimits::Box(Eigen::VectorXf::Constant(1, -1),
                                                    Eigen::VectorXf::Constant(1, 1));
  CemWarmStart warm;
  warm.mean.resize(5, 1);
  warm.mean << 0.1, 0.2, 0.3, 0.4, 0.5;
  RowMatrixXf elite(5, 1);
  elite << -0.5, -0.4, -0.3, -0.2, -0.1;
  warm.elites = {elite, elite * 2.0f, elite * 0.5f};
  std::vector<float> population;
  ScoreFunction score = [&](const float* seqs, int n, float* scores) {
    population.assign(seqs, seqs + 5 * n);
    for (int i = 0; i < n; ++i) scores[i] = 0.0f;
  };
  absl::StatusOr<CemResult> r = MaximizeCem(o, limits, score, {.warm_start = &warm, .shift = 2});
  ASSERT_TRUE(r.ok());
  ASSERT_EQ(population.size(), 5u * (2 + 20 + 1));
  const float kept0[5] = {-0.3f, -0.2f, -0.1f, -0.1f, -0.1f};
  for (int t = 0; t < 5; ++t) {
    EXPECT_FLOAT_EQ(population[t], kept0[t]);
    EXPECT_FLOAT_EQ(population[5 + t], 2.0f * kept0[t]);
  }
  const float shifted[5] = {0.3f, 0.4f, 0.5f, 0.5f, 0.5f};
  for (int n = 2; n < 23; ++n) {
    for (int t = 0; t < 5; ++t) EXPECT_NEAR(population[5 * n + t], shifted[t], 1e-4) << n;
  }
}

TEST(CemTest, DeadlineStopsBeforeAnIterationThatWouldNotFit) {
  // A clock that advances 0.1 ms per scored candidate. Iterations score 100, 80 + 3, 64 + 3,
  // 51 + 3, ... candidates (decay 1.25, 3 kept elites): 10, 8.3, 6.7, 5.4 ms. With the deadline
  // at 30 ms the optimiser runs three (ending at 10, 18.3, 25.0 ms) and skips the fourth, which
  // it predicts would end at 30.4 ms.
  CemOptions o;
  o.horizon = 4;
  o.population = 100;
  o.elites = 10;
  o.iterations = 10;
  const SequenceLimits limits = SequenceLimits::Box(Eigen::VectorXf::Constant(1, -1),
                                                    Eigen::VectorXf::Constant(1, 1));
  absl::Time clock = absl::UnixEpoch();
  ScoreFunction score = [&](const float* seqs, int n, float* scores) {
    clock += absl::Microseconds(100) * n;
    for (int i = 0; i < n; ++i) scores[i] = -std::abs(seqs[4 * i]);
  };
  const absl::Time deadline = absl::UnixEpoch() + absl::Milliseconds(30);
  absl::StatusOr<CemResult> r =
      MaximizeCem(o, limits, score, {.deadline = deadline, .now = [&] { return clock; }});
  ASSERT_TRUE(r.ok());
  EXPECT_EQ(r->iterations, 3);
  EXPECT_LE(clock, deadline);
  EXPECT_TRUE(std::isfinite(r->best_score));
}

TEST(CemTest, FirstIterationRunsEvenPastTheDeadline) {
  CemOptions o;
  o.horizon = 2;
  const SequenceLimits limits = SequenceLimits::Box(Eigen::VectorXf::Constant(1, -1),
                                                    Eigen::VectorXf::Constant(1, 1));
  ScoreFunction score = [](const float*, int n, float* scores) {
    for (int i = 0; i < n; ++i) scores[i] = 0.0f;
  };
  absl::StatusOr<CemResult> r = MaximizeCem(o, limits, score, {.deadline = absl::InfinitePast()});
  ASSERT_TRUE(r.ok());
  EXPECT_EQ(r->iterations, 1);
}

TEST(CemTest, NonFiniteScoresEverywhereAreAnError) {
  CemOptions o;
  o.horizon = 2;
  o.iterations = 2;
  const SequenceLimits limits = SequenceLimits::Box(Eigen::VectorXf::Constant(1, -1),
                                                    Eigen::VectorXf::Constant(1, 1));
  ScoreFunction score = [](const float*, int n, float* scores) {
    for (int i = 0; i < n; ++i) scores[i] = std::nanf("");
  };
  absl::StatusOr<CemResult> r = MaximizeCem(o, limits, score);
  EXPECT_EQ(r.status().code(), absl::StatusCode::kFailedPrecondition);
}

TEST(CemTest, BadOptionsAndLimitsNameTheField) {
  CemOptions o;
  o.elites = 300;
  EXPECT_EQ(o.Validate().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(o.Validate().message().find("elites is 300"), std::string::npos);
  o = CemOptions();
  o.keep_fraction = 1.5;
  EXPECT_NE(o.Validate().message().find("keep_fraction is 1.5"), std::string::npos);
  o = CemOptions();
  o.noise_beta = -1;
  EXPECT_NE(o.Validate().message().find("noise_beta"), std::string::npos);

  SequenceLimits limits = SequenceLimits::Box(Eigen::Vector2f(-1, 2), Eigen::Vector2f(1, 1));
  EXPECT_NE(limits.Validate().message().find("action 1 has min 2 and max 1"), std::string::npos);
  limits = SequenceLimits::Box(Eigen::Vector2f(-1, -1), Eigen::Vector2f(1, 1));
  limits.previous = Eigen::Vector2f(0, 3);
  EXPECT_NE(limits.Validate().message().find("previous_action[1] is 3"), std::string::npos);
  limits.previous.resize(0);
  limits.max_step = Eigen::Vector3f(1, 1, 1);
  EXPECT_NE(limits.Validate().message().find("max_step has 3 values"), std::string::npos);
}

}  // namespace
}  // namespace foray::plan
