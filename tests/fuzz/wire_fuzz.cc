// libFuzzer target over the server's request validation and wire-to-domain conversion: the
// robot spec of RegisterRobot (ConfigFromSpec), the transitions of AppendTransitions and the
// session stream (TransitionsFromWire), plan requests of PlanActions and the stream
// (PlanInputFromWire), the settings of UpdateRobotSettings (Apply*Settings, then the whole spec
// again), and the model of ImportModel (EnsembleFromWire). Whatever the bytes, each must return
// a status or a value; a crash, a sanitizer report or an abort is a finding.
//
// Input: two bytes (little endian) L, L bytes of a RobotSpec, one selector byte, then the bytes
// of the selected message. When the spec does not convert, a fixed valid robot is used, so the
// rest is still exercised.

#include <cstddef>
#include <cstdint>
#include <string>

#include "foray/v1/models.pb.h"
#include "foray/v1/registry.pb.h"
#include "foray/v1/session.pb.h"
#include "server/api/convert.h"

namespace {

namespace v1 = foray::v1;

v1::RobotSpec FallbackSpec() {
  v1::RobotSpec spec;
  spec.set_name("fuzz-robot");
  spec.add_state()->set_label("x");
  spec.add_state()->set_label("v");
  spec.add_action()->set_label("f");
  auto* limit = spec.add_action_limits();
  limit->set_min(-1);
  limit->set_max(1);
  limit->set_max_step(0.5);
  spec.set_control_period_s(0.05);
  return spec;
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  if (size < 3) return 0;
  const size_t spec_size = std::min<size_t>(data[0] | (data[1] << 8), size - 2);
  v1::RobotSpec spec;
  absl::StatusOr<foray::robot::RobotConfig> config = absl::InvalidArgumentError("unparsed");
  if (spec.ParseFromArray(data + 2, static_cast<int>(spec_size))) config = foray::api::ConfigFromSpec(spec);
  if (!config.ok()) {
    spec = FallbackSpec();
    config = foray::api::ConfigFromSpec(spec);
    if (!config.ok()) __builtin_trap();  // the fallback robot must be valid
  }
  const size_t rest_at = 2 + spec_size;
  if (rest_at >= size) return 0;
  const uint8_t selector = data[rest_at];
  const uint8_t* body = data + rest_at + 1;
  const int body_size = static_cast<int>(size - rest_at - 1);
  switch (selector % 5) {
    case 0: {
      v1::AppendTransitionsRequest request;
      if (request.ParseFromArray(body, body_size)) {
        (void)foray::api::TransitionsFromWire(request.transitions(), *config);
      }
      break;
    }
    case 1: {
      v1::PlanRequest request;
      if (request.ParseFromArray(body, body_size)) (void)foray::api::PlanInputFromWire(request, *config, absl::Now());
      break;
    }
    case 2: {
      v1::UpdateRobotSettingsRequest request;
      if (!request.ParseFromArray(body, body_size)) break;
      foray::plan::PlannerOptions planner = config->planner;
      foray::explore::ObjectiveOptions objective = config->objective;
      if (request.has_planner()) (void)foray::api::ApplyPlannerSettings(request.planner(), &planner);
      if (request.has_objective()) {
        (void)foray::api::ApplyObjectiveSettings(request.objective(), config->state_dim, config->action_dim,
                                                 &objective);
      }
      v1::RobotSpec updated = spec;  // the registry checks the whole spec again
      if (request.has_planner()) *updated.mutable_planner() = request.planner();
      if (request.has_objective()) *updated.mutable_objective() = request.objective();
      if (request.has_training()) *updated.mutable_training() = request.training();
      (void)foray::api::ConfigFromSpec(updated);
      break;
    }
    case 3: {
      v1::EnsembleModel model;
      if (model.ParseFromArray(body, body_size)) (void)foray::api::EnsembleFromWire(model);
      break;
    }
    case 4: {
      v1::RobotSpec other;
      if (other.ParseFromArray(body, body_size)) (void)foray::api::ConfigFromSpec(other);
      break;
    }
  }
  return 0;
}
