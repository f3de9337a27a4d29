// A robot of our own for the server's unit tests: a cart with two state values (position and
// velocity) and one action in [-1, 1], the other settings at their defaults.
#ifndef FORAY_TESTS_SERVER_CART_CONFIG_H_
#define FORAY_TESTS_SERVER_CART_CONFIG_H_

#include <string>

#include "server/robot/config.h"

namespace foray::test_configs {

inline robot::RobotConfig CartConfig(const std::string& name) {
  robot::RobotConfig config;
  config.name = name;
  config.state_dim = 2;
  config.action_dim = 1;
  config.limits = plan::SequenceLimits::Box(Eigen::VectorXf::Constant(1, -1.0f),
                                            Eigen::VectorXf::Constant(1, 1.0f));
  return config;
}

}  // namespace foray::test_configs

#endif  // FORAY_TESTS_SERVER_CART_CONFIG_H_
