// The spec-file reader and the transition tables of the foray CLI.

#include "client/cli/spec_file.h"

#include <cstdio>
#include <string>

#include "client/cli/table_files.h"
#include "gtest/gtest.h"

namespace foray::cli {
namespace {

constexpr char kFull[] = R"({
  "name": "crane-2", "control_period_s": 0.05,
  "state": [{"label": "x", "unit": "m"}, {"label": "swing", "unit": "rad", "max": 1.2}],
  "action": [{"label": "force", "unit": "N", "min": -20, "max": 20, "max_step": 4}],
  "model": {"ensemble_size": 7, "hidden_widths": [128, 64], "activation": "tanh"},
  "training": {"min_transitions": 300, "no_train_at_episode_end": true, "learning_rate": 0.002},
  "planner": {"horizon": 30, "propagation": "ts1", "white_noise": true},
  "objective": {"information_weight": 0, "estimator": "jensen_renyi_2",
                "known_reward": {"quadratic": {"target": [0.5, 0], "weight": [1, 0]}},
                "terminal_value": -40,
                "known_termination": {"indices": [0], "lower": [-1.5], "upper": [1.5], "outside": true}},
  "success_return": 3,
  "seed": 18446744073709551615,
  "coverage": {"indices": [0, 1], "lower": [0, -0.5], "upper": [1, 0.5], "cells": 16}
})";

TEST(SpecFileTest, EveryPartReachesTheSpec) {
  absl::StatusOr<v1::RobotSpec> spec = ParseSpecJson(kFull);
  ASSERT_TRUE(spec.ok()) << spec.status();
  EXPECT_EQ(spec->name(), "crane-2");
  ASSERT_EQ(spec->state_size(), 2);
  EXPECT_EQ(spec->state(1).unit(), "rad");
  ASSERT_EQ(spec->state_limits_size(), 1);  // only the state that has one
  EXPECT_EQ(spec->state_limits(0).index(), 1u);
  EXPECT_FALSE(spec->state_limits(0).has_min());
  EXPECT_EQ(spec->state_limits(0).max(), 1.2);
  ASSERT_EQ(spec->action_limits_size(), 1);
  EXPECT_EQ(spec->action_limits(0).min(), -20);
  EXPECT_EQ(spec->action_limits(0).max_step(), 4);
  EXPECT_EQ(spec->model().ensemble_size(), 7u);
  EXPECT_EQ(spec->model().hidden_widths_size(), 2);
  EXPECT_EQ(spec->model().activation(), v1::ModelSettings::ACTIVATION_TANH);
  EXPECT_TRUE(spec->training().no_train_at_episode_end());
  EXPECT_DOUBLE_EQ(spec->training().learning_rate(), 0.002);
  EXPECT_EQ(spec->planner().propagation(), v1::PROPAGATION_TS1);
  // An explicit 0 is kept as present (the objective's weights have presence).
  EXPECT_TRUE(spec->objective().has_information_weight());
  EXPECT_EQ(spec->objective().information_weight(), 0.0);
  EXPECT_FALSE(spec->objective().has_reward_weight());
  EXPECT_EQ(spec->objective().estimator(), v1::INFORMATION_ESTIMATOR_JENSEN_RENYI_2);
  EXPECT_EQ(spec->objective().known_reward().quadratic().target(0), 0.5);
  EXPECT_EQ(spec->objective().terminal_value(), -40.0);
  EXPECT_TRUE(spec->objective().known_termination().outside());
  EXPECT_EQ(spec->objective().known_termination().upper(0), 1.5);
  EXPECT_TRUE(spec->has_success_return());
  EXPECT_EQ(spec->success_return(), 3.0);
  EXPECT_TRUE(spec->has_seed());
  EXPECT_EQ(spec->seed(), 18446744073709551615u);  // 2^64 - 1, the largest seed
  EXPECT_EQ(spec->coverage_cells(), 16u);
  EXPECT_EQ(spec->coverage_upper(1), 0.5);
}

void ExpectRefused(const std::string& text, const std::string& message) {
  absl::StatusOr<v1::RobotSpec> spec = ParseSpecJson(text);
  ASSERT_FALSE(spec.ok()) << text;
  EXPECT_EQ(spec.status().code(), absl::StatusCode::kInvalidArgument);
  EXPECT_NE(spec.status().message().find(message), std::string::npos) << spec.status().message();
}

constexpr char kBase[] =
    R"("name": "c", "control_period_s": 0.1, "state": [{"label": "x"}], "action": [{"label": "f", "min": -1, "max": 1}])";

TEST(SpecFileTest, MistakesAreNamedWithTheirValues) {
  auto with = [](const std::string& extra) { return std::string("{") + kBase + extra + "}"; };
  ExpectRefused(with(R"(, "planner": {"horizn": 5})"), "planner.horizn: unknown key; planner has horizon,");
  ExpectRefused(with(R"(, "colour": 1)"), "colour: unknown key");
  ExpectRefused(with(R"(, "seed": -7)"), "seed: -7 is not a whole number >= 0");
  ExpectRefused(with(R"(, "seed": 1.5)"), "seed: 1.5 is not a whole number >= 0");
  ExpectRefused(with(R"(, "planner": {"horizon": -3})"), "planner.horizon: -3 is outside 0..4294967295");
  ExpectRefused(with(R"(, "planner": {"horizon": 2.5})"), "planner.horizon: 2.5 is not a whole number");
  ExpectRefused(with(R"(, "model": {"activation": "gelu"})"),
                "model.activation: \"gelu\" is not one of silu, relu, tanh");
  ExpectRefused(with(R"(, "model": {"hidden_widths": [64, "wide"]})"), "model.hidden_widths[1]: \"wide\" is not a whole number");
  ExpectRefused(with(R"(, "coverage": {"lower": [0, "a"]})"), "coverage.lower[1]: \"a\" is not a number");
  ExpectRefused(with(R"(, "training": {"no_train_at_episode_end": 1})"), "is not true or false");
  ExpectRefused(R"({"name": "c", "control_period_s": 0, "state": [{"label": "x"}], "action": []})",
                "control_period_s: 0 is not positive");
  ExpectRefused(R"({"name": "c", "control_period_s": 1, "state": [{"label": "x"}], "action": []})",
                "action: [] must be a non-empty list");
  ExpectRefused(R"({"name": "c", "control_period_s": 1, "state": [{"label": "x"}], "action": [{"label": "f"}]})",
                "action[0]: an action needs \"min\" and \"max\"");
  ExpectRefused(R"({"name": "c", "control_period_s": 1, "state": [{"label": "x", "min": 1, "max": 0}],
                 "action": [{"label": "f", "min": -1, "max": 1}]})",
                "state[0].max: 0 is below min 1");
  ExpectRefused(R"({"name": "c", "control_period_s": 1, "state": [{"label": "x", "max_step": 1}],
                 "action": [{"label": "f", "min": -1, "max": 1}]})",
                "state[0].max_step: unknown key");
  ExpectRefused(R"({"control_period_s": 1})", "name: required key is missing");
  ExpectRefused("[1, 2]", "is not an object");
  ExpectRefused("{\"name\": ", "not valid JSON");
  // Found by tests/fuzz/spec_file_fuzz: a number beyond double's range threw through the
  // no-exceptions parse and ended the program.
  ExpectRefused("{\"name\": 7777777777777777777777777E7777}", "not valid JSON: [json.exception.out_of_range.406]");
  ExpectRefused(std::string(kMaxSpecFileBytes + 1, ' '), "at most 1048576 are read");
}

TEST(TableFilesTest, CsvRoundTripIsBitExact) {
  v1::RobotSpec spec;
  spec.add_state()->set_label("x");
  spec.add_action()->set_label("f");
  v1::Transition t;
  t.set_seq(7);
  t.set_episode(2);
  t.set_step(3);
  t.add_state(0.1);  // not exact in binary: the text must carry all 17 digits
  t.add_action(-1.0 / 3.0);
  t.add_next_state(6.02214076e23);
  t.set_reward(-5e-324);  // the smallest subnormal
  t.set_terminal(true);
  const std::string path = ::testing::TempDir() + "/table_files_test.csv";
  ASSERT_TRUE(WriteTransitionsCsv(path, spec, {t}).ok());
  absl::StatusOr<std::vector<v1::Transition>> back = ReadTransitionsCsv(path, spec);
  ASSERT_TRUE(back.ok()) << back.status();
  ASSERT_EQ(back->size(), 1u);
  EXPECT_EQ((*back)[0].SerializeAsString(), t.SerializeAsString());
  std::remove(path.c_str());
}

}  // namespace
}  // namespace foray::cli
