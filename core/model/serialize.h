// Bytes for a whole ensemble (architecture, version, normalisers, bounds, weights) and back.
// The round trip is bit-exact. Thread-safe: pure functions.
//
// Layout (little-endian): the 8 bytes "FORAYENS", u32 format (1), u32 state_dim,
// u32 action_dim, u32 members, u32 activation, u32 hidden layer count, u32 width per hidden
// layer, u64 version, then float32 arrays: input mean and std (input_dim each), output mean
// and std (output_dim each), max and min log-variance (output_dim each), and the parameters
// (num_member_params per member, member after member).
#ifndef FORAY_CORE_MODEL_SERIALIZE_H_
#define FORAY_CORE_MODEL_SERIALIZE_H_

#include <string>
#include <string_view>

#include "absl/status/statusor.h"
#include "core/model/ensemble.h"

namespace foray::model {

std::string SerializeEnsemble(const Ensemble& ensemble);

// InvalidArgument (DataLoss for truncation or a bad magic) naming what does not fit.
absl::StatusOr<Ensemble> DeserializeEnsemble(std::string_view bytes);

}  // namespace foray::model

#endif  // FORAY_CORE_MODEL_SERIALIZE_H_
