// Conversions between the foray.v1 wire messages and the domain types, with the validation of
// everything a client sends: every error names the field and the values. Pure functions;
// thread-safe.
#ifndef FORAY_SERVER_API_CONVERT_H_
#define FORAY_SERVER_API_CONVERT_H_

#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "absl/time/time.h"
#include "core/plan/planner.h"
#include "core/model/ensemble.h"
#include "core/model/trainer.h"
#include "foray/v1/models.pb.h"
#include "foray/v1/types.pb.h"
#include "grpcpp/support/status.h"
#include "server/robot/runtime.h"
#include "server/robot/config.h"
#include "server/store/records_wire.h"
#include "server/store/store.h"

namespace foray::api {

// The nearest float >= x and <= x: the planner's float limits are rounded inward with these.
float FloatAtLeast(double x);
float FloatAtMost(double x);

// The one place where absl::Status becomes grpc::Status.
grpc::Status ToGrpc(const absl::Status& status);

// The domain config of a spec, zero values replaced by the defaults the contract documents.
// InvalidArgument naming the field and the values on any problem.
absl::StatusOr<robot::RobotConfig> ConfigFromSpec(const v1::RobotSpec& spec);

// Applies planner/objective overrides (a request's or UpdateRobotSettings') on top of `base`.
absl::Status ApplyPlannerSettings(const v1::PlannerSettings& settings, plan::PlannerOptions* base);
absl::Status ApplyObjectiveSettings(const v1::ObjectiveSettings& settings, int state_dim,
                                    int action_dim, explore::ObjectiveOptions* base);

// Checks a batch against the robot: 1..10,000 transitions, seq >= 1 and strictly increasing,
// dimensions, finite values, actions within the bounds.
absl::StatusOr<std::vector<store::TransitionRecord>> TransitionsFromWire(
    const google::protobuf::RepeatedPtrField<v1::Transition>& transitions,
    const robot::RobotConfig& config);

// Checks a plan request against the robot (sizes, finite values, the previous action within
// the bounds, deadline_ms in 1..60000, per-request planner and objective settings) and converts
// it: float state and previous action, the first step's rate limit shrunk by the float rounding
// of the previous action, the deadline deadline_ms after `arrived`, the robot's settings with
// the request's overrides.
absl::StatusOr<robot::PlanInput> PlanInputFromWire(const v1::PlanRequest& request,
                                                   const robot::RobotConfig& config,
                                                   absl::Time arrived);

// The wire form of an ensemble (format 1) and back. EnsembleFromWire checks the format, the
// architecture against the layers' shapes, byte lengths and finite values, naming the field.
v1::EnsembleModel EnsembleToWire(const model::Ensemble& ensemble);
absl::StatusOr<model::Ensemble> EnsembleFromWire(const v1::EnsembleModel& wire);

}  // namespace foray::api

#endif  // FORAY_SERVER_API_CONVERT_H_
