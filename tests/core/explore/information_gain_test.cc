// Information-gain estimators against scipy (entropies, quadrature of the exact mutual
// information and of the order-2 Renyi entropies) and against the bounds of Kolchinsky &
// Tracey 2017, Entropy 19(7):361.
#include "core/explore/information_gain.h"

#include <cmath>
#include <cstring>
#include <vector>

#include "gtest/gtest.h"
#include "core/util/random.h"
#include "tests/testing/reference.h"
#include "tests/testing/simd_targets.h"

namespace foray::explore {
namespace {

// B Gaussians at one row, dim d: member b's values at [b * d + k].
struct OneRow {
  std::vector<double> mean, log_var;
  int members = 0, dim = 0;
  GaussianSet<double> Set() const {
    GaussianSet<double> s;
    s.members = members;
    s.rows = 1;
    s.dim = dim;
    s.mean = mean.data();
    s.log_var = log_var.data();
    s.member_stride = dim;
    s.row_stride = dim;
    return s;
  }
};

class InformationReferenceTest : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    const auto dir = testing::FreshDir("information");
    std::string output;
    const int status = testing::RunPython("tests/core/explore/information_reference.py",
                                          "--out " + dir.string() + " --seed 11", &output);
    ASSERT_EQ(status, 0) << output;
    arrays_ = new std::map<std::string, Eigen::MatrixXd>(testing::LoadArrays(dir));
  }
  static void TearDownTestSuite() { delete arrays_; }

  static OneRow Case1d(int i) {
    const Eigen::MatrixXd& c = arrays_->at("cases_1d");
    OneRow row;
    row.members = static_cast<int>(c(i, 0));
    row.dim = 1;
    for (int b = 0; b < row.members; ++b) {
      row.mean.push_back(c(i, 1 + b));
      row.log_var.push_back(std::log(c(i, 6 + b)));
    }
    return row;
  }

  static std::map<std::string, Eigen::MatrixXd>* arrays_;
};
std::map<std::string, Eigen::MatrixXd>* InformationReferenceTest::arrays_ = nullptr;

TEST_F(InformationReferenceTest, EntropyMatchesScipyMultivariateNormal) {
  // Reference: scipy.stats.multivariate_normal(mean, diag(var)).entropy().
  const Eigen::MatrixXd& c = arrays_->at("cases_3d");
  const Eigen::MatrixXd& h = arrays_->at("entropy_3d");
  ASSERT_GT(c.rows(), 0);
  for (int i = 0; i < c.rows(); ++i) {
    OneRow row;
    row.members = 1;
    row.dim = 3;
    for (int k = 0; k < 3; ++k) {
      row.mean.push_back(c(i, k));
      row.log_var.push_back(std::log(c(i, 3 + k)));
    }
    double entropy = 0.0;
    GaussianEntropy(row.Set(), &entropy);
    EXPECT_NEAR(entropy, h(i, 0), 1e-10) << "case " << i;
  }
}

TEST_F(InformationReferenceTest, ExactInformationLiesBetweenBhattacharyyaAndKlBounds) {
  // Reference: I by scipy.integrate.quad; I_BD <= I <= I_KL (Kolchinsky & Tracey 2017, eq. 10).
  const Eigen::MatrixXd& exact = arrays_->at("exact_1d");
  ASSERT_EQ(exact.rows(), 15);
  for (int i = 0; i < exact.rows(); ++i) {
    const OneRow row = Case1d(i);
    double kl = 0.0, bd = 0.0;
    PairwiseKlInformation(row.Set(), &kl);
    PairwiseBhattacharyyaInformation(row.Set(), &bd);
    const double mi = exact(i, 1);
    EXPECT_LE(bd, mi + 1e-9) << "case " << i;
    EXPECT_GE(kl, mi - 1e-9) << "case " << i;
    EXPECT_LE(kl, std::log(row.members) + 1e-12) << "case " << i;
    EXPECT_GE(bd, 0.0) << "case " << i;
  }
}

TEST_F(InformationReferenceTest, MonteCarloAgreesWithQuadrature) {
  // 10^6 samples: within 1% relative or 0.002 nats, whichever is larger.
  const Eigen::MatrixXd& exact = arrays_->at("exact_1d");
  for (int i = 0; i < exact.rows(); ++i) {
    const OneRow row = Case1d(i);
    double mc = 0.0;
    MonteCarloInformation(row.Set(), 1000000, 100 + i, &mc);
    const double mi = exact(i, 1);
    EXPECT_NEAR(mc, mi, std::max(0.01 * std::abs(mi), 0.002)) << "case " << i;
  }
}

TEST_F(InformationReferenceTest, JensenRenyi2MatchesQuadrature) {
  // Reference: JR2 = -ln int p^2 + (1/B) sum_b ln int N_b^2, integrals by scipy quad.
  const Eigen::MatrixXd& exact = arrays_->at("exact_1d");
  for (int i = 0; i < exact.rows(); ++i) {
    const OneRow row = Case1d(i);
    double jr = 0.0;
    JensenRenyi2Information(row.Set(), &jr);
    EXPECT_NEAR(jr, exact(i, 2), 1e-8 + 1e-8 * std::abs(exact(i, 2))) << "case " << i;
  }
}

// Random sets of `rows` rows, B members, d dims, layout (B, rows, d).
struct RandomSet {
  RandomSet(int members, int rows, int dim, double spread, uint64_t seed, bool identical = false)
      : members(members), rows(rows), dim(dim) {
    Rng rng(seed);
    mean.resize(static_cast<size_t>(members) * rows * dim);
    log_var.resize(mean.size());
    for (int b = 0; b < members; ++b) {
      for (size_t i = 0; i < static_cast<size_t>(rows) * dim; ++i) {
        const size_t at = b * static_cast<size_t>(rows) * dim + i;
        if (identical && b > 0) {
          mean[at] = mean[i];
          log_var[at] = log_var[i];
        } else {
          mean[at] = spread * rng.Normal();
          log_var[at] = -3.0 + 4.0 * rng.Uniform();
        }
      }
    }
  }
  template <typename Scalar>
  GaussianSet<Scalar> Set(const std::vector<Scalar>& m, const std::vector<Scalar>& lv) const {
    GaussianSet<Scalar> s;
    s.members = members;
    s.rows = rows;
    s.dim = dim;
    s.mean = m.data();
    s.log_var = lv.data();
    s.member_stride = static_cast<std::ptrdiff_t>(rows) * dim;
    s.row_stride = dim;
    return s;
  }
  int members, rows, dim;
  std::vector<double> mean, log_var;
};

TEST(InformationGainTest, IdenticalMembersGiveZeroForEveryEstimator) {
  // I = 0 when the mixture equals each component (definition of mutual information).
  const RandomSet r(5, 40, 4, 2.0, 3, /*identical=*/true);
  const GaussianSet<double> set = r.Set(r.mean, r.log_var);
  ASSERT_TRUE(set.Validate().ok());
  for (Estimator e : {Estimator::kPairwiseKl, Estimator::kPairwiseBhattacharyya,
                      Estimator::kJensenRenyi2, Estimator::kMonteCarlo}) {
    std::vector<double> out(r.rows, -1.0);
    Information(e, set, out.data(), 2000, 5);
    for (int i = 0; i < r.rows; ++i) EXPECT_NEAR(out[i], 0.0, 1e-12) << EstimatorName(e) << " row " << i;
  }
}

TEST(InformationGainTest, PairwiseBoundsStayWithinZeroAndLogB) {
  // 0 <= I_D <= ln B for any pairwise distance D (Kolchinsky & Tracey 2017), over random sets
  // from nearly identical to far apart members.
  for (int members : {2, 3, 5, 8}) {
    for (double spread : {0.01, 1.0, 100.0}) {
      const RandomSet r(members, 50, 6, spread, 17 + members);
      const GaussianSet<double> set = r.Set(r.mean, r.log_var);
      std::vector<double> kl(r.rows), bd(r.rows);
      PairwiseKlInformation(set, kl.data());
      PairwiseBhattacharyyaInformation(set, bd.data());
      for (int i = 0; i < r.rows; ++i) {
        EXPECT_GE(bd[i], 0.0);
        EXPECT_LE(bd[i], kl[i] + 1e-12);  // BD <= KL pairwise, so I_BD <= I_KL
        EXPECT_LE(kl[i], std::log(members) + 1e-12);
      }
      if (spread == 100.0) {
        // Far-apart members: both bounds reach ln B (every cross term vanishes).
        for (int i = 0; i < r.rows; ++i) EXPECT_NEAR(bd[i], std::log(members), 1e-3);
      }
    }
  }
}

// The float estimators run on SIMD kernels (information_kernels.h); the double ones, checked
// against scipy above, are their reference. On every target the machine runs: the float value
// within 1e-4 absolute + 1e-4 relative of the double one (float rounding over sums of up to
// 8 x 7 pairs x 15 dimensions; a tolerance of our own choosing), the pairwise bounds in order,
// zero for identical members, and each row's bits independent of the other rows in the call.
TEST(InformationGainTest, FloatKernelsOnEveryTargetAgreeWithDoubleRowByRow) {
  const Estimator estimators[] = {Estimator::kPairwiseKl, Estimator::kPairwiseBhattacharyya,
                                  Estimator::kJensenRenyi2};
  struct Case {
    int members, rows, dim;
    double spread;
  };
  const Case cases[] = {{2, 37, 1, 1.0}, {5, 53, 4, 0.7}, {8, 19, 15, 0.05}, {3, 70, 6, 20.0}};
  testing::ForEachSimdTarget([&] {
    for (const Case& c : cases) {
      const RandomSet r(c.members, c.rows, c.dim, c.spread, 41 + c.members);
      std::vector<float> mf(r.mean.begin(), r.mean.end());
      std::vector<float> lf(r.log_var.begin(), r.log_var.end());
      const GaussianSet<double> sd = r.Set(r.mean, r.log_var);
      const GaussianSet<float> sf = r.Set(mf, lf);
      std::vector<std::vector<float>> values;
      for (Estimator e : estimators) {
        SCOPED_TRACE(::testing::Message() << EstimatorName(e) << " B=" << c.members
                                        << " d=" << c.dim << " spread=" << c.spread);
        std::vector<double> d(r.rows);
        std::vector<float> f(r.rows, -1.0f);
        Information(e, sd, d.data());
        Information(e, sf, f.data());
        for (int i = 0; i < r.rows; ++i) {
          ASSERT_NEAR(f[i], d[i], 1e-4 + 1e-4 * d[i]) << "row " << i;
          ASSERT_GE(f[i], 0.0f);
          // <= ln B: for the pairwise ones Kolchinsky & Tracey 2017; for JR2, dropping the
          // off-diagonal overlaps and Jensen's inequality on -ln give the same bound.
          ASSERT_LE(f[i], std::log(static_cast<float>(c.members)) + 1e-5f);
        }
        // Rows 3.. alone: the same bits as in the full call.
        GaussianSet<float> tail = sf;
        tail.rows = r.rows - 3;
        tail.mean += 3 * tail.row_stride;
        tail.log_var += 3 * tail.row_stride;
        std::vector<float> g(tail.rows);
        Information(e, tail, g.data());
        ASSERT_EQ(std::memcmp(g.data(), f.data() + 3, g.size() * sizeof(float)), 0);
        values.push_back(f);
      }
      // I_BD <= I_KL (Kolchinsky & Tracey 2017, eq. 10), up to float rounding.
      for (int i = 0; i < r.rows; ++i) ASSERT_LE(values[1][i], values[0][i] + 1e-5f) << "row " << i;
    }
    const RandomSet same(5, 21, 4, 2.0, 3, /*identical=*/true);
    std::vector<float> mf(same.mean.begin(), same.mean.end());
    std::vector<float> lf(same.log_var.begin(), same.log_var.end());
    for (Estimator e : estimators) {
      std::vector<float> f(same.rows, -1.0f);
      Information(e, same.Set(mf, lf), f.data());
      for (int i = 0; i < same.rows; ++i) ASSERT_NEAR(f[i], 0.0f, 1e-5f) << EstimatorName(e);
    }
  });
}

TEST(InformationGainTest, ValidateNamesTheField) {
  GaussianSet<float> s;
  s.members = 0;
  EXPECT_EQ(s.Validate().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(s.Validate().message().find("members"), std::string::npos);
  float x = 0;
  s.members = 2;
  s.rows = 1;
  s.dim = 3;
  s.mean = s.log_var = &x;
  s.row_stride = 2;
  EXPECT_NE(s.Validate().message().find("row_stride"), std::string::npos);
}

}  // namespace
}  // namespace foray::explore
