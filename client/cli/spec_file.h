// The robot spec file of the foray CLI: a JSON document of our own that describes a robot for
// `foray register`. It reads like the robot's data sheet (each action carries its limits) and
// converts to the RobotSpec message. Unknown keys are errors, so a typo never passes silently.
// Stateless functions, safe from any thread.
//
//   {
//     "name": "crane-2",
//     "control_period_s": 0.05,
//     "state":  [{"label": "cart_position", "unit": "m"}, {"label": "swing", "unit": "rad"}],
//     "action": [{"label": "cart_force", "unit": "N", "min": -20, "max": 20, "max_step": 4}],
//     "model": {"ensemble_size": 5, "hidden_widths": [64, 64], "activation": "silu"},
//     "training": {"min_transitions": 200, "every_n_transitions": 500, "max_epochs": 50},
//     "planner": {"horizon": 20, "population": 200, "iterations": 4},
//     "objective": {"reward_weight": 1, "information_weight": 1, "discount": 1,
//                   "estimator": "pairwise_kl",
//                   "known_reward": {"quadratic": {"target": [0.5, 0], "weight": [1, 0]}}},
//     "coverage": {"indices": [0, 1], "lower": [0, -0.5], "upper": [1, 0.5], "cells": 20}
//   }
//
// The full list of keys, their units and defaults is in DEVELOPERS.md ("Robot spec files").

#ifndef FORAY_CLIENT_CLI_SPEC_FILE_H_
#define FORAY_CLIENT_CLI_SPEC_FILE_H_

#include <string>
#include <string_view>

#include "absl/status/statusor.h"
#include "foray/v1/types.pb.h"

namespace foray::cli {

// Largest spec file read, bytes. A robot with hundreds of dimensions fits in a few kB.
inline constexpr size_t kMaxSpecFileBytes = 1 << 20;

// Parses a spec document. InvalidArgument names the key path and the value, e.g.
// `action[0].max: -1 is not above min 2`. Range checks beyond the file's own shape (names,
// setting bounds) are the server's, which reports them at registration.
absl::StatusOr<foray::v1::RobotSpec> ParseSpecJson(std::string_view text);

// Reads and parses `path`; NotFound / InvalidArgument name the file.
absl::StatusOr<foray::v1::RobotSpec> ReadSpecFile(const std::string& path);

}  // namespace foray::cli

#endif  // FORAY_CLIENT_CLI_SPEC_FILE_H_
