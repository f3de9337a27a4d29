#include "core/explore/objective.h"

#include <cmath>

#include "absl/strings/str_format.h"

namespace foray::explore {
namespace {

bool AllFinite(const std::vector<double>& v) {
  for (double x : v) {
    if (!std::isfinite(x)) return false;
  }
  return true;
}

// A box over some state indices (a known reward's region, a known termination), named `field`
// in messages: sizes that match, indices inside the state, lower <= upper.
absl::Status ValidateBox(const char* field, const std::vector<int>& indices,
                         const std::vector<double>& lower, const std::vector<double>& upper,
                         int state_dim) {
  if (lower.size() != indices.size() || upper.size() != indices.size()) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "%s has %d indices, %d lower and %d upper bounds; they must match", field, indices.size(),
        lower.size(), upper.size()));
  }
  for (size_t i = 0; i < indices.size(); ++i) {
    if (indices[i] < 0 || indices[i] >= state_dim) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "%s.indices[%d] is %d, the state has %d values", field, i, indices[i], state_dim));
    }
    if (std::isnan(lower[i]) || std::isnan(upper[i]) || !(lower[i] <= upper[i])) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "%s bound %d: lower %g is not <= upper %g", field, i, lower[i], upper[i]));
    }
  }
  return absl::OkStatus();
}

// Whether the state s lies in the box.
bool InBox(const float* s, const std::vector<int>& indices, const std::vector<double>& lower,
           const std::vector<double>& upper) {
  for (size_t i = 0; i < indices.size(); ++i) {
    if (!(s[indices[i]] >= lower[i] && s[indices[i]] <= upper[i])) return false;
  }
  return true;
}

}  // namespace

absl::Status KnownReward::Validate(int state_dim, int action_dim) const {
  switch (kind) {
    case Kind::kLearned:
      return absl::OkStatus();
    case Kind::kQuadratic:
      if (static_cast<int>(target.size()) != state_dim) {
        return absl::InvalidArgumentError(absl::StrFormat(
            "known_reward.quadratic.target has %d values, the state has %d", target.size(),
            state_dim));
      }
      if (!state_weight.empty() && static_cast<int>(state_weight.size()) != state_dim) {
        return absl::InvalidArgumentError(absl::StrFormat(
            "known_reward.quadratic.weight has %d values, the state has %d", state_weight.size(),
            state_dim));
      }
      if (!action_weight.empty() && static_cast<int>(action_weight.size()) != action_dim) {
        return absl::InvalidArgumentError(absl::StrFormat(
            "known_reward.quadratic.action_weight has %d values, the action has %d",
            action_weight.size(), action_dim));
      }
      if (!AllFinite(target) || !AllFinite(state_weight) || !AllFinite(action_weight)) {
        return absl::InvalidArgumentError("known_reward.quadratic has a non-finite value");
      }
      return absl::OkStatus();
    case Kind::kRegion:
      if (indices.empty()) {
        return absl::InvalidArgumentError("known_reward.region.indices is empty");
      }
      return ValidateBox("known_reward.region", indices, lower, upper, state_dim);
  }
  return absl::InvalidArgumentError("known_reward.kind is not a known kind");
}

void KnownReward::Evaluate(const float* next_states, int state_stride, const float* actions,
                           int action_stride, int rows, int state_dim, int action_dim,
                           float* out) const {
  if (kind == Kind::kQuadratic) {
    for (int r = 0; r < rows; ++r) {
      const float* s = next_states + static_cast<std::ptrdiff_t>(r) * state_stride;
      const float* a = actions + static_cast<std::ptrdiff_t>(r) * action_stride;
      double cost = 0.0;
      for (int k = 0; k < state_dim; ++k) {
        const double d = s[k] - target[k];
        cost += (state_weight.empty() ? 1.0 : state_weight[k]) * d * d;
      }
      for (int j = 0; j < static_cast<int>(action_weight.size()) && j < action_dim; ++j) {
        cost += action_weight[j] * static_cast<double>(a[j]) * a[j];
      }
      out[r] = static_cast<float>(-cost);
    }
  } else {
    for (int r = 0; r < rows; ++r) {
      const float* s = next_states + static_cast<std::ptrdiff_t>(r) * state_stride;
      out[r] = InBox(s, indices, lower, upper) ? 1.0f : 0.0f;
    }
  }
}

absl::Status KnownTermination::Validate(int state_dim) const {
  if (indices.empty()) {
    if (!lower.empty() || !upper.empty()) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "known_termination has no indices but %d lower and %d upper bounds", lower.size(),
          upper.size()));
    }
    return absl::OkStatus();
  }
  return ValidateBox("known_termination", indices, lower, upper, state_dim);
}

void KnownTermination::Evaluate(const float* next_states, int state_stride, int rows,
                                float* out) const {
  for (int r = 0; r < rows; ++r) {
    const float* s = next_states + static_cast<std::ptrdiff_t>(r) * state_stride;
    out[r] = InBox(s, indices, lower, upper) != outside ? 1.0f : 0.0f;
  }
}

absl::Status ObjectiveOptions::Validate(int state_dim, int action_dim) const {
  if (!std::isfinite(reward_weight) || !std::isfinite(information_weight)) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "reward_weight %g and information_weight %g must be finite", reward_weight,
        information_weight));
  }
  if (!(observation_noise >= 0.0 && observation_noise <= 1.0)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("observation_noise is %g, must be in [0, 1]", observation_noise));
  }
  if (!(discount > 0.0 && discount <= 1.0)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("discount is %g, must be in (0, 1]", discount));
  }
  if (estimator == Estimator::kMonteCarlo && monte_carlo_samples < 1) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "monte_carlo_samples is %d, must be >= 1", monte_carlo_samples));
  }
  switch (estimator) {
    case Estimator::kPairwiseKl:
    case Estimator::kPairwiseBhattacharyya:
    case Estimator::kJensenRenyi2:
    case Estimator::kMonteCarlo:
      break;
    default:
      return absl::InvalidArgumentError("estimator is not a known estimator");
  }
  if (!std::isfinite(terminal_value)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("terminal_value is %g, must be finite", terminal_value));
  }
  if (!std::isfinite(value_weight)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("value_weight is %g, must be finite", value_weight));
  }
  if (!(value_discount > 0.0 && value_discount < 1.0)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("value_discount is %g, must be in (0, 1)", value_discount));
  }
  if (value_estimate != ValueEstimate::kAverage && value_estimate != ValueEstimate::kBest) {
    return absl::InvalidArgumentError("value_estimate is not a known estimate");
  }
  if (reward_estimate != RewardEstimate::kModel && reward_estimate != RewardEstimate::kNearby) {
    return absl::InvalidArgumentError("reward_estimate is not a known estimate");
  }
  if (absl::Status s = known_termination.Validate(state_dim); !s.ok()) return s;
  return known_reward.Validate(state_dim, action_dim);
}

}  // namespace foray::explore
