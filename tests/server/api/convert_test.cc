// Validation of what clients send (server/api/convert.h), field by field: every refused value
// gets InvalidArgument with a message that names the field and the value, and an accepted one
// converts as documented in proto/foray/v1. The fuzzer (tests/fuzz/wire_fuzz.cc) checks that
// no input crashes; this checks that each rule holds and says what it refused.

#include "server/api/convert.h"

#include <cmath>
#include <functional>
#include <string>
#include <vector>

#include "absl/strings/match.h"
#include "absl/time/clock.h"
#include "gtest/gtest.h"

namespace foray::api {
namespace {

v1::RobotSpec ValidSpec() {
  v1::RobotSpec spec;
  spec.set_name("cart-1");
  for (const char* label : {"position", "velocity"}) spec.add_state()->set_label(label);
  spec.add_action()->set_label("force");
  v1::ActionLimit* limit = spec.add_action_limits();
  limit->set_min(-2.0);
  limit->set_max(2.0);
  limit->set_max_step(0.5);
  spec.set_control_period_s(0.05);
  return spec;
}

// `status` is InvalidArgument and its message names every part (the field and the value).
void ExpectRefused(const absl::Status& status, const char* what,
                   const std::vector<std::string>& message_has) {
  ASSERT_FALSE(status.ok()) << what;
  EXPECT_EQ(status.code(), absl::StatusCode::kInvalidArgument) << what;
  for (const std::string& part : message_has) {
    EXPECT_TRUE(absl::StrContains(status.message(), part))
        << what << ": \"" << status.message() << "\" should name \"" << part << "\"";
  }
}

struct SpecCase {
  const char* what;
  std::function<void(v1::RobotSpec*)> change;
  std::vector<std::string> message_has;  // the field and the refused value
};

TEST(ConvertTest, ConfigFromSpecRefusesEachBadFieldByName) {
  ASSERT_TRUE(ConfigFromSpec(ValidSpec()).ok());
  const std::vector<SpecCase> cases = {
      {"empty name", [](v1::RobotSpec* s) { s->set_name(""); }, {"spec.name", "0 characters"}},
      {"name character", [](v1::RobotSpec* s) { s->set_name("cart 1"); }, {"spec.name", "' '"}},
      {"no state", [](v1::RobotSpec* s) { s->clear_state(); }, {"spec.state", "0 dimensions"}},
      {"limits count",
       [](v1::RobotSpec* s) { s->add_action_limits(); },
       {"spec.action_limits", "2 entries"}},
      {"min >= max",
       [](v1::RobotSpec* s) { s->mutable_action_limits(0)->set_min(3.0); },
       {"spec.action_limits[0]", "min 3", "max 2"}},
      {"infinite max",
       [](v1::RobotSpec* s) { s->mutable_action_limits(0)->set_max(INFINITY); },
       {"spec.action_limits[0]", "max inf"}},
      {"negative max_step",
       [](v1::RobotSpec* s) { s->mutable_action_limits(0)->set_max_step(-1); },
       {"spec.action_limits[0].max_step", "-1"}},
      {"control period",
       [](v1::RobotSpec* s) { s->set_control_period_s(0); },
       {"spec.control_period_s", "0"}},
      {"min_transitions",
       [](v1::RobotSpec* s) { s->mutable_training()->set_min_transitions(1); },
       {"spec.training.min_transitions", "1"}},
      {"nll_beta",
       [](v1::RobotSpec* s) { s->mutable_training()->set_nll_beta(1.5); },
       {"spec.training: nll_beta", "1.5", "[0, 1]"}},
      {"reward_nll_beta",
       [](v1::RobotSpec* s) { s->mutable_training()->set_reward_nll_beta(-0.5); },
       {"spec.training: reward_nll_beta", "-0.5", "[0, 1]"}},
      {"min_epoch_steps",
       [](v1::RobotSpec* s) { s->mutable_training()->set_min_epoch_steps(200000); },
       {"spec.training: min_epoch_steps", "200000", "1..100000"}},
      {"horizon",
       [](v1::RobotSpec* s) { s->mutable_planner()->set_horizon(501); },
       {"spec.planner: horizon", "501", "1..500"}},
      {"particles beyond an int",
       [](v1::RobotSpec* s) { s->mutable_planner()->set_particles(4000000000u); },
       {"spec.planner: particles", "4000000000"}},
      {"population",
       [](v1::RobotSpec* s) { s->mutable_planner()->set_population(100001); },
       {"spec.planner: population", "100001", "1..100000"}},
      {"discount",
       [](v1::RobotSpec* s) { s->mutable_objective()->set_discount(1.5); },
       {"objective", "discount", "1.5"}},
      {"observation noise",
       [](v1::RobotSpec* s) { s->mutable_objective()->set_observation_noise(-0.1); },
       {"objective", "observation_noise", "-0.1"}},
      {"terminal value",
       [](v1::RobotSpec* s) { s->mutable_objective()->set_terminal_value(NAN); },
       {"terminal_value", "nan"}},
      {"coverage index",
       [](v1::RobotSpec* s) {
         s->add_coverage_indices(0);
         s->add_coverage_indices(7);
       },
       {"spec.coverage_indices", "7"}},
      {"coverage range",
       [](v1::RobotSpec* s) {
         s->add_coverage_lower(1);
         s->add_coverage_lower(0);
         s->add_coverage_upper(0);
         s->add_coverage_upper(1);
       },
       {"spec.coverage range 0", "[1, 0]"}},
      {"success return",
       [](v1::RobotSpec* s) { s->set_success_return(INFINITY); },
       {"spec.success_return", "inf"}},
      {"coverage cells",
       [](v1::RobotSpec* s) { s->set_coverage_cells(201); },
       {"spec.coverage_cells", "201"}},
      {"state limit index",
       [](v1::RobotSpec* s) { s->add_state_limits()->set_index(2); },
       {"spec.state_limits[0].index", "2", "2 values"}},
      {"state limit twice",
       [](v1::RobotSpec* s) {
         s->add_state_limits()->set_min(0.0);
         s->add_state_limits()->set_max(1.0);
       },
       {"spec.state_limits[0] and [1]", "state 0", "position"}},
      {"state limit without a side",
       [](v1::RobotSpec* s) { s->add_state_limits()->set_index(1); },
       {"spec.state_limits[0]", "velocity", "neither min nor max"}},
      {"state limit min > max",
       [](v1::RobotSpec* s) {
         v1::StateLimit* l = s->add_state_limits();
         l->set_min(1.0);
         l->set_max(-1.0);
       },
       {"spec.state_limits[0]", "min 1", "max -1"}},
      {"state limit infinite",
       [](v1::RobotSpec* s) { s->add_state_limits()->set_max(INFINITY); },
       {"spec.state_limits[0]", "max inf"}},
  };
  for (const SpecCase& c : cases) {
    v1::RobotSpec spec = ValidSpec();
    c.change(&spec);
    ExpectRefused(ConfigFromSpec(spec).status(), c.what, c.message_has);
  }
}

TEST(ConvertTest, ConfigFromSpecFillsTheDocumentedDefaultsAndRoundsLimitsInward) {
  v1::RobotSpec spec = ValidSpec();
  spec.mutable_action_limits(0)->set_min(-0.1);  // not a float: rounded up
  spec.mutable_action_limits(0)->set_max(0.1);   // rounded down
  absl::StatusOr<robot::RobotConfig> config = ConfigFromSpec(spec);
  ASSERT_TRUE(config.ok()) << config.status();
  EXPECT_GE(static_cast<double>(config->limits.lower[0]), -0.1);
  EXPECT_LE(static_cast<double>(config->limits.upper[0]), 0.1);
  EXPECT_EQ(config->objective.observation_noise, 0.05);  // documented in types.proto
  EXPECT_EQ(config->objective.reward_weight, 1.0);
  EXPECT_EQ(config->coverage_indices, (std::vector<int>{0, 1}));
  EXPECT_EQ(config->planner.cem.seed, 1u);  // documented in types.proto: absent means 1
  EXPECT_EQ(config->training.seed, 1u);
  EXPECT_EQ(config->training.nll_beta, 0.5);   // documented in types.proto
  spec.mutable_training()->set_nll_beta(0.0);  // present: the plain NLL
  EXPECT_EQ(ConfigFromSpec(spec)->training.nll_beta, 0.0);
  spec.mutable_training()->clear_nll_beta();
  EXPECT_EQ(config->training.reward_nll_beta, 0.5);  // absent: nll_beta's value
  spec.mutable_training()->set_reward_nll_beta(1.0);
  EXPECT_EQ(ConfigFromSpec(spec)->training.reward_nll_beta, 1.0);
  spec.mutable_training()->clear_reward_nll_beta();
  EXPECT_EQ(config->training.min_epoch_steps, 20);  // documented in types.proto
  spec.mutable_training()->set_min_epoch_steps(1);
  EXPECT_EQ(ConfigFromSpec(spec)->training.min_epoch_steps, 1);
}

TEST(ConvertTest, StateLimitsBecomeTheRolloutsBoundsRoundedOutward) {
  v1::RobotSpec spec = ValidSpec();
  absl::StatusOr<robot::RobotConfig> config = ConfigFromSpec(spec);
  ASSERT_TRUE(config.ok()) << config.status();
  EXPECT_FALSE(config->planner.rollout.state_bounds.given());  // none listed, none applied
  v1::StateLimit* limit = spec.add_state_limits();
  limit->set_index(0);
  limit->set_min(-0.1);  // not a float: rounded down, so a state at -0.1 is inside
  limit->set_max(0.3);   // rounded up
  spec.add_state_limits()->set_index(1);
  spec.mutable_state_limits(1)->set_max(2.0);
  config = ConfigFromSpec(spec);
  ASSERT_TRUE(config.ok()) << config.status();
  const plan::StateBounds& bounds = config->planner.rollout.state_bounds;
  ASSERT_EQ(bounds.lower.size(), 2);
  ASSERT_EQ(bounds.upper.size(), 2);
  EXPECT_LE(static_cast<double>(bounds.lower[0]), -0.1);
  EXPECT_GT(static_cast<double>(bounds.lower[0]), -0.1 - 1e-7);
  EXPECT_GE(static_cast<double>(bounds.upper[0]), 0.3);
  EXPECT_EQ(bounds.lower[1], -INFINITY);  // the side not given is unbounded
  EXPECT_EQ(bounds.upper[1], 2.0f);
  EXPECT_TRUE(bounds.Validate(2).ok());
}

TEST(ConvertTest, TheSpecsSeedSeedsThePlansAndTheTraining) {
  v1::RobotSpec spec = ValidSpec();
  spec.set_seed(424242);
  absl::StatusOr<robot::RobotConfig> config = ConfigFromSpec(spec);
  ASSERT_TRUE(config.ok()) << config.status();
  EXPECT_EQ(config->planner.cem.seed, 424242u);
  EXPECT_EQ(config->training.seed, 424242u);
}

TEST(ConvertTest, PlanInputFromWireChecksTheRequestAndCountsTheDeadlineFromArrival) {
  absl::StatusOr<robot::RobotConfig> config = ConfigFromSpec(ValidSpec());
  ASSERT_TRUE(config.ok());
  const absl::Time arrived = absl::FromUnixSeconds(1000);
  v1::PlanRequest request;
  request.add_state(0.1);
  request.add_state(-0.2);
  absl::StatusOr<robot::PlanInput> input = PlanInputFromWire(request, *config, arrived);
  ASSERT_TRUE(input.ok()) << input.status();
  EXPECT_EQ(input->deadline, arrived + absl::Milliseconds(100));  // deadline_ms absent: 100
  request.set_deadline_ms(250);
  input = PlanInputFromWire(request, *config, arrived);
  ASSERT_TRUE(input.ok());
  EXPECT_EQ(input->deadline, arrived + absl::Milliseconds(250));

  struct Case {
    const char* what;
    std::function<void(v1::PlanRequest*)> change;
    std::vector<std::string> message_has;
  };
  const std::vector<Case> cases = {
      {"deadline",
       [](v1::PlanRequest* r) { r->set_deadline_ms(60001); },
       {"request.deadline_ms", "60001"}},
      {"state size",
       [](v1::PlanRequest* r) { r->add_state(1); },
       {"request.state", "3 values", "expects 2"}},
      {"state value",
       [](v1::PlanRequest* r) { r->set_state(1, NAN); },
       {"request.state[1]", "nan"}},
      {"previous action",
       [](v1::PlanRequest* r) { r->add_previous_action(2.5); },
       {"request.previous_action[0]", "2.5", "[-2, 2]"}},
      {"planner override",
       [](v1::PlanRequest* r) { r->mutable_planner()->set_horizon(9999); },
       {"request.planner: horizon", "9999"}},
  };
  for (const Case& c : cases) {
    v1::PlanRequest bad = request;
    c.change(&bad);
    ExpectRefused(PlanInputFromWire(bad, *config, arrived).status(), c.what, c.message_has);
  }
}

TEST(ConvertTest, TransitionsFromWireNamesTheTransitionAndTheField) {
  absl::StatusOr<robot::RobotConfig> config = ConfigFromSpec(ValidSpec());
  ASSERT_TRUE(config.ok());
  auto batch = [](std::function<void(google::protobuf::RepeatedPtrField<v1::Transition>*)> change) {
    google::protobuf::RepeatedPtrField<v1::Transition> out;
    for (uint64_t seq = 1; seq <= 3; ++seq) {
      v1::Transition* t = out.Add();
      t->set_seq(seq);
      t->add_state(0.0);
      t->add_state(0.0);
      t->add_action(1.0);
      t->add_next_state(0.1);
      t->add_next_state(0.0);
    }
    change(&out);
    return out;
  };
  ASSERT_TRUE(TransitionsFromWire(batch([](auto*) {}), *config).ok());
  struct Case {
    const char* what;
    std::function<void(google::protobuf::RepeatedPtrField<v1::Transition>*)> change;
    std::vector<std::string> message_has;
  };
  const std::vector<Case> cases = {
      {"empty", [](auto* b) { b->Clear(); }, {"transitions is empty"}},
      {"seq 0", [](auto* b) { b->Mutable(0)->set_seq(0); }, {"transitions[0].seq is 0"}},
      {"seq order",
       [](auto* b) { b->Mutable(2)->set_seq(2); },
       {"transitions[2].seq is 2 after 2"}},
      {"action bound",
       [](auto* b) { b->Mutable(1)->set_action(0, 2.5); },
       {"transitions[1] (seq 2).action[0] is 2.5", "[-2, 2]"}},
      {"reward",
       [](auto* b) { b->Mutable(1)->set_reward(INFINITY); },
       {"transitions[1] (seq 2).reward is inf"}},
      {"next state size",
       [](auto* b) { b->Mutable(0)->add_next_state(0); },
       {"transitions[0] (seq 1).next_state"}},
  };
  for (const Case& c : cases) {
    ExpectRefused(TransitionsFromWire(batch(c.change), *config).status(), c.what, c.message_has);
  }
}

}  // namespace
}  // namespace foray::api
