#include "core/plan/rollout.h"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <limits>

#include "absl/strings/str_format.h"
#include "core/util/random.h"
#include "core/util/status_macros.h"

namespace foray::plan {
namespace {

using Clock = std::chrono::steady_clock;

double SecondsSince(Clock::time_point start) {
  return std::chrono::duration<double>(Clock::now() - start).count();
}

// log-variance standing in for "no noise": exp(-60) is below float resolution of any state.
constexpr float kDeterministicLogVar = -60.0f;

}  // namespace

EnsembleRolloutModel::EnsembleRolloutModel(const model::Ensemble& ensemble)
    : state_dim_(ensemble.state_dim()),
      action_dim_(ensemble.action_dim()),
      packed_(ensemble),
      input_mean_(ensemble.input_normalizer().mean()),
      input_inv_std_(ensemble.input_normalizer().std().cwiseInverse()),
      output_mean_(ensemble.output_normalizer().mean()),
      output_std_(ensemble.output_normalizer().std()) {
  const std::vector<int>& widths = ensemble.hidden_widths();
  int fan_in = ensemble.input_dim();
  for (int w : widths) {
    flops_per_member_row_ += 2.0 * fan_in * w;
    fan_in = w;
  }
  flops_per_member_row_ += 2.0 * fan_in * ensemble.layer_fan_out(ensemble.num_layers() - 1);
}

void EnsembleRolloutModel::Evaluate(const float* states, const float* actions, int rows,
                                    MemberPredictions* out) const {
  const int in_dim = state_dim_ + action_dim_;
  const int od = state_dim_ + 1;
  const int nb = packed_.size();
  out->members = nb;
  out->rows = rows;
  out->output_dim = od;
  out->mean.resize(static_cast<size_t>(nb) * rows * od);
  out->log_var.resize(out->mean.size());
  out->term_logit.resize(packed_.has_termination_head() ? static_cast<size_t>(nb) * rows : 0);
  out->input.resize(static_cast<size_t>(rows) * in_dim);
  out->scale = output_std_;
  out->offset = output_mean_;
  float* x = out->input.data();
  for (int r = 0; r < rows; ++r) {
    const float* s = states + static_cast<std::ptrdiff_t>(r) * state_dim_;
    const float* a = actions + static_cast<std::ptrdiff_t>(r) * action_dim_;
    float* xr = x + static_cast<std::ptrdiff_t>(r) * in_dim;
    constexpr float kClip = model::Ensemble::kInputClip;
    for (int k = 0; k < state_dim_; ++k) {
      xr[k] = std::clamp((s[k] - input_mean_[k]) * input_inv_std_[k], -kClip, kClip);
    }
    for (int j = 0; j < action_dim_; ++j) {
      const int k = state_dim_ + j;
      xr[k] = std::clamp((a[j] - input_mean_[k]) * input_inv_std_[k], -kClip, kClip);
    }
  }
  for (int b = 0; b < nb; ++b) {
    const std::ptrdiff_t at = static_cast<std::ptrdiff_t>(b) * rows * od;
    packed_.ForwardMember(b, x, rows, out->mean.data() + at, out->log_var.data() + at,
                        &out->forward,
                        out->term_logit.empty() ? nullptr
                                                : out->term_logit.data() + static_cast<size_t>(b) * rows);
  }
}

LinearRolloutModel::LinearRolloutModel(Eigen::MatrixXf a, Eigen::MatrixXf b, Eigen::VectorXf c)
    : a_(std::move(a)), b_(std::move(b)), c_(std::move(c)) {
  FORAY_CHECK(a_.rows() == a_.cols() && b_.rows() == a_.rows() && c_.size() == a_.rows(),
              "LinearRolloutModel: A must be square and B, c have its row count");
}

void LinearRolloutModel::Evaluate(const float* states, const float* actions, int rows,
                                  MemberPredictions* out) const {
  const int sd = state_dim(), ad = action_dim(), od = sd + 1;
  out->members = 1;
  out->rows = rows;
  out->output_dim = od;
  out->mean.assign(static_cast<size_t>(rows) * od, 0.0f);
  out->log_var.assign(out->mean.size(), kDeterministicLogVar);
  out->term_logit.clear();
  out->scale = Eigen::VectorXf::Ones(od);
  out->offset = Eigen::VectorXf::Zero(od);
  using RowMajor = RowMatrixXf;
  Eigen::Map<const RowMajor> s(states, rows, sd);
  Eigen::Map<const RowMajor> u(actions, rows, ad);
  Eigen::Map<RowMajor, 0, Eigen::OuterStride<>> delta(out->mean.data(), rows, sd,
                                                      Eigen::OuterStride<>(od));
  delta = s * (a_.transpose() - Eigen::MatrixXf::Identity(sd, sd)) + u * b_.transpose();
  delta.rowwise() += c_.transpose();
}

absl::Status StateBounds::Validate(int state_dim) const {
  if (!given()) return absl::OkStatus();
  if (lower.size() != state_dim || upper.size() != state_dim) {
    return absl::InvalidArgumentError(
        absl::StrFormat("state bounds have %d lower and %d upper values, the state has %d",
                        lower.size(), upper.size(), state_dim));
  }
  for (int k = 0; k < state_dim; ++k) {
    const float lo = lower[k], hi = upper[k];
    if (std::isnan(lo) || std::isnan(hi) || lo == std::numeric_limits<float>::infinity() ||
        hi == -std::numeric_limits<float>::infinity() || !(lo <= hi)) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "state bound %d is [%g, %g]; needs lower <= upper, each finite or unbounded on its side",
          k, lo, hi));
    }
  }
  return absl::OkStatus();
}

absl::Status RolloutOptions::Validate() const {
  if (horizon < 1 || horizon > CemOptions::kMaxHorizon) {
    return absl::InvalidArgumentError(
        absl::StrFormat("horizon is %d, must be in 1..%d", horizon, CemOptions::kMaxHorizon));
  }
  if (particles < 1 || particles > kMaxParticles) {
    return absl::InvalidArgumentError(
        absl::StrFormat("particles is %d, must be in 1..%d", particles, kMaxParticles));
  }
  if (propagation != Propagation::kTsInf && propagation != Propagation::kTs1) {
    return absl::InvalidArgumentError("propagation is not TS-inf or TS1");
  }
  return absl::OkStatus();
}

void ScoreSequences(const RolloutModel& model, const explore::ObjectiveOptions& objective,
                    const RolloutOptions& options, const float* initial_state,
                    const float* sequences, int candidates, uint64_t seed, float* scores,
                    RolloutWorkspace* ws, RolloutTrace* trace, RolloutStats* stats) {
  const int sd = model.state_dim(), ad = model.action_dim(), od = sd + 1;
  const int horizon = options.horizon, particles = options.particles;
  const int nb = model.members();
  const int rows = candidates * particles;
  const std::ptrdiff_t seq_stride = static_cast<std::ptrdiff_t>(horizon) * ad;
  const bool learned_reward = objective.known_reward.kind == explore::KnownReward::Kind::kLearned;
  const StateValue* nearby_reward =
      learned_reward && objective.reward_estimate == explore::RewardEstimate::kNearby
          ? options.nearby_reward.get()
          : nullptr;
  FORAY_CHECK(nearby_reward == nullptr || nearby_reward->state_dim() == sd,
              "ScoreSequences: the nearby reward does not fit the model");
  const bool want_information = objective.information_weight != 0.0 || trace != nullptr;
  const StateBounds& bounds = options.state_bounds;
  FORAY_CHECK(bounds.Validate(sd).ok(), "ScoreSequences: state bounds do not fit the model");
  std::vector<int> bounded_dims;  // the dimensions with a finite bound on either side
  if (bounds.given()) {
    for (int k = 0; k < sd; ++k) {
      if (std::isfinite(bounds.lower[k]) || std::isfinite(bounds.upper[k]))
        bounded_dims.push_back(k);
    }
  }
  const bool bounded = !bounded_dims.empty();

  // Draws shared by every candidate: member choice and standard-normal noise per (t, p).
  Rng rng(seed);
  ws->member_of.resize(static_cast<size_t>(horizon) * particles);
  ws->noise.resize(static_cast<size_t>(horizon) * particles * sd);
  for (int t = 0; t < horizon; ++t) {
    for (int p = 0; p < particles; ++p) {
      ws->member_of[t * particles + p] =
          options.propagation == Propagation::kTsInf
              ? p % nb
              : static_cast<int>(rng.UniformInt(static_cast<uint64_t>(nb)));
      for (int k = 0; k < sd; ++k) {
        ws->noise[(static_cast<size_t>(t) * particles + p) * sd + k] =
            static_cast<float>(rng.Normal());
      }
    }
  }

  ws->states.resize(static_cast<size_t>(rows) * sd);
  for (int r = 0; r < rows; ++r) std::copy(initial_state, initial_state + sd, &ws->states[r * sd]);
  ws->actions.resize(static_cast<size_t>(rows) * ad);
  ws->reward.resize(rows);
  ws->information.assign(rows, 0.0f);
  ws->survival.assign(rows, 1.0f);
  if (trace != nullptr) ws->alive_before.assign(particles, 1.0f);
  ws->ends.assign(rows, 0.0f);
  const bool known_termination = objective.known_termination.given();
  const double v_term = objective.terminal_value;
  std::vector<double> total(candidates, 0.0);
  if (trace != nullptr) {
    trace->state_mean.setZero(horizon, sd);
    trace->state_std.setZero(horizon, sd);
    trace->expected_reward.setZero(horizon);
    trace->information_gain.setZero(horizon);
    trace->survival.setOnes(horizon);
    trace->min_survival.setOnes(horizon);
  }

  MemberPredictions& pred = ws->predictions;
  const double w_r = objective.reward_weight, w_i = objective.information_weight;
  double discount = 1.0;
  for (int t = 0; t < horizon; ++t) {
    for (int n = 0; n < candidates; ++n) {
      const float* a = sequences + n * seq_stride + static_cast<std::ptrdiff_t>(t) * ad;
      for (int p = 0; p < particles; ++p) {
        std::copy(a, a + ad, &ws->actions[(static_cast<size_t>(n) * particles + p) * ad]);
      }
    }
    // At the first step every particle of a candidate is at the initial state with the
    // candidate's first action, so the members are evaluated once per candidate (row n of the
    // predictions stands for rows n * particles ... n * particles + particles - 1). The model
    // and the closed-form estimators treat rows independently, so the scores are those of
    // evaluating every particle (the Monte Carlo estimator draws per row, so there the particles
    // share one estimate instead of drawing their own); the step is 1/horizon of the work, of
    // which this saves (particles-1)/particles.
    const bool shared = t == 0 && particles > 1;
    const int evaluated = shared ? candidates : rows;
    const float* eval_actions = ws->actions.data();
    if (shared) {
      ws->first_actions.resize(static_cast<size_t>(candidates) * ad);
      for (int n = 0; n < candidates; ++n) {
        std::copy_n(sequences + n * seq_stride, ad,
                    &ws->first_actions[static_cast<size_t>(n) * ad]);
      }
      eval_actions = ws->first_actions.data();
    }
    auto start = Clock::now();
    model.Evaluate(ws->states.data(), eval_actions, evaluated, &pred);
    if (stats != nullptr) {
      stats->model_seconds += SecondsSince(start);
      stats->model_flops += model.FlopsPerMemberRow() * evaluated * nb;
    }
    if (bounded) {
      // Every member's mean next state held inside the bounds (in model units: robot next
      // state = s + mean * scale + offset), where the information gain and the sampling see it.
      for (int b = 0; b < nb; ++b) {
        for (int e = 0; e < evaluated; ++e) {
          const float* s = &ws->states[static_cast<size_t>(shared ? e * particles : e) * sd];
          float* mu = pred.mean.data() + (static_cast<std::ptrdiff_t>(b) * evaluated + e) * od;
          for (int k : bounded_dims) {
            const float base = s[k] + pred.offset[k];
            const float next = base + mu[k] * pred.scale[k];
            const float held = std::clamp(next, bounds.lower[k], bounds.upper[k]);
            if (held != next) mu[k] = (held - base) / pred.scale[k];
          }
        }
      }
    }
    if (want_information) {
      start = Clock::now();
      explore::Information(objective.estimator,
                           pred.ObservationSet(static_cast<float>(objective.observation_noise),
                                               &ws->observed_log_var),
                           ws->information.data(),
                           objective.monte_carlo_samples, DeriveSeed(seed, t));
      // Spread row n to its particles; from the top down, so no source is overwritten first.
      if (shared) {
        for (int r = rows - 1; r >= 0; --r) ws->information[r] = ws->information[r / particles];
      }
      if (stats != nullptr) stats->information_seconds += SecondsSince(start);
    }
    for (int r = 0; r < rows; ++r) {
      const int p = r % particles;
      const int m = ws->member_of[t * particles + p];
      const int source = shared ? r / particles : r;
      const std::ptrdiff_t at = (static_cast<std::ptrdiff_t>(m) * evaluated + source) * od;
      const float* mu = pred.mean.data() + at;
      const float* lv = pred.log_var.data() + at;
      const float* eps = &ws->noise[(static_cast<size_t>(t) * particles + p) * sd];
      float* s = &ws->states[static_cast<size_t>(r) * sd];
      for (int k = 0; k < sd; ++k) {
        s[k] += (mu[k] + std::exp(0.5f * lv[k]) * eps[k]) * pred.scale[k] + pred.offset[k];
      }
      for (int k : bounded_dims) s[k] = std::clamp(s[k], bounds.lower[k], bounds.upper[k]);
      if (learned_reward && nearby_reward == nullptr) {
        ws->reward[r] = mu[sd] * pred.scale[sd] + pred.offset[sd];
      }
      if (!known_termination && !pred.term_logit.empty()) {
        const float z = pred.term_logit[static_cast<size_t>(m) * evaluated + source];
        ws->ends[r] = 1.0f / (1.0f + std::exp(-z));
      }
    }
    if (nearby_reward != nullptr) {
      nearby_reward->Evaluate(ws->states.data(), sd, rows, ws->reward.data());
    } else if (!learned_reward) {
      objective.known_reward.Evaluate(ws->states.data(), sd, ws->actions.data(), ad, rows, sd,
                                      ad, ws->reward.data());
    }
    if (known_termination) {
      objective.known_termination.Evaluate(ws->states.data(), sd, rows, ws->ends.data());
    }
    // Without a way to end (no head, no region) every survival stays 1 and the sum is the
    // plain one.
    const bool can_end = known_termination || !pred.term_logit.empty();
    for (int n = 0; n < candidates; ++n) {
      double step = 0.0;
      for (int p = 0; p < particles; ++p) {
        const int r = n * particles + p;
        const double value = w_r * ws->reward[r] + (w_i != 0.0 ? w_i * ws->information[r] : 0.0);
        if (can_end) {
          const double alive = ws->survival[r];
          if (trace != nullptr && n == 0) ws->alive_before[p] = static_cast<float>(alive);
          const double ended = alive * ws->ends[r];
          step += alive * value + ended * v_term;
          ws->survival[r] = static_cast<float>(alive - ended);
        } else {
          step += value;
        }
      }
      total[n] += discount * step / particles;
    }
    if (trace != nullptr) {
      for (int k = 0; k < sd; ++k) {
        double sum = 0.0, sum_sq = 0.0;
        for (int p = 0; p < particles; ++p) {
          const double v = ws->states[static_cast<size_t>(p) * sd + k];
          sum += v;
          sum_sq += v * v;
        }
        const double mean = sum / particles;
        trace->state_mean(t, k) = static_cast<float>(mean);
        trace->state_std(t, k) =
            static_cast<float>(std::sqrt(std::max(0.0, sum_sq / particles - mean * mean)));
      }
      // Unconditional expectations: an ended episode earns no reward and no information.
      double reward = 0.0, information = 0.0;
      for (int p = 0; p < particles; ++p) {
        reward += ws->alive_before[p] * ws->reward[p];
        information += ws->alive_before[p] * ws->information[p];
      }
      trace->expected_reward[t] = static_cast<float>(reward / particles);
      trace->information_gain[t] = static_cast<float>(information / particles);
      double alive = 0.0;
      float lowest = 1.0f;
      for (int p = 0; p < particles; ++p) {
        alive += ws->survival[p];
        lowest = std::min(lowest, ws->survival[p]);
      }
      trace->survival[t] = static_cast<float>(alive / particles);
      trace->min_survival[t] = lowest;
    }
    discount *= objective.discount;
  }
  // What follows the horizon: gamma^H w_v (1/P) sum_p s_{p,H} V(x_{p,H}).
  if (options.value != nullptr && objective.value_weight != 0.0) {
    FORAY_CHECK(options.value->state_dim() == sd,
                "ScoreSequences: the state value does not fit the model");
    ws->value.resize(rows);
    options.value->Evaluate(ws->states.data(), sd, rows, ws->value.data());
    for (int n = 0; n < candidates; ++n) {
      double beyond = 0.0;
      for (int p = 0; p < particles; ++p) {
        const int r = n * particles + p;
        beyond += static_cast<double>(ws->survival[r]) * ws->value[r];
      }
      beyond /= particles;
      total[n] += discount * objective.value_weight * beyond;
      if (trace != nullptr && n == 0) trace->value_beyond = beyond;
    }
  } else if (trace != nullptr) {
    trace->value_beyond = 0.0;
  }
  for (int n = 0; n < candidates; ++n) scores[n] = static_cast<float>(total[n]);
}

}  // namespace foray::plan
