// Physics of Foray's simulated robots: continuous-time dynamics and a fixed-step RK4
// integrator. Pure functions and small value types; safe from several threads.
//
//   GantryParams p;                       // cart on a rail, payload on a cable
//   Eigen::Vector4d s(0, 0, 0.1, 0);      // [x m, x_dot m/s, theta rad, theta_dot rad/s]
//   s = Rk4(GantryDynamics(p), s, Eigen::VectorXd::Constant(1, 2.0), 0.01);
#ifndef FORAY_CLIENT_SIM_PHYSICS_H_
#define FORAY_CLIENT_SIM_PHYSICS_H_

#include <functional>

#include "Eigen/Core"

namespace foray::sim {

// ds/dt = f(s, u): state (n), input (m), held constant over a step.
using Dynamics = std::function<Eigen::VectorXd(const Eigen::VectorXd& s, const Eigen::VectorXd& u)>;

// One classical Runge-Kutta step of size dt (seconds) with u held. The simulators step at
// kSimulationStep: at 5 ms the arm's fast swings under full torque drifted from a tight
// reference by 3e-3 rad within 5 s; at 1 ms they stay within 1e-4 (physics_test.cc).
inline constexpr double kSimulationStep = 0.001;  // s
Eigen::VectorXd Rk4(const Dynamics& f, const Eigen::VectorXd& s, const Eigen::VectorXd& u, double dt);

// Overhead gantry: a cart (mass cart_mass, kg) on a horizontal rail driven by a force F (N),
// with a payload (payload_mass, kg) on a massless cable of length cable_length (m); theta is
// the swing angle from the vertical, positive when the payload is ahead of the cart. From the
// Lagrangian of the cart-pendulum (e.g. Ogata, Modern Control Engineering, the inverted
// pendulum on a cart, here hanging down):
//   (M + m) x'' + m L (theta'' cos theta - theta'^2 sin theta) = F - c_x x'
//   m L x'' cos theta + m L^2 theta'' + m g L sin theta = -c_theta theta'
// State [x, x', theta, theta'], input [F].
struct GantryParams {
  double cart_mass = 2.0;       // M, kg
  double payload_mass = 0.5;    // m, kg
  double cable_length = 0.8;    // L, m
  double gravity = 9.81;        // g, m/s^2
  double cart_friction = 0.5;   // c_x, N s/m
  double swing_damping = 0.01;  // c_theta, N m s/rad
};
Dynamics GantryDynamics(const GantryParams& p);
// Total mechanical energy, J (conserved without input and damping).
double GantryEnergy(const GantryParams& p, const Eigen::VectorXd& s);

// Planar two-link arm in a vertical plane, joint torques in, angles from the horizontal (q1)
// and relative to link 1 (q2). The manipulator equation (Spong, Hutchinson & Vidyasagar,
// Robot Modeling and Control, ch. 7):
//   M(q) q'' + C(q, q') q' + g(q) = tau - c q' + tau_limit(q, q')
// with uniform links (centre of mass at half length, inertia m l^2 / 12) and soft joint limits
// (a stiff spring-damper beyond each limit). State [q1, q2, q1', q2'], input [tau1, tau2].
struct ArmParams {
  double mass1 = 1.0, mass2 = 0.8;      // kg
  double length1 = 0.5, length2 = 0.4;  // m
  double gravity = 9.81;                // m/s^2
  double joint_damping = 0.05;          // c, N m s/rad
  bool joint_limits = true;
  double q1_min = -1.5, q1_max = 1.5;   // rad
  double q2_min = -2.5, q2_max = 2.5;   // rad
  double limit_stiffness = 200.0;       // N m/rad
  double limit_damping = 5.0;           // N m s/rad
};
Dynamics ArmDynamics(const ArmParams& p);
// M(q), (2, 2).
Eigen::Matrix2d ArmMassMatrix(const ArmParams& p, double q2);
double ArmEnergy(const ArmParams& p, const Eigen::VectorXd& s);
// End-effector position [x, y], m, from the shoulder.
Eigen::Vector2d ArmTip(const ArmParams& p, const Eigen::VectorXd& s);

}  // namespace foray::sim

#endif  // FORAY_CLIENT_SIM_PHYSICS_H_
