#include "client/sim/physics.h"

#include <cmath>

#include "Eigen/Cholesky"
#include "Eigen/LU"

namespace foray::sim {

Eigen::VectorXd Rk4(const Dynamics& f, const Eigen::VectorXd& s, const Eigen::VectorXd& u,
                    double dt) {
  const Eigen::VectorXd k1 = f(s, u);
  const Eigen::VectorXd k2 = f(s + 0.5 * dt * k1, u);
  const Eigen::VectorXd k3 = f(s + 0.5 * dt * k2, u);
  const Eigen::VectorXd k4 = f(s + dt * k3, u);
  return s + dt / 6.0 * (k1 + 2.0 * k2 + 2.0 * k3 + k4);
}

Dynamics GantryDynamics(const GantryParams& p) {
  return [p](const Eigen::VectorXd& s, const Eigen::VectorXd& u) {
    const double xd = s[1], th = s[2], thd = s[3];
    const double c = std::cos(th), sn = std::sin(th);
    const double m = p.payload_mass, big = p.cart_mass + p.payload_mass, l = p.cable_length;
    // [ M+m      m L cos ] [x'' ]   [ F - c_x x' + m L theta'^2 sin ]
    // [ m L cos  m L^2   ] [th''] = [ -m g L sin - c_theta theta'    ]
    Eigen::Matrix2d a;
    a << big, m * l * c, m * l * c, m * l * l;
    const Eigen::Vector2d b(u[0] - p.cart_friction * xd + m * l * thd * thd * sn,
                            -m * p.gravity * l * sn - p.swing_damping * thd);
    const Eigen::Vector2d acc = a.lu().solve(b);
    Eigen::VectorXd ds(4);
    ds << xd, acc[0], thd, acc[1];
    return ds;
  };
}

double GantryEnergy(const GantryParams& p, const Eigen::VectorXd& s) {
  const double xd = s[1], th = s[2], thd = s[3];
  const double m = p.payload_mass, l = p.cable_length;
  return 0.5 * (p.cart_mass + m) * xd * xd + m * l * xd * thd * std::cos(th) +
         0.5 * m * l * l * thd * thd - m * p.gravity * l * std::cos(th);
}

namespace {

// Centres of mass at half length, inertia about the centre m l^2 / 12 (uniform rods).
struct ArmTerms {
  double lc1, lc2, i1, i2;
};

ArmTerms Terms(const ArmParams& p) {
  return {0.5 * p.length1, 0.5 * p.length2, p.mass1 * p.length1 * p.length1 / 12.0,
          p.mass2 * p.length2 * p.length2 / 12.0};
}

double LimitTorque(const ArmParams& p, double q, double qd, double lo, double hi) {
  if (!p.joint_limits) return 0.0;
  if (q < lo) return p.limit_stiffness * (lo - q) - p.limit_damping * std::min(qd, 0.0);
  if (q > hi) return -p.limit_stiffness * (q - hi) - p.limit_damping * std::max(qd, 0.0);
  return 0.0;
}

}  // namespace

Eigen::Matrix2d ArmMassMatrix(const ArmParams& p, double q2) {
  const ArmTerms t = Terms(p);
  const double m1 = p.mass1, m2 = p.mass2, l1 = p.length1;
  const double c2 = std::cos(q2);
  Eigen::Matrix2d m;
  m(0, 0) = m1 * t.lc1 * t.lc1 + m2 * (l1 * l1 + t.lc2 * t.lc2 + 2 * l1 * t.lc2 * c2) + t.i1 + t.i2;
  m(0, 1) = m(1, 0) = m2 * (t.lc2 * t.lc2 + l1 * t.lc2 * c2) + t.i2;
  m(1, 1) = m2 * t.lc2 * t.lc2 + t.i2;
  return m;
}

Dynamics ArmDynamics(const ArmParams& p) {
  return [p](const Eigen::VectorXd& s, const Eigen::VectorXd& u) {
    const ArmTerms t = Terms(p);
    const double q1 = s[0], q2 = s[1], q1d = s[2], q2d = s[3];
    const double m2 = p.mass2, l1 = p.length1, g = p.gravity;
    // Coriolis and centrifugal terms with h = -m2 l1 lc2 sin q2 (Spong et al., two-link arm).
    const double h = -m2 * l1 * t.lc2 * std::sin(q2);
    const Eigen::Vector2d coriolis(h * q2d * q2d + 2.0 * h * q1d * q2d, -h * q1d * q1d);
    const Eigen::Vector2d gravity(
        (p.mass1 * t.lc1 + m2 * l1) * g * std::cos(q1) + m2 * t.lc2 * g * std::cos(q1 + q2),
        m2 * t.lc2 * g * std::cos(q1 + q2));
    const Eigen::Vector2d tau(
        u[0] - p.joint_damping * q1d + LimitTorque(p, q1, q1d, p.q1_min, p.q1_max),
        u[1] - p.joint_damping * q2d + LimitTorque(p, q2, q2d, p.q2_min, p.q2_max));
    const Eigen::Vector2d qdd = ArmMassMatrix(p, q2).ldlt().solve(tau - coriolis - gravity);
    Eigen::VectorXd ds(4);
    ds << q1d, q2d, qdd[0], qdd[1];
    return ds;
  };
}

double ArmEnergy(const ArmParams& p, const Eigen::VectorXd& s) {
  const ArmTerms t = Terms(p);
  const Eigen::Vector2d qd(s[2], s[3]);
  const double kinetic = 0.5 * qd.dot(ArmMassMatrix(p, s[1]) * qd);
  const double potential = (p.mass1 * t.lc1 + p.mass2 * p.length1) * p.gravity * std::sin(s[0]) +
                           p.mass2 * t.lc2 * p.gravity * std::sin(s[0] + s[1]);
  return kinetic + potential;
}

Eigen::Vector2d ArmTip(const ArmParams& p, const Eigen::VectorXd& s) {
  return {p.length1 * std::cos(s[0]) + p.length2 * std::cos(s[0] + s[1]),
          p.length1 * std::sin(s[0]) + p.length2 * std::sin(s[0] + s[1])};
}

}  // namespace foray::sim
