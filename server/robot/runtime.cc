#include "server/robot/runtime.h"

#include <algorithm>
#include <chrono>
#include <cmath>
#include <utility>

#include "absl/strings/str_format.h"
#include "core/explore/information_gain.h"
#include "core/model/serialize.h"
#include "core/util/matrix.h"
#include "core/util/random.h"

namespace foray::robot {

namespace {

std::shared_ptr<const PublishedModel> MakePublished(uint64_t version, model::Ensemble ensemble,
                                              model::TrainingReport report, double seconds,
                                              absl::Time finished_at) {
  auto m = std::make_shared<PublishedModel>();
  m->version = version;
  ensemble.set_version(version);
  m->ensemble = std::move(ensemble);
  m->rollout = std::make_unique<const plan::EnsembleRolloutModel>(m->ensemble);
  m->report = std::move(report);
  m->training_seconds = seconds;
  m->finished_at = finished_at;
  return m;
}

}  // namespace

RobotRuntime::RobotRuntime(std::string robot_id, RobotConfig config, store::Store* store)
    : robot_id_(std::move(robot_id)),
      store_(store),
      config_(std::move(config)),
      dataset_(config_.state_dim, config_.action_dim) {}

RobotConfig RobotRuntime::config() const {
  absl::MutexLock lock(&mu_);
  return config_;
}

void RobotRuntime::UpdateSettings(const plan::PlannerOptions& planner,
                                  const explore::ObjectiveOptions& objective,
                                  const model::TrainingOptions& training,
                                  const TrainingPolicy& policy) {
  absl::MutexLock lock(&mu_);
  config_.planner = planner;
  config_.objective = objective;
  config_.training = training;
  config_.policy = policy;
  plan_state_.ForgetWarmStart();  // the horizon may have changed
}

RobotStatus RobotRuntime::Status() const {
  absl::MutexLock lock(&mu_);
  return StatusLocked();
}

RobotStatus RobotRuntime::StatusLocked() const {
  RobotStatus s;
  s.last_seq = dataset_.last_seq();
  s.transitions = dataset_.size();
  s.model_version = published_ ? published_->version : 0;
  s.training = training_;
  return s;
}

ProgressView RobotRuntime::Progress() const {
  absl::MutexLock lock(&mu_);
  ProgressView v;
  v.status = StatusLocked();
  v.episodes = episodes_.episodes();
  v.last_episode = episodes_.last();
  v.model = published_;
  v.plans = plan_state_.plans();
  v.deadline_misses = plan_state_.deadline_misses();
  v.plans_waiting = plans_waiting_.load(std::memory_order_relaxed);
  v.training_due = WantsTrainingLocked();
  v.exploration = episodes_.exploration();
  v.evaluation = episodes_.evaluation();
  const PlanState::Latency latency = plan_state_.Percentiles();
  v.p50_ms = latency.p50_ms;
  v.p90_ms = latency.p90_ms;
  v.p99_ms = latency.p99_ms;
  // Coverage of the next states on the grid; ranges from the config or from the data.
  CoverageGrid::View grid = dataset_.Coverage({config_.coverage_indices, config_.coverage_lower,
                                               config_.coverage_upper, config_.coverage_cells});
  v.coverage_indices = config_.coverage_indices;
  v.coverage_cells = config_.coverage_cells;
  v.coverage_lower = std::move(grid.lower);
  v.coverage_upper = std::move(grid.upper);
  v.coverage_counts = std::move(grid.counts);
  return v;
}

std::vector<std::string> RobotRuntime::load_problems() const {
  absl::MutexLock lock(&mu_);
  return load_problems_;
}

std::shared_ptr<const PublishedModel> RobotRuntime::published() const {
  absl::MutexLock lock(&mu_);
  return published_;
}

void RobotRuntime::RecordProgress() {
  std::vector<EpisodeRecord> records;
  {
    absl::MutexLock lock(&mu_);
    records = episodes_.TakeUnrecorded();
  }
  for (const EpisodeRecord& e : records) {
    store::ProgressRecord record;
    record.robot_id = robot_id_;
    record.at = e.ended_at;
    record.kind = store::ProgressKind::kEpisode;
    record.payload = store::EncodeEpisode(e);
    // Progress is informational: a failed write must not fail the transitions' ack.
    store_->AppendProgress(record).IgnoreError();
  }
}

void RobotRuntime::AddTransition(const store::TransitionRecord& t) {
  episodes_.Add(t, config_.success_return);
  dataset_.Add(t);
}

namespace {

absl::StatusOr<RobotRuntime::Checkpoint> Decode(const store::CheckpointRecord& record) {
  absl::StatusOr<model::Ensemble> ensemble = model::DeserializeEnsemble(record.model);
  if (!ensemble.ok()) return ensemble.status();
  // An unreadable report leaves zeros: the model is what counts.
  const store::TrainingRecord training =
      store::DecodeTraining(record.report).value_or(store::TrainingRecord{});
  return RobotRuntime::Checkpoint{.ensemble = *std::move(ensemble),
                                  .report = training.report,
                                  .training_seconds = training.training_seconds};
}

}  // namespace

absl::Status RobotRuntime::Load() {
  absl::StatusOr<std::vector<store::TransitionRecord>> transitions =
      store_->LoadTransitions(robot_id_);
  if (!transitions.ok()) return transitions.status();
  // The newest checkpoint that decodes is published. An unreadable one (a damaged disk, a
  // foreign write) is reported and skipped, so the robot keeps its data and an older model, or
  // none (it then retrains), rather than the whole server refusing to start.
  std::shared_ptr<const PublishedModel> published;
  absl::StatusOr<std::vector<store::CheckpointRecord>> listed = store_->ListCheckpoints(robot_id_);
  if (!listed.ok()) return listed.status();
  std::vector<std::string> problems;
  for (const store::CheckpointRecord& entry : *listed) {
    absl::StatusOr<store::CheckpointRecord> checkpoint = store_->GetCheckpoint(robot_id_, entry.model_version);
    if (!checkpoint.ok()) return checkpoint.status();
    absl::StatusOr<Checkpoint> decoded = Decode(*checkpoint);
    if (!decoded.ok()) {
      problems.push_back(absl::StrFormat("checkpoint of model version %d is unreadable (%s); skipped",
                                         checkpoint->model_version, decoded.status().message()));
      continue;
    }
    published = MakePublished(checkpoint->model_version, std::move(decoded->ensemble),
                              std::move(decoded->report), decoded->training_seconds,
                              checkpoint->created_at);
    break;
  }
  // Which stored episodes were evaluation episodes: their progress records say so.
  std::vector<uint64_t> evaluated;
  for (int64_t after = 0;;) {
    absl::StatusOr<std::vector<store::ProgressRecord>> records =
        store_->ReadProgress(after, absl::InfinitePast(), robot_id_, 10000);
    if (!records.ok()) return records.status();
    for (const store::ProgressRecord& r : *records) {
      if (r.kind != store::ProgressKind::kEpisode) continue;
      std::optional<EpisodeRecord> episode = store::DecodeEpisode(r.payload);
      if (episode && episode->evaluation) evaluated.push_back(episode->episode);
      after = r.row;
    }
    if (records->size() < 10000) break;
  }
  absl::MutexLock lock(&mu_);
  for (uint64_t episode : evaluated) episodes_.MarkEvaluation(episode);
  episodes_.BeginReplay(/*rebuild=*/false);
  for (const store::TransitionRecord& t : *transitions) AddTransition(t);
  episodes_.EndReplay();
  // What was stored before the restart is already in the checkpoint's model (or will be in
  // the next round's): no round is owed for it, unless no checkpoint could be read.
  dataset_.SetPending(
      published == nullptr && !listed->empty() ? static_cast<int>(transitions->size()) : 0,
      /*episode_ended=*/false);
  // New versions continue above every stored one, readable or not.
  highest_version_ = listed->empty() ? 0 : listed->front().model_version;
  load_problems_ = std::move(problems);
  published_ = std::move(published);
  if (published_ != nullptr) RefitValue();
  return absl::OkStatus();
}

absl::StatusOr<store::AppendResult> RobotRuntime::Append(
    const std::vector<store::TransitionRecord>& batch) {
  // One append at a time per robot, so that the dataset follows the store in commit order.
  absl::MutexLock append_lock(&append_mu_);
  uint64_t before;
  {
    absl::MutexLock lock(&mu_);
    before = dataset_.last_seq();
  }
  absl::StatusOr<store::AppendResult> result = store_->AppendTransitions(robot_id_, batch);
  if (!result.ok() || result->accepted == 0) return result;
  uint32_t beyond = 0;
  for (const store::TransitionRecord& t : batch) beyond += t.seq > before ? 1 : 0;
  if (beyond == result->accepted) {
    {
      absl::MutexLock lock(&mu_);
      for (const store::TransitionRecord& t : batch) {
        if (t.seq > before) AddTransition(t);
      }
    }
    RecordProgress();
    return result;
  }
  // Some accepted transitions filled gaps below the last seq (rare): mirror the store anew.
  absl::StatusOr<std::vector<store::TransitionRecord>> all = store_->LoadTransitions(robot_id_);
  if (!all.ok()) return all.status();
  absl::MutexLock lock(&mu_);
  const int pending = dataset_.new_since_training() + static_cast<int>(result->accepted);
  const bool ended = dataset_.episode_ended();
  dataset_.Clear();
  episodes_.BeginReplay(/*rebuild=*/true);  // the finished episodes are on record already
  for (const store::TransitionRecord& t : *all) AddTransition(t);
  episodes_.EndReplay();
  dataset_.SetPending(pending, ended);
  return result;
}

void RobotRuntime::RequestTraining() {
  absl::MutexLock lock(&mu_);
  training_requested_ = true;
}

bool RobotRuntime::WantsTraining() const {
  absl::MutexLock lock(&mu_);
  return WantsTrainingLocked();
}

bool RobotRuntime::WantsTrainingLocked() const {
  if (training_) return false;
  const int rows = dataset_.size(), fresh = dataset_.new_since_training();
  if (training_requested_ && rows >= 2) return true;
  if (rows < config_.policy.min_transitions) return false;
  // After a failed round, wait for new data rather than fail again at once.
  if (last_round_failed_ && fresh == 0) return false;
  if (published_ == nullptr) return true;
  if (fresh >= config_.policy.every_n_transitions) return true;
  return config_.policy.at_episode_end && dataset_.episode_ended() && fresh > 0;
}

absl::StatusOr<std::shared_ptr<const PublishedModel>> RobotRuntime::TrainOnce(
    const std::function<void()>& between_epochs, const ParallelFor& parallel) {
  model::TransitionData data;
  RobotConfig config;
  std::shared_ptr<const PublishedModel> start;
  {
    absl::MutexLock lock(&mu_);
    if (training_) return absl::FailedPreconditionError("a training round is running already");
    if (dataset_.size() < 2) {
      return absl::FailedPreconditionError(absl::StrFormat(
          "robot \"%s\" has %d transitions; training needs at least 2", config_.name,
          dataset_.size()));
    }
    data = dataset_.Snapshot();
    config = config_;
    start = published_;
    training_ = true;
    training_requested_ = false;
    dataset_.StartRound();
  }
  const uint64_t version = start ? start->version + 1 : 1;  // seeds the fresh model only
  auto finish = [&](absl::Status status) {
    absl::MutexLock lock(&mu_);
    training_ = false;
    last_round_failed_ = true;
    return status;
  };
  model::Ensemble initial;
  if (start) {
    // Warm start; a model saved before termination heads existed gets one (untrained).
    initial = config.ensemble.termination_head ? start->ensemble.WithTerminationHead()
                                               : start->ensemble;
  } else {
    absl::StatusOr<model::Ensemble> fresh =
        model::Ensemble::Create(config.state_dim, config.action_dim, config.ensemble, version);
    if (!fresh.ok()) return finish(fresh.status());
    initial = *std::move(fresh);
  }
  model::TrainingOptions options = config.training;
  options.seed = DeriveSeed(options.seed, version);
  const auto begin = std::chrono::steady_clock::now();
  auto trainer = model::EnsembleTrainer::Create(std::move(initial), data, options);
  if (!trainer.ok()) return finish(trainer.status());
  while (!(*trainer)->RunEpoch(parallel)) {
    if (between_epochs) between_epochs();
  }
  const double seconds =
      std::chrono::duration<double>(std::chrono::steady_clock::now() - begin).count();
  auto published = Publish((*trainer)->best(), (*trainer)->Report(), seconds);
  if (!published.ok()) return finish(published.status());
  absl::MutexLock lock(&mu_);
  training_ = false;
  last_round_failed_ = false;
  return published;
}

absl::StatusOr<std::shared_ptr<const PublishedModel>> RobotRuntime::PublishModel(
    model::Ensemble ensemble, model::TrainingReport report) {
  RobotConfig config = this->config();
  if (ensemble.state_dim() != config.state_dim || ensemble.action_dim() != config.action_dim) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "the model has state_dim %d and action_dim %d, robot \"%s\" has %d and %d",
        ensemble.state_dim(), ensemble.action_dim(), config.name, config.state_dim,
        config.action_dim));
  }
  return Publish(std::move(ensemble), std::move(report), 0.0);
}

absl::StatusOr<std::shared_ptr<const PublishedModel>> RobotRuntime::Publish(
    model::Ensemble ensemble, model::TrainingReport report, double seconds) {
  absl::MutexLock publish_lock(&publish_mu_);
  uint64_t version;
  {
    absl::MutexLock lock(&mu_);
    version = std::max(published_ ? published_->version : 0, highest_version_) + 1;
    highest_version_ = version;
  }
  std::shared_ptr<const PublishedModel> published =
      MakePublished(version, std::move(ensemble), std::move(report), seconds, absl::Now());
  store::CheckpointRecord checkpoint;
  checkpoint.model_version = version;
  checkpoint.created_at = published->finished_at;
  checkpoint.report = store::EncodeTraining(published->training());
  checkpoint.model = model::SerializeEnsemble(published->ensemble);
  if (absl::Status s = store_->PutCheckpoint(robot_id_, checkpoint); !s.ok()) return s;
  {
    absl::MutexLock lock(&mu_);
    published_ = published;
    RefitValue();
  }
  store::ProgressRecord record;
  record.robot_id = robot_id_;
  record.at = published->finished_at;
  record.kind = store::ProgressKind::kTraining;
  record.payload = checkpoint.report;
  store_->AppendProgress(record).IgnoreError();  // informational, like episode records
  return published;
}

// Points of the nearby reward: it is evaluated at every step of every rollout (the value only at
// the last), so it keeps a quarter of the value's 2,048; every rewarded row is kept up to half
// of them, the unrewarded rows thinned evenly and weighted (core/plan/value.h).
constexpr int kNearbyRewardPoints = 512;

void RobotRuntime::RefitValue() {
  // O(rows x state_dim) under the lock, once per published version. The options come from a
  // validated objective, so the fit fails only without rows (then there is no value).
  absl::StatusOr<std::shared_ptr<const plan::StateValue>> value =
      dataset_.FitValue({.estimate = config_.objective.value_estimate,
                         .discount = config_.objective.value_discount,
                         .terminal_value = config_.objective.terminal_value});
  value_ = value.ok() ? *std::move(value) : nullptr;
  absl::StatusOr<std::shared_ptr<const plan::StateValue>> reward =
      dataset_.FitNearbyReward({.max_points = kNearbyRewardPoints});
  nearby_reward_ = reward.ok() ? *std::move(reward) : nullptr;
}

absl::StatusOr<PlanOutcome> RobotRuntime::Plan(PlanInput input) {
  const absl::Time start = absl::Now();
  std::shared_ptr<const PublishedModel> model;
  RobotConfig config;
  std::optional<plan::CemWarmStart> warm;
  uint64_t count;
  {
    absl::MutexLock lock(&mu_);
    model = published_;
    config = config_;
    input.planner.rollout.value = value_;
    input.planner.rollout.nearby_reward = nearby_reward_;
    warm = plan_state_.warm_start();
    count = plan_state_.Start();
  }
  if (input.state.size() != config.state_dim) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "state has %d values, robot \"%s\" expects %d", input.state.size(), config.name,
        config.state_dim));
  }
  plan::SequenceLimits limits = config.limits;
  if (input.previous_action.size() != 0) {
    if (input.previous_action.size() != config.action_dim) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "previous_action has %d values, robot \"%s\" expects %d",
          input.previous_action.size(), config.name, config.action_dim));
    }
    // A previous action a hair outside the bounds (float rounding on the client) is clipped.
    limits.previous = input.previous_action.cwiseMax(limits.lower).cwiseMin(limits.upper);
  }
  if (input.max_step.size() != 0) {
    if (input.max_step.size() != config.action_dim) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "max_step has %d values, robot \"%s\" expects %d", input.max_step.size(), config.name,
          config.action_dim));
    }
    limits.max_step = input.max_step;
  }
  input.planner.cem.seed = DeriveSeed(input.planner.cem.seed, count);

  PlanOutcome outcome;
  if (input.evaluate) {
    if (model == nullptr) {
      return absl::FailedPreconditionError(absl::StrFormat(
          "evaluate: robot \"%s\" has no model yet to evaluate (it trains once it has %d "
          "transitions); nothing was planned",
          config.name, config.policy.min_transitions));
    }
    input.objective.information_weight = 0.0;
    outcome.evaluation = true;
    absl::MutexLock lock(&mu_);
    if (input.episode != 0) {
      episodes_.MarkEvaluation(input.episode);
    } else {
      episodes_.EvaluateNext();
    }
  }
  if (model == nullptr) {
    // No model: one draw of the optimiser's initial distribution (coloured noise around the
    // middle of the bounds), information gain off.
    const plan::PlannerOptions& p = input.planner;
    if (absl::Status s = p.Validate(); !s.ok()) return s;
    absl::StatusOr<plan::RowMatrixXf> actions = plan::SampleFromPrior(p.cem, limits);
    if (!actions.ok()) return actions.status();
    outcome.result.actions = *std::move(actions);
    outcome.result.expected_reward = Eigen::VectorXf::Zero(p.horizon());
    outcome.result.information_gain = Eigen::VectorXf::Zero(p.horizon());
    outcome.from_prior = true;
  } else {
    plan::PlanContext context = input.context;
    context.deadline = input.deadline;
    const bool reuse = warm.has_value() && warm->mean.rows() == input.planner.horizon();
    absl::StatusOr<plan::PlanResult> result =
        plan::Plan(*model->rollout, {.state = input.state,
                                     .limits = limits,
                                     .objective = input.objective,
                                     .options = input.planner,
                                     .warm_start = reuse ? &*warm : nullptr,
                                     .context = context});
    if (!result.ok()) return result.status();
    outcome.result = *std::move(result);
    outcome.model_version = model->version;
    absl::MutexLock lock(&mu_);
    plan_state_.set_warm_start(outcome.result.warm_start);
  }
  outcome.compute_ms = absl::ToDoubleMilliseconds(absl::Now() - start);
  {
    absl::MutexLock lock(&mu_);
    plan_state_.Finish(outcome.compute_ms, absl::Now() > input.deadline);
    if (!outcome.from_prior && outcome.result.information_gain.size() > 0) {
      episodes_.AddPlanGain(outcome.result.information_gain[0]);
    }
  }
  return outcome;
}

absl::StatusOr<RobotRuntime::Checkpoint> RobotRuntime::ReadCheckpoint(uint64_t version) const {
  absl::StatusOr<store::CheckpointRecord> record = store_->GetCheckpoint(robot_id_, version);
  if (!record.ok()) return record.status();
  return Decode(*record);
}

absl::StatusOr<std::shared_ptr<const PublishedModel>> RobotRuntime::RestoreCheckpoint(
    uint64_t version) {
  absl::StatusOr<Checkpoint> checkpoint = ReadCheckpoint(version);
  if (!checkpoint.ok()) return checkpoint.status();
  return PublishModel(std::move(checkpoint->ensemble), std::move(checkpoint->report));
}

absl::StatusOr<std::shared_ptr<const PublishedModel>> RobotRuntime::TrainAndWait(
    absl::Time give_up, const std::function<bool()>& cancelled) {
  uint64_t before;
  {
    absl::MutexLock lock(&mu_);
    if (dataset_.size() < 2) {
      return absl::FailedPreconditionError(
          absl::StrFormat("robot \"%s\" has %d transitions; training needs at least 2",
                          config_.name, dataset_.size()));
    }
    before = published_ ? published_->version : 0;
    training_requested_ = true;
  }
  absl::MutexLock lock(&mu_);
  auto newer = [this, before]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) {
    return published_ != nullptr && published_->version != before;
  };
  while (!mu_.AwaitWithTimeout(absl::Condition(&newer), absl::Milliseconds(20))) {
    if ((cancelled && cancelled()) || absl::Now() > give_up) {
      return absl::DeadlineExceededError(
          "the training round did not finish in time; it goes on in the background");
    }
  }
  return published_;
}

absl::StatusOr<std::shared_ptr<const PublishedModel>> RobotRuntime::RequirePublished() const {
  absl::MutexLock lock(&mu_);
  if (published_ == nullptr) {
    return absl::FailedPreconditionError(
        absl::StrFormat("robot \"%s\" has no model yet; it trains once it has %d transitions",
                        config_.name, config_.policy.min_transitions));
  }
  return published_;
}

absl::StatusOr<RobotRuntime::Prediction> RobotRuntime::Predict(
    const std::vector<float>& states, const std::vector<float>& actions, int rows,
    const explore::ObjectiveOptions& objective) const {
  absl::StatusOr<std::shared_ptr<const PublishedModel>> published = RequirePublished();
  if (!published.ok()) return published.status();
  const std::shared_ptr<const PublishedModel>& model = *published;
  const RobotConfig config = this->config();
  const int sd = config.state_dim;
  if (rows < 1 || states.size() != static_cast<size_t>(rows) * sd ||
      actions.size() != static_cast<size_t>(rows) * config.action_dim) {
    return absl::InvalidArgumentError(
        absl::StrFormat("Predict: %d rows need %d state and %d action values, got %d and %d", rows,
                        rows * sd, rows * config.action_dim, states.size(), actions.size()));
  }
  plan::MemberPredictions pred;
  model->rollout->Evaluate(states.data(), actions.data(), rows, &pred);
  Prediction out;
  out.model_version = model->version;
  out.members = pred.members;
  out.rows = rows;
  const int nb = pred.members, od = pred.output_dim;
  out.next_state_mean.resize(static_cast<size_t>(nb) * rows * sd);
  out.next_state_variance.resize(out.next_state_mean.size());
  out.reward_mean.resize(static_cast<size_t>(nb) * rows);
  out.reward_variance.resize(out.reward_mean.size());
  out.termination_probability.assign(out.reward_mean.size(), 0.0);
  for (int b = 0; b < nb; ++b) {
    for (int r = 0; r < rows; ++r) {
      // As a rollout steps: state + mean * scale + offset, variances by scale^2.
      const size_t at = (static_cast<size_t>(b) * rows + r) * od,
                   row = static_cast<size_t>(b) * rows + r;
      for (int k = 0; k < sd; ++k) {
        out.next_state_mean[row * sd + k] = states[static_cast<size_t>(r) * sd + k] +
                                            pred.mean[at + k] * pred.scale[k] + pred.offset[k];
        out.next_state_variance[row * sd + k] =
            std::exp(static_cast<double>(pred.log_var[at + k])) * pred.scale[k] * pred.scale[k];
      }
      out.reward_mean[row] = pred.mean[at + sd] * pred.scale[sd] + pred.offset[sd];
      out.reward_variance[row] =
          std::exp(static_cast<double>(pred.log_var[at + sd])) * pred.scale[sd] * pred.scale[sd];
      if (!pred.term_logit.empty())
        out.termination_probability[row] = 1.0 / (1.0 + std::exp(-pred.term_logit[row]));
    }
  }
  out.information_gain.resize(rows);
  std::vector<float> observed_log_var;
  explore::Information(
      objective.estimator,
      pred.ObservationSet(static_cast<float>(objective.observation_noise), &observed_log_var),
      out.information_gain.data(), objective.monte_carlo_samples, 1);
  return out;
}

}  // namespace foray::robot
