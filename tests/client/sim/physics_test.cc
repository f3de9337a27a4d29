// The simulated robots' physics against scipy's solve_ivp and textbook facts.
#include "client/sim/physics.h"

#include <cmath>

#include "Eigen/Eigenvalues"
#include "gtest/gtest.h"
#include "tests/testing/reference.h"

namespace foray::sim {
namespace {

constexpr double kPi = 3.14159265358979323846;

Eigen::VectorXd Integrate(const Dynamics& f, Eigen::VectorXd s, const Eigen::VectorXd& u,
                          double seconds, double dt) {
  const int steps = static_cast<int>(std::lround(seconds / dt));
  for (int i = 0; i < steps; ++i) s = Rk4(f, s, u, dt);
  return s;
}

class PhysicsReferenceTest : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    const auto dir = foray::testing::FreshDir("physics");
    std::string output;
    ASSERT_EQ(foray::testing::RunPython("tests/client/sim/physics_reference.py",
                                        "--out " + dir.string(), &output),
              0)
        << output;
    arrays_ = new std::map<std::string, Eigen::MatrixXd>(foray::testing::LoadArrays(dir));
  }
  static void TearDownTestSuite() { delete arrays_; }

  // RK4 at the simulators' 1 ms step against solve_ivp (RK45, rtol 1e-11) every 0.5 s over 5 s:
  // state error below 1e-4.
  static void Compare(const Dynamics& f, const Eigen::MatrixXd& cases, const Eigen::MatrixXd& traj,
                      int inputs) {
    ASSERT_EQ(traj.rows(), cases.rows() * 11);
    for (int c = 0; c < cases.rows(); ++c) {
      Eigen::VectorXd s = cases.row(c).head(4).transpose();
      const Eigen::VectorXd u = cases.row(c).tail(inputs).transpose();
      for (int k = 0; k <= 10; ++k) {
        if (k > 0) s = Integrate(f, s, u, 0.5, kSimulationStep);
        const Eigen::VectorXd want = traj.row(c * 11 + k).transpose();
        EXPECT_LT((s - want).cwiseAbs().maxCoeff(), 1e-4) << "case " << c << " t " << 0.5 * k;
      }
    }
  }

  static std::map<std::string, Eigen::MatrixXd>* arrays_;
};
std::map<std::string, Eigen::MatrixXd>* PhysicsReferenceTest::arrays_ = nullptr;

TEST_F(PhysicsReferenceTest, GantryMatchesSolveIvp) {
  Compare(GantryDynamics(GantryParams{}), arrays_->at("gantry_cases"), arrays_->at("gantry_traj"), 1);
}

TEST_F(PhysicsReferenceTest, ArmMatchesSolveIvp) {
  ArmParams p;
  p.joint_limits = false;  // the reference has none
  Compare(ArmDynamics(p), arrays_->at("arm_cases"), arrays_->at("arm_traj"), 2);
}

TEST(PhysicsTest, SmallSwingHasThePendulumPeriod) {
  // With the cart held (a very heavy cart) and no damping, a small swing has the period
  // 2 pi sqrt(L/g) of the simple pendulum (textbook). Period from successive upward zero
  // crossings of theta, interpolated linearly: within 0.5%.
  GantryParams p;
  p.cart_mass = 1e7;
  p.cart_friction = 0.0;
  p.swing_damping = 0.0;
  const Dynamics f = GantryDynamics(p);
  Eigen::VectorXd s(4);
  s << 0.0, 0.0, 0.02, 0.0;
  const Eigen::VectorXd u = Eigen::VectorXd::Zero(1);
  const double dt = 0.001;
  std::vector<double> crossings;
  double t = 0.0;
  for (int i = 0; i < 20000 && crossings.size() < 4; ++i) {
    const Eigen::VectorXd next = Rk4(f, s, u, dt);
    if (s[2] < 0 && next[2] >= 0) crossings.push_back(t + dt * (-s[2]) / (next[2] - s[2]));
    s = next;
    t += dt;
  }
  ASSERT_EQ(crossings.size(), 4u);
  const double period = (crossings[3] - crossings[0]) / 3.0;
  const double expected = 2 * kPi * std::sqrt(p.cable_length / p.gravity);
  EXPECT_NEAR(period / expected, 1.0, 0.005);
}

TEST(PhysicsTest, GantryConservesEnergyWithoutInputOrDamping) {
  // Energy drift below 1e-6 relative over 10 s (conservation of energy; RK4 at 1 ms).
  GantryParams p;
  p.cart_friction = 0.0;
  p.swing_damping = 0.0;
  Eigen::VectorXd s(4);
  s << 0.0, 0.3, 0.8, -0.5;
  const double e0 = GantryEnergy(p, s);
  s = Integrate(GantryDynamics(p), s, Eigen::VectorXd::Zero(1), 10.0, 0.001);
  EXPECT_LT(std::abs(GantryEnergy(p, s) - e0) / std::abs(e0), 1e-6);
}

TEST(PhysicsTest, ArmConservesEnergyWithoutInputOrDamping) {
  ArmParams p;
  p.joint_damping = 0.0;
  p.joint_limits = false;
  Eigen::VectorXd s(4);
  s << 0.3, 0.6, 0.0, 0.0;
  const double e0 = ArmEnergy(p, s);
  s = Integrate(ArmDynamics(p), s, Eigen::VectorXd::Zero(2), 10.0, 0.001);
  EXPECT_LT(std::abs(ArmEnergy(p, s) - e0) / std::abs(e0), 1e-6);
}

TEST(PhysicsTest, ArmMassMatrixIsSymmetricPositiveDefinite) {
  // The manipulator inertia matrix is symmetric positive definite for every configuration
  // (Spong, Hutchinson & Vidyasagar, Robot Modeling and Control).
  const ArmParams p;
  for (double q2 = -kPi; q2 <= kPi; q2 += 0.05) {
    const Eigen::Matrix2d m = ArmMassMatrix(p, q2);
    EXPECT_DOUBLE_EQ(m(0, 1), m(1, 0));
    Eigen::SelfAdjointEigenSolver<Eigen::Matrix2d> eig(m);
    EXPECT_GT(eig.eigenvalues().minCoeff(), 0.0) << "q2 " << q2;
  }
}

TEST(PhysicsTest, JointLimitsHoldTheArm) {
  // Full torque against the lower limit of joint 2 for 3 s: the soft limit holds it within
  // 0.1 rad of the limit.
  const ArmParams p;
  Eigen::VectorXd s = Eigen::VectorXd::Zero(4);
  s = Integrate(ArmDynamics(p), s, Eigen::Vector2d(0.0, -5.0), 3.0, 0.001);
  EXPECT_GT(s[1], p.q2_min - 0.1);
  EXPECT_LT(s[1], p.q2_min + 0.1);
}

}  // namespace
}  // namespace foray::sim
