#include "server/api/convert.h"

#include <algorithm>
#include <cmath>
#include <cstring>
#include <limits>
#include <string>

#include "absl/strings/str_format.h"
#include "absl/strings/str_join.h"

namespace foray::api {
namespace {

absl::Status Invalid(const std::string& message) { return absl::InvalidArgumentError(message); }

// A robot's fewest minibatch steps per training epoch when its spec does not say. A robot's
// first rounds train on a few hundred transitions, one or two minibatches a pass, and stopped
// after a few dozen updates with a model that had not fitted its velocities. 20 was chosen
// before an A/B of 10 seeds on the arm and the bench (README, "Does exploration pay?"), where it
// raised evaluation success from 20% to 50% and from 10% to 40%, at no cost in wall time.
constexpr int kDefaultMinEpochSteps = 20;
// beta of the beta-NLL when the spec does not say. 0.5 is the paper's recommendation (Seitzer
// et al., ICLR 2022); it became the default after runs of 10 seeds where it beat the plain NLL
// on the bench (7/10 goals found against 5/10, evaluation success 50% against 0%), the gantry
// and the arm (70% against 50% each; README, "Does exploration pay?").
constexpr double kDefaultNllBeta = 0.5;

bool NameCharOk(char c) {
  return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') || c == '_' ||
         c == '.' || c == '-';
}

// Checks `values` has `want` finite entries; `field` names it in the message.
absl::Status CheckVector(const google::protobuf::RepeatedField<double>& values, int want,
                         const std::string& field, const std::string& what) {
  if (values.size() != want) {
    return Invalid(absl::StrFormat("%s has %d values, %s expects %d", field, values.size(), what,
                                   want));
  }
  for (int i = 0; i < values.size(); ++i) {
    if (!std::isfinite(values[i])) {
      return Invalid(absl::StrFormat("%s[%d] is %g, must be finite", field, i, values[i]));
    }
  }
  return absl::OkStatus();
}

// spec.state_limits as the rollouts' bounds (none when the list is empty), rounded outward to
// float so that every state within the spec's (double) limits stays untouched.
absl::Status StateBoundsFromSpec(const v1::RobotSpec& spec, plan::StateBounds* bounds) {
  if (spec.state_limits().empty()) return absl::OkStatus();
  const int dim = spec.state_size();
  constexpr float kInf = std::numeric_limits<float>::infinity();
  bounds->lower = Eigen::VectorXf::Constant(dim, -kInf);
  bounds->upper = Eigen::VectorXf::Constant(dim, kInf);
  std::vector<int> given_at(dim, -1);
  for (int i = 0; i < spec.state_limits_size(); ++i) {
    const v1::StateLimit& l = spec.state_limits(i);
    if (static_cast<int>(l.index()) >= dim) {
      return Invalid(absl::StrFormat("spec.state_limits[%d].index is %d, the state has %d values",
                                     i, l.index(), dim));
    }
    const int k = static_cast<int>(l.index());
    if (given_at[k] >= 0) {
      return Invalid(absl::StrFormat(
          "spec.state_limits[%d] and [%d] both limit state %d (%s); give one entry per dimension",
          given_at[k], i, k, spec.state(k).label()));
    }
    given_at[k] = i;
    if (!l.has_min() && !l.has_max()) {
      return Invalid(absl::StrFormat("spec.state_limits[%d] (state %d, %s) has neither min nor max",
                                     i, k, spec.state(k).label()));
    }
    if ((l.has_min() && !std::isfinite(l.min())) || (l.has_max() && !std::isfinite(l.max())) ||
        (l.has_min() && l.has_max() && !(l.min() <= l.max()))) {
      return Invalid(absl::StrFormat(
          "spec.state_limits[%d] (state %d, %s) has min %s and max %s; each given one must be "
          "finite, with min <= max",
          i, k, spec.state(k).label(), l.has_min() ? absl::StrFormat("%g", l.min()) : "(none)",
          l.has_max() ? absl::StrFormat("%g", l.max()) : "(none)"));
    }
    if (l.has_min()) bounds->lower[k] = FloatAtMost(l.min());
    if (l.has_max()) bounds->upper[k] = FloatAtLeast(l.max());
  }
  return absl::OkStatus();
}

}  // namespace

float FloatAtLeast(double x) {
  float f = static_cast<float>(x);
  if (static_cast<double>(f) < x) f = std::nextafter(f, std::numeric_limits<float>::infinity());
  return f;
}

float FloatAtMost(double x) {
  float f = static_cast<float>(x);
  if (static_cast<double>(f) > x) f = std::nextafter(f, -std::numeric_limits<float>::infinity());
  return f;
}

grpc::Status ToGrpc(const absl::Status& status) {
  if (status.ok()) return grpc::Status::OK;
  // absl and gRPC share the canonical code numbers.
  return grpc::Status(static_cast<grpc::StatusCode>(status.code()), std::string(status.message()));
}

absl::Status ApplyPlannerSettings(const v1::PlannerSettings& s, plan::PlannerOptions* o) {
  // The ranges are the options' own (PlannerOptions::Validate); here only what does not fit
  // an int is refused before it is converted.
  for (auto [name, value] : {std::pair{"horizon", s.horizon()}, {"population", s.population()},
                             {"elites", s.elites()}, {"iterations", s.iterations()},
                             {"particles", s.particles()}}) {
    if (value > static_cast<uint32_t>(std::numeric_limits<int>::max())) {
      return Invalid(absl::StrFormat("planner: %s is %d, far beyond its range", name, value));
    }
  }
  if (s.horizon() != 0) o->set_horizon(static_cast<int>(s.horizon()));
  if (s.population() != 0) o->cem.population = static_cast<int>(s.population());
  if (s.elites() != 0) o->cem.elites = static_cast<int>(s.elites());
  if (s.iterations() != 0) o->cem.iterations = static_cast<int>(s.iterations());
  if (s.particles() != 0) o->rollout.particles = static_cast<int>(s.particles());
  if (s.white_noise()) {
    o->cem.noise_beta = 0.0;
  } else if (s.noise_beta() != 0.0) {
    o->cem.noise_beta = s.noise_beta();
  }
  if (s.keep_fraction() != 0.0) o->cem.keep_fraction = s.keep_fraction();
  if (s.population_decay() != 0.0) o->cem.population_decay = s.population_decay();
  if (s.initial_std_fraction() != 0.0) o->cem.initial_std_fraction = s.initial_std_fraction();
  switch (s.propagation()) {
    case v1::PROPAGATION_UNSPECIFIED: break;
    case v1::PROPAGATION_TS_INF: o->rollout.propagation = plan::Propagation::kTsInf; break;
    case v1::PROPAGATION_TS1: o->rollout.propagation = plan::Propagation::kTs1; break;
    default:
      return Invalid(absl::StrFormat("planner.propagation is %d, not a known value",
                                     static_cast<int>(s.propagation())));
  }
  if (absl::Status st = o->Validate(); !st.ok()) {
    return Invalid(absl::StrCat("planner: ", st.message()));
  }
  return absl::OkStatus();
}

absl::Status ApplyObjectiveSettings(const v1::ObjectiveSettings& s, int state_dim, int action_dim,
                                    explore::ObjectiveOptions* o) {
  if (s.has_reward_weight()) o->reward_weight = s.reward_weight();
  if (s.has_information_weight()) o->information_weight = s.information_weight();
  if (s.has_discount()) o->discount = s.discount();
  switch (s.estimator()) {
    case v1::INFORMATION_ESTIMATOR_UNSPECIFIED: break;
    case v1::INFORMATION_ESTIMATOR_PAIRWISE_KL: o->estimator = explore::Estimator::kPairwiseKl; break;
    case v1::INFORMATION_ESTIMATOR_PAIRWISE_BHATTACHARYYA:
      o->estimator = explore::Estimator::kPairwiseBhattacharyya;
      break;
    case v1::INFORMATION_ESTIMATOR_JENSEN_RENYI_2: o->estimator = explore::Estimator::kJensenRenyi2; break;
    case v1::INFORMATION_ESTIMATOR_MONTE_CARLO: o->estimator = explore::Estimator::kMonteCarlo; break;
    default:
      return Invalid(absl::StrFormat("objective.estimator is %d, not a known value",
                                     static_cast<int>(s.estimator())));
  }
  if (s.has_known_reward()) {
    const v1::KnownReward& k = s.known_reward();
    explore::KnownReward known;
    if (k.has_quadratic()) {
      known.kind = explore::KnownReward::Kind::kQuadratic;
      known.target.assign(k.quadratic().target().begin(), k.quadratic().target().end());
      known.state_weight.assign(k.quadratic().weight().begin(), k.quadratic().weight().end());
    } else if (k.has_region()) {
      known.kind = explore::KnownReward::Kind::kRegion;
      for (uint32_t i : k.region().indices()) known.indices.push_back(static_cast<int>(i));
      known.lower.assign(k.region().lower().begin(), k.region().lower().end());
      known.upper.assign(k.region().upper().begin(), k.region().upper().end());
    }
    o->known_reward = std::move(known);
  }
  if (s.has_terminal_value()) o->terminal_value = s.terminal_value();
  if (s.has_observation_noise()) o->observation_noise = s.observation_noise();
  if (s.has_value_weight()) o->value_weight = s.value_weight();
  if (s.has_value_discount()) o->value_discount = s.value_discount();
  switch (s.value_estimate()) {
    case v1::VALUE_ESTIMATE_UNSPECIFIED:
      break;
    case v1::VALUE_ESTIMATE_AVERAGE:
      o->value_estimate = explore::ValueEstimate::kAverage;
      break;
    case v1::VALUE_ESTIMATE_BEST:
      o->value_estimate = explore::ValueEstimate::kBest;
      break;
    default:
      return Invalid(absl::StrFormat("objective.value_estimate is %d, not a known value",
                                     static_cast<int>(s.value_estimate())));
  }
  switch (s.reward_estimate()) {
    case v1::REWARD_ESTIMATE_UNSPECIFIED:
      break;
    case v1::REWARD_ESTIMATE_MODEL:
      o->reward_estimate = explore::RewardEstimate::kModel;
      break;
    case v1::REWARD_ESTIMATE_NEARBY:
      o->reward_estimate = explore::RewardEstimate::kNearby;
      break;
    default:
      return Invalid(absl::StrFormat("objective.reward_estimate is %d, not a known value",
                                     static_cast<int>(s.reward_estimate())));
  }
  if (s.has_known_termination()) {
    const v1::KnownTermination& k = s.known_termination();
    explore::KnownTermination known;
    for (uint32_t i : k.indices()) known.indices.push_back(static_cast<int>(std::min<uint32_t>(i, 1u << 30)));
    known.lower.assign(k.lower().begin(), k.lower().end());
    known.upper.assign(k.upper().begin(), k.upper().end());
    known.outside = k.outside();
    if (known.indices.empty()) {
      return Invalid("objective.known_termination has no indices; give the state indices of its box");
    }
    o->known_termination = std::move(known);
  }
  if (absl::Status st = o->Validate(state_dim, action_dim); !st.ok()) {
    return Invalid(absl::StrCat("objective: ", st.message()));
  }
  return absl::OkStatus();
}

absl::StatusOr<robot::RobotConfig> ConfigFromSpec(const v1::RobotSpec& spec) {
  robot::RobotConfig c;
  const std::string& name = spec.name();
  if (name.empty() || name.size() > 64) {
    return Invalid(absl::StrFormat("spec.name \"%s\" has %d characters, must have 1..64", name,
                                   name.size()));
  }
  for (char ch : name) {
    if (!NameCharOk(ch)) {
      return Invalid(absl::StrFormat(
          "spec.name \"%s\" has the character '%c'; use only A-Z a-z 0-9 _ . -", name, ch));
    }
  }
  c.name = name;
  c.state_dim = spec.state_size();
  c.action_dim = spec.action_size();
  if (c.state_dim < 1 || c.state_dim > 256) {
    return Invalid(absl::StrFormat("spec.state has %d dimensions, must have 1..256", c.state_dim));
  }
  if (c.action_dim < 1 || c.action_dim > 64) {
    return Invalid(absl::StrFormat("spec.action has %d dimensions, must have 1..64", c.action_dim));
  }
  if (spec.action_limits_size() != c.action_dim) {
    return Invalid(absl::StrFormat("spec.action_limits has %d entries, spec.action has %d",
                                   spec.action_limits_size(), c.action_dim));
  }
  c.limits.lower.resize(c.action_dim);
  c.limits.upper.resize(c.action_dim);
  c.limits.max_step.resize(c.action_dim);
  for (int j = 0; j < c.action_dim; ++j) {
    const v1::ActionLimit& l = spec.action_limits(j);
    if (!std::isfinite(l.min()) || !std::isfinite(l.max()) || !(l.min() < l.max())) {
      return Invalid(absl::StrFormat(
          "spec.action_limits[%d] has min %g and max %g; both must be finite with min < max", j,
          l.min(), l.max()));
    }
    if (!std::isfinite(l.max_step()) || l.max_step() < 0) {
      return Invalid(absl::StrFormat("spec.action_limits[%d].max_step is %g, must be >= 0", j,
                                     l.max_step()));
    }
    // The planner works in float: round the limits inward, so that every planned action
    // satisfies the spec's own (double) limits exactly.
    c.limits.lower[j] = FloatAtLeast(l.min());
    c.limits.upper[j] = FloatAtMost(l.max());
    c.limits.max_step[j] = l.max_step() == 0 ? 0.0f : FloatAtMost(l.max_step());
    if (!(c.limits.lower[j] < c.limits.upper[j]) || (l.max_step() > 0 && c.limits.max_step[j] <= 0)) {
      return Invalid(absl::StrFormat(
          "spec.action_limits[%d] (min %g, max %g, max_step %g) is too narrow for float precision",
          j, l.min(), l.max(), l.max_step()));
    }
  }
  if (!(spec.control_period_s() > 0) || !std::isfinite(spec.control_period_s())) {
    return Invalid(absl::StrFormat("spec.control_period_s is %g, must be > 0",
                                   spec.control_period_s()));
  }
  c.control_period_s = spec.control_period_s();

  const v1::ModelSettings& m = spec.model();
  if (m.ensemble_size() != 0) c.ensemble.ensemble_size = static_cast<int>(m.ensemble_size());
  if (m.hidden_widths_size() > 0) {
    c.ensemble.hidden_widths.assign(m.hidden_widths().begin(), m.hidden_widths().end());
  }
  switch (m.activation()) {
    case v1::ModelSettings::ACTIVATION_UNSPECIFIED:
    case v1::ModelSettings::ACTIVATION_SILU: c.ensemble.activation = model::Activation::kSilu; break;
    case v1::ModelSettings::ACTIVATION_RELU: c.ensemble.activation = model::Activation::kRelu; break;
    case v1::ModelSettings::ACTIVATION_TANH: c.ensemble.activation = model::Activation::kTanh; break;
    default:
      return Invalid(absl::StrFormat("spec.model.activation is %d, not a known value",
                                     static_cast<int>(m.activation())));
  }
  if (absl::Status st = c.ensemble.Validate(); !st.ok()) {
    return Invalid(absl::StrCat("spec.model: ", st.message()));
  }

  const v1::TrainingSettings& t = spec.training();
  if (t.every_n_transitions() != 0) c.policy.every_n_transitions = static_cast<int>(t.every_n_transitions());
  c.policy.at_episode_end = !t.no_train_at_episode_end();
  if (t.min_transitions() != 0) c.policy.min_transitions = static_cast<int>(t.min_transitions());
  if (c.policy.min_transitions < 2) {
    return Invalid(absl::StrFormat("spec.training.min_transitions is %d, must be >= 2",
                                   c.policy.min_transitions));
  }
  if (t.learning_rate() != 0) c.training.learning_rate = t.learning_rate();
  if (t.weight_decay() != 0) c.training.weight_decay = t.weight_decay();
  if (t.batch_size() != 0) c.training.batch_size = static_cast<int>(t.batch_size());
  if (t.max_epochs() != 0) c.training.max_epochs = static_cast<int>(t.max_epochs());
  c.training.min_epoch_steps =
      t.min_epoch_steps() != 0 ? static_cast<int>(t.min_epoch_steps()) : kDefaultMinEpochSteps;
  if (t.holdout_fraction() != 0) c.training.holdout_fraction = t.holdout_fraction();
  if (t.patience() != 0) c.training.patience = static_cast<int>(t.patience());
  c.training.nll_beta = t.has_nll_beta() ? t.nll_beta() : kDefaultNllBeta;
  c.training.reward_nll_beta = t.has_reward_nll_beta() ? t.reward_nll_beta() : c.training.nll_beta;
  if (spec.has_seed()) {
    c.planner.cem.seed = spec.seed();
    c.training.seed = spec.seed();
  }
  if (absl::Status st = c.training.Validate(); !st.ok()) {
    return Invalid(absl::StrCat("spec.training: ", st.message()));
  }

  if (absl::Status st = ApplyPlannerSettings(spec.planner(), &c.planner); !st.ok()) {
    return Invalid(absl::StrCat("spec.", st.message()));
  }
  if (absl::Status st = StateBoundsFromSpec(spec, &c.planner.rollout.state_bounds); !st.ok()) {
    return st;
  }
  if (absl::Status st = ApplyObjectiveSettings(spec.objective(), c.state_dim, c.action_dim,
                                               &c.objective);
      !st.ok()) {
    return Invalid(absl::StrCat("spec.", st.message()));
  }
  for (uint32_t i : spec.coverage_indices()) {
    if (static_cast<int>(i) >= c.state_dim) {
      return Invalid(absl::StrFormat("spec.coverage_indices has %d, the state has %d values", i,
                                     c.state_dim));
    }
  }
  if (spec.coverage_indices_size() == 2) {
    c.coverage_indices = {static_cast<int>(spec.coverage_indices(0)),
                          static_cast<int>(spec.coverage_indices(1))};
  } else if (spec.coverage_indices_size() == 0) {
    c.coverage_indices = {0, c.state_dim > 1 ? 1 : 0};
  } else {
    return Invalid(absl::StrFormat("spec.coverage_indices has %d entries, needs 2 (or none)",
                                   spec.coverage_indices_size()));
  }
  if (spec.coverage_lower_size() != 0 || spec.coverage_upper_size() != 0) {
    if (spec.coverage_lower_size() != 2 || spec.coverage_upper_size() != 2) {
      return Invalid(absl::StrFormat(
          "spec.coverage_lower and coverage_upper have %d and %d values, need 2 each (or none)",
          spec.coverage_lower_size(), spec.coverage_upper_size()));
    }
    for (int k = 0; k < 2; ++k) {
      if (!(spec.coverage_lower(k) < spec.coverage_upper(k))) {
        return Invalid(absl::StrFormat("spec.coverage range %d is [%g, %g]; lower must be < upper",
                                       k, spec.coverage_lower(k), spec.coverage_upper(k)));
      }
    }
    c.coverage_lower.assign(spec.coverage_lower().begin(), spec.coverage_lower().end());
    c.coverage_upper.assign(spec.coverage_upper().begin(), spec.coverage_upper().end());
  }
  if (spec.has_success_return()) {
    if (!std::isfinite(spec.success_return())) {
      return Invalid(absl::StrFormat("spec.success_return is %g, must be finite", spec.success_return()));
    }
    c.success_return = spec.success_return();
  }
  if (spec.coverage_cells() != 0) c.coverage_cells = static_cast<int>(spec.coverage_cells());
  if (c.coverage_cells < 1 || c.coverage_cells > 200) {
    return Invalid(absl::StrFormat("spec.coverage_cells is %d, must be in 1..200", c.coverage_cells));
  }
  return c;
}

absl::StatusOr<std::vector<store::TransitionRecord>> TransitionsFromWire(
    const google::protobuf::RepeatedPtrField<v1::Transition>& transitions,
    const robot::RobotConfig& c) {
  if (transitions.empty()) return Invalid("transitions is empty; send 1..10000 per request");
  if (transitions.size() > 10000) {
    return Invalid(absl::StrFormat("transitions has %d entries, at most 10000 per request",
                                   transitions.size()));
  }
  std::vector<store::TransitionRecord> out;
  out.reserve(transitions.size());
  uint64_t previous = 0;
  for (int i = 0; i < transitions.size(); ++i) {
    const v1::Transition& t = transitions[i];
    const std::string at = absl::StrFormat("transitions[%d] (seq %d)", i, t.seq());
    if (t.seq() == 0) return Invalid(absl::StrFormat("transitions[%d].seq is 0, must be >= 1", i));
    if (i > 0 && t.seq() <= previous) {
      return Invalid(absl::StrFormat(
          "transitions[%d].seq is %d after %d; seq must increase strictly within a request", i,
          t.seq(), previous));
    }
    previous = t.seq();
    const std::string robot = absl::StrFormat("robot \"%s\"", c.name);
    if (absl::Status s = CheckVector(t.state(), c.state_dim, at + ".state", robot); !s.ok()) return s;
    if (absl::Status s = CheckVector(t.action(), c.action_dim, at + ".action", robot); !s.ok()) return s;
    if (absl::Status s = CheckVector(t.next_state(), c.state_dim, at + ".next_state", robot); !s.ok()) {
      return s;
    }
    if (!std::isfinite(t.reward())) {
      return Invalid(absl::StrFormat("%s.reward is %g, must be finite", at, t.reward()));
    }
    for (int j = 0; j < c.action_dim; ++j) {
      // The config keeps the bounds in float: allow their rounding (1e-6 of the range).
      const double slack = 1e-6 * (static_cast<double>(c.limits.upper[j]) - c.limits.lower[j]);
      if (t.action(j) < c.limits.lower[j] - slack || t.action(j) > c.limits.upper[j] + slack) {
        return Invalid(absl::StrFormat("%s.action[%d] is %g, outside the limits [%g, %g]", at, j,
                                       t.action(j), c.limits.lower[j], c.limits.upper[j]));
      }
    }
    store::TransitionRecord r;
    r.seq = t.seq();
    r.episode = t.episode();
    r.step = t.step();
    r.state.assign(t.state().begin(), t.state().end());
    r.action.assign(t.action().begin(), t.action().end());
    r.next_state.assign(t.next_state().begin(), t.next_state().end());
    r.reward = t.reward();
    r.terminal = t.terminal();
    if (t.has_measured_at()) {
      r.measured_at = store::TimeFromWire(t.measured_at());
    }
    out.push_back(std::move(r));
  }
  return out;
}

namespace {

std::string FloatBytes(const float* data, int count) {
  return std::string(reinterpret_cast<const char*>(data), sizeof(float) * count);
}

absl::Status ReadFloats(const std::string& bytes, int count, const std::string& field, float* out) {
  if (bytes.size() != sizeof(float) * static_cast<size_t>(count)) {
    return Invalid(absl::StrFormat("model.%s has %d bytes, expected %d (%d float32)", field,
                                   bytes.size(), sizeof(float) * count, count));
  }
  std::memcpy(out, bytes.data(), bytes.size());
  for (int i = 0; i < count; ++i) {
    if (!std::isfinite(out[i])) {
      return Invalid(absl::StrFormat("model.%s[%d] is %g, must be finite", field, i, out[i]));
    }
  }
  return absl::OkStatus();
}

}  // namespace

v1::EnsembleModel EnsembleToWire(const model::Ensemble& e) {
  v1::EnsembleModel w;
  w.set_format(1);
  w.set_model_version(e.version());
  w.set_state_dim(e.state_dim());
  w.set_action_dim(e.action_dim());
  switch (e.activation()) {
    case model::Activation::kSilu: w.set_activation(v1::ModelSettings::ACTIVATION_SILU); break;
    case model::Activation::kRelu: w.set_activation(v1::ModelSettings::ACTIVATION_RELU); break;
    case model::Activation::kTanh: w.set_activation(v1::ModelSettings::ACTIVATION_TANH); break;
  }
  for (int b = 0; b < e.size(); ++b) {
    v1::EnsembleModel::Member* member = w.add_members();
    const float* p = e.params().col(b).data();
    for (int l = 0; l < e.num_layers(); ++l) {
      v1::EnsembleModel::Layer* layer = member->add_layers();
      layer->set_rows(e.layer_fan_in(l));
      layer->set_cols(e.layer_fan_out(l));
      layer->set_weights(FloatBytes(p + e.weight_offset(l), e.layer_fan_in(l) * e.layer_fan_out(l)));
      layer->set_bias(FloatBytes(p + e.bias_offset(l), e.layer_fan_out(l)));
    }
  }
  w.set_input_mean(FloatBytes(e.input_normalizer().mean().data(), e.input_dim()));
  w.set_input_std(FloatBytes(e.input_normalizer().std().data(), e.input_dim()));
  w.set_output_mean(FloatBytes(e.output_normalizer().mean().data(), e.output_dim()));
  w.set_output_std(FloatBytes(e.output_normalizer().std().data(), e.output_dim()));
  w.set_max_log_var(FloatBytes(e.max_log_var().data(), e.output_dim()));
  w.set_min_log_var(FloatBytes(e.min_log_var().data(), e.output_dim()));
  w.set_termination_head(e.has_termination_head());
  return w;
}

absl::StatusOr<model::Ensemble> EnsembleFromWire(const v1::EnsembleModel& w) {
  if (w.format() != 1) {
    return Invalid(absl::StrFormat("model.format is %d; this server reads format 1", w.format()));
  }
  if (w.members_size() < 1) return Invalid("model.members is empty");
  const v1::EnsembleModel::Member& first = w.members(0);
  if (first.layers_size() < 2) {
    return Invalid(absl::StrFormat("model.members[0] has %d layers, needs at least 2",
                                   first.layers_size()));
  }
  model::EnsembleOptions options;
  options.ensemble_size = w.members_size();
  options.termination_head = w.termination_head();
  options.hidden_widths.clear();
  for (int l = 0; l + 1 < first.layers_size(); ++l) {
    options.hidden_widths.push_back(static_cast<int>(first.layers(l).cols()));
  }
  switch (w.activation()) {
    case v1::ModelSettings::ACTIVATION_UNSPECIFIED:
    case v1::ModelSettings::ACTIVATION_SILU: options.activation = model::Activation::kSilu; break;
    case v1::ModelSettings::ACTIVATION_RELU: options.activation = model::Activation::kRelu; break;
    case v1::ModelSettings::ACTIVATION_TANH: options.activation = model::Activation::kTanh; break;
    default: return Invalid(absl::StrFormat("model.activation is %d, not a known value",
                                            static_cast<int>(w.activation())));
  }
  absl::StatusOr<model::Ensemble> created = model::Ensemble::Create(
      static_cast<int>(w.state_dim()), static_cast<int>(w.action_dim()), options, 1);
  if (!created.ok()) return Invalid(absl::StrCat("model: ", created.status().message()));
  model::Ensemble e = *std::move(created);
  for (int b = 0; b < e.size(); ++b) {
    const v1::EnsembleModel::Member& member = w.members(b);
    if (member.layers_size() != e.num_layers()) {
      return Invalid(absl::StrFormat("model.members[%d] has %d layers, members[0] has %d", b,
                                     member.layers_size(), e.num_layers()));
    }
    float* p = e.mutable_params().col(b).data();
    for (int l = 0; l < e.num_layers(); ++l) {
      const v1::EnsembleModel::Layer& layer = member.layers(l);
      const std::string at = absl::StrFormat("members[%d].layers[%d]", b, l);
      if (static_cast<int>(layer.rows()) != e.layer_fan_in(l) ||
          static_cast<int>(layer.cols()) != e.layer_fan_out(l)) {
        return Invalid(absl::StrFormat("model.%s is %dx%d, the architecture needs %dx%d", at,
                                       layer.rows(), layer.cols(), e.layer_fan_in(l),
                                       e.layer_fan_out(l)));
      }
      if (absl::Status s = ReadFloats(layer.weights(), e.layer_fan_in(l) * e.layer_fan_out(l),
                                      at + ".weights", p + e.weight_offset(l));
          !s.ok()) {
        return s;
      }
      if (absl::Status s = ReadFloats(layer.bias(), e.layer_fan_out(l), at + ".bias",
                                      p + e.bias_offset(l));
          !s.ok()) {
        return s;
      }
    }
  }
  const int in = e.input_dim(), out = e.output_dim();
  struct Vec {
    const std::string* bytes;
    int count;
    const char* field;
    Eigen::VectorXf* target;
  };
  Eigen::VectorXf in_mean(in), in_std(in), out_mean(out), out_std(out), max_lv(out), min_lv(out);
  for (const Vec& v : {Vec{&w.input_mean(), in, "input_mean", &in_mean},
                       Vec{&w.input_std(), in, "input_std", &in_std},
                       Vec{&w.output_mean(), out, "output_mean", &out_mean},
                       Vec{&w.output_std(), out, "output_std", &out_std},
                       Vec{&w.max_log_var(), out, "max_log_var", &max_lv},
                       Vec{&w.min_log_var(), out, "min_log_var", &min_lv}}) {
    if (absl::Status s = ReadFloats(*v.bytes, v.count, v.field, v.target->data()); !s.ok()) return s;
  }
  if ((in_std.array() <= 0).any() || (out_std.array() <= 0).any()) {
    return Invalid("model.input_std and model.output_std must be > 0");
  }
  e.mutable_input_normalizer().mutable_mean() = in_mean;
  e.mutable_input_normalizer().mutable_std() = in_std;
  e.mutable_output_normalizer().mutable_mean() = out_mean;
  e.mutable_output_normalizer().mutable_std() = out_std;
  e.mutable_max_log_var() = max_lv;
  e.mutable_min_log_var() = min_lv;
  return e;
}

absl::StatusOr<robot::PlanInput> PlanInputFromWire(const v1::PlanRequest& request,
                                                   const robot::RobotConfig& config,
                                                   absl::Time arrived) {
  robot::PlanInput in;
  if (request.state_size() != config.state_dim) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "request.state has %d values, robot \"%s\" expects %d", request.state_size(), config.name,
        config.state_dim));
  }
  in.state.resize(config.state_dim);
  for (int k = 0; k < config.state_dim; ++k) {
    if (!std::isfinite(request.state(k))) {
      return absl::InvalidArgumentError(
          absl::StrFormat("request.state[%d] is %g, must be finite", k, request.state(k)));
    }
    in.state[k] = static_cast<float>(request.state(k));
  }
  if (request.previous_action_size() != 0) {
    if (request.previous_action_size() != config.action_dim) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "request.previous_action has %d values, robot \"%s\" expects %d",
          request.previous_action_size(), config.name, config.action_dim));
    }
    in.previous_action.resize(config.action_dim);
    for (int j = 0; j < config.action_dim; ++j) {
      const double a = request.previous_action(j);
      const double slack = 1e-6 * (static_cast<double>(config.limits.upper[j]) - config.limits.lower[j]);
      if (!std::isfinite(a) || a < config.limits.lower[j] - slack || a > config.limits.upper[j] + slack) {
        return absl::InvalidArgumentError(absl::StrFormat(
            "request.previous_action[%d] is %g, outside the limits [%g, %g]", j, a,
            config.limits.lower[j], config.limits.upper[j]));
      }
      in.previous_action[j] =
          std::clamp(static_cast<float>(a), config.limits.lower[j], config.limits.upper[j]);
    }
    // The first step's rate limit is kept against the float previous action; shrink it by that
    // rounding (and clipping), so that it also holds against the client's own value.
    if (config.limits.max_step.size() == config.action_dim) {
      in.max_step = config.limits.max_step;
      for (int j = 0; j < config.action_dim; ++j) {
        if (in.max_step[j] == 0.0f) continue;
        const double error = std::abs(static_cast<double>(in.previous_action[j]) -
                                      request.previous_action(j));
        in.max_step[j] = std::max(FloatAtMost(in.max_step[j] - error),
                                  std::numeric_limits<float>::denorm_min());
      }
    }
  }
  const double deadline_ms = request.deadline_ms() == 0 ? 100.0 : request.deadline_ms();
  if (!(deadline_ms >= 1.0 && deadline_ms <= 60000.0)) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "request.deadline_ms is %g, must be in 1..60000", request.deadline_ms()));
  }
  in.deadline = arrived + absl::Milliseconds(deadline_ms);
  in.planner = config.planner;
  in.objective = config.objective;
  if (request.has_planner()) {
    if (absl::Status s = ApplyPlannerSettings(request.planner(), &in.planner); !s.ok()) {
      return absl::InvalidArgumentError(absl::StrCat("request.", s.message()));
    }
  }
  if (request.has_objective()) {
    if (absl::Status s = ApplyObjectiveSettings(request.objective(), config.state_dim,
                                                config.action_dim, &in.objective);
        !s.ok()) {
      return absl::InvalidArgumentError(absl::StrCat("request.", s.message()));
    }
  }
  in.evaluate = request.evaluate();
  in.episode = request.episode();
  return in;
}

}  // namespace foray::api
