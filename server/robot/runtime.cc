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
#include "foray/v1/monitoring.pb.h"
#include "foray/v1/types.pb.h"

namespace foray::robot {
namespace {

}  // namespace

v1::TrainingReport ReportToWire(const PublishedModel& m) {
  v1::TrainingReport r;
  r.set_model_version(m.version);
  r.set_epochs(static_cast<uint32_t>(m.report.epochs));
  r.set_transitions(static_cast<uint64_t>(m.report.transitions));
  r.set_train_nll(m.report.train_nll);
  r.set_holdout_nll(m.report.holdout_nll);
  r.set_holdout_mse(m.report.holdout_mse);
  for (double v : m.report.within_1sigma) r.add_within_1sigma(v);
  for (double v : m.report.within_2sigma) r.add_within_2sigma(v);
  r.set_terminal_transitions(static_cast<uint64_t>(m.report.terminal_rows));
  r.set_terminal_weight(m.report.terminal_pos_weight);
  r.set_holdout_termination_bce(m.report.holdout_termination_bce);
  r.set_duration_s(m.training_seconds);
  r.mutable_finished_at()->set_seconds(absl::ToUnixSeconds(m.finished_at));
  return r;
}

model::TrainingReport ReportFromWire(const v1::TrainingReport& r, double* seconds) {
  model::TrainingReport out;
  out.epochs = static_cast<int>(r.epochs());
  out.transitions = static_cast<int>(r.transitions());
  out.train_nll = r.train_nll();
  out.holdout_nll = r.holdout_nll();
  out.holdout_mse = r.holdout_mse();
  out.within_1sigma.assign(r.within_1sigma().begin(), r.within_1sigma().end());
  out.within_2sigma.assign(r.within_2sigma().begin(), r.within_2sigma().end());
  out.terminal_rows = static_cast<int>(r.terminal_transitions());
  out.terminal_pos_weight = r.terminal_weight();
  out.holdout_termination_bce = r.holdout_termination_bce();
  if (seconds != nullptr) *seconds = r.duration_s();
  return out;
}

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
    : robot_id_(std::move(robot_id)), store_(store), config_(std::move(config)) {}

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
  warm_start_.reset();  // the horizon may have changed
}

RobotStatus RobotRuntime::Status() const {
  absl::MutexLock lock(&mu_);
  return StatusLocked();
}

RobotStatus RobotRuntime::StatusLocked() const {
  RobotStatus s;
  s.last_seq = last_seq_;
  s.transitions = rewards_.size();
  s.model_version = published_ ? published_->version : 0;
  s.training = training_;
  return s;
}

ProgressView RobotRuntime::Progress() const {
  absl::MutexLock lock(&mu_);
  ProgressView v;
  v.status = StatusLocked();
  v.episodes = episodes_;
  v.last_episode = last_episode_record_;
  v.model = published_;
  v.plans = plans_;
  v.deadline_misses = deadline_misses_;
  v.plans_waiting = plans_waiting_.load(std::memory_order_relaxed);
  v.training_due = WantsTrainingLocked();
  v.exploration = exploration_;
  v.evaluation = evaluation_;
  if (!latencies_ms_.empty()) {
    std::vector<double> sorted = latencies_ms_;
    std::sort(sorted.begin(), sorted.end());
    auto at = [&](double q) { return sorted[static_cast<size_t>(q * (sorted.size() - 1) + 0.5)]; };
    v.p50_ms = at(0.5);
    v.p90_ms = at(0.9);
    v.p99_ms = at(0.99);
  }
  // Coverage of the next states on the grid; ranges from the config or from the data.
  CoverageGrid::View grid = coverage_.Read({config_.coverage_indices, config_.coverage_lower,
                                            config_.coverage_upper, config_.coverage_cells},
                                           next_states_, config_.state_dim);
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

void EpisodeTally::Add(const EpisodeRecord& e) {
  ++episodes;
  successes += e.success ? 1 : 0;
  terminals += e.terminal ? 1 : 0;
  last_return = e.episode_return;
  recent.emplace_back(e.episode_return, e.success);
  if (recent.size() > kRecent) recent.pop_front();
}

double EpisodeTally::RecentMeanReturn() const {
  if (recent.empty()) return 0.0;
  double sum = 0.0;
  for (const auto& [r, ok] : recent) sum += r;
  return sum / recent.size();
}

double EpisodeTally::RecentSuccessRate() const {
  if (recent.empty()) return 0.0;
  int ok = 0;
  for (const auto& [r, success] : recent) ok += success ? 1 : 0;
  return static_cast<double>(ok) / recent.size();
}

void RobotRuntime::MarkEvaluation(uint64_t episode) {
  evaluation_episodes_.insert(episode);
  while (evaluation_episodes_.size() > kMarked) evaluation_episodes_.erase(evaluation_episodes_.begin());
}

void RobotRuntime::CloseEpisode(bool terminal) {
  if (current_steps_ == 0) return;
  EpisodeRecord e;
  e.episode = current_episode_;
  e.steps = current_steps_;
  e.episode_return = current_return_;
  e.information_gain = plan_gain_count_ > 0 ? plan_gain_sum_ / plan_gain_count_ : 0.0;
  e.ended_at = absl::Now();
  e.evaluation = evaluation_episodes_.count(current_episode_) > 0;
  e.success = current_return_ > config_.success_return;
  e.terminal = terminal;
  (e.evaluation ? evaluation_ : exploration_).Add(e);
  ++episodes_;
  last_episode_record_ = e;
  if (!replaying_) unrecorded_.push_back(e);
  current_steps_ = 0;
  current_return_ = 0.0;
  plan_gain_sum_ = 0.0;
  plan_gain_count_ = 0;
}

void RobotRuntime::RecordProgress() {
  std::vector<EpisodeRecord> records;
  {
    absl::MutexLock lock(&mu_);
    records.swap(unrecorded_);
  }
  for (const EpisodeRecord& e : records) {
    v1::EpisodeSummary summary;
    summary.set_episode(e.episode);
    summary.set_steps(static_cast<uint32_t>(e.steps));
    summary.set_return_(e.episode_return);
    summary.set_information_gain(e.information_gain);
    summary.mutable_ended_at()->set_seconds(absl::ToUnixSeconds(e.ended_at));
    summary.set_evaluation(e.evaluation);
    summary.set_success(e.success);
    summary.set_terminal(e.terminal);
    store::ProgressRecord record;
    record.robot_id = robot_id_;
    record.at = e.ended_at;
    record.kind = store::ProgressKind::kEpisode;
    record.payload = summary.SerializeAsString();
    // Progress is informational: a failed write must not fail the transitions' ack.
    store_->AppendProgress(record).IgnoreError();
  }
}

void RobotRuntime::AddToDataset(const store::TransitionRecord& t) {
  if (current_steps_ > 0 && t.episode != current_episode_) CloseEpisode(/*terminal=*/false);
  if (evaluate_next_ && !replaying_) {
    MarkEvaluation(t.episode);
    evaluate_next_ = false;
  }
  current_episode_ = t.episode;
  ++current_steps_;
  current_return_ += t.reward;
  if (t.terminal) CloseEpisode(/*terminal=*/true);
  for (double v : t.state) states_.push_back(static_cast<float>(v));
  for (double v : t.action) actions_.push_back(static_cast<float>(v));
  for (double v : t.next_state) next_states_.push_back(static_cast<float>(v));
  coverage_.Add(&next_states_[next_states_.size() - t.next_state.size()],
                static_cast<int>(t.next_state.size()));
  rewards_.push_back(static_cast<float>(t.reward));
  terminals_.push_back(t.terminal ? 1.0f : 0.0f);
  if (t.seq > last_seq_) last_seq_ = t.seq;
  // An episode ends at a terminal transition, or (when the client sends none) where the
  // episode id changes; either counts once.
  if (t.terminal || (last_episode_ != 0 && t.episode != last_episode_ && !last_terminal_)) {
    episode_ended_ = true;
  }
  last_episode_ = t.episode;
  last_terminal_ = t.terminal;
  ++new_since_training_;
}

namespace {

absl::StatusOr<RobotRuntime::Checkpoint> Decode(const store::CheckpointRecord& record) {
  absl::StatusOr<model::Ensemble> ensemble = model::DeserializeEnsemble(record.model);
  if (!ensemble.ok()) return ensemble.status();
  RobotRuntime::Checkpoint out{.ensemble = *std::move(ensemble)};
  v1::TrainingReport wire;
  wire.ParseFromString(record.report);  // an unreadable report leaves zeros
  out.report = ReportFromWire(wire, &out.training_seconds);
  return out;
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
      v1::EpisodeSummary summary;
      if (r.kind == store::ProgressKind::kEpisode && summary.ParseFromString(r.payload) && summary.evaluation()) {
        evaluated.push_back(summary.episode());
      }
      after = r.row;
    }
    if (records->size() < 10000) break;
  }
  absl::MutexLock lock(&mu_);
  for (uint64_t episode : evaluated) MarkEvaluation(episode);
  replaying_ = true;
  for (const store::TransitionRecord& t : *transitions) AddToDataset(t);
  replaying_ = false;
  // What was stored before the restart is already in the checkpoint's model (or will be in
  // the next round's): no round is owed for it, unless no checkpoint could be read.
  new_since_training_ = published == nullptr && !listed->empty() ? transitions->size() : 0;
  // New versions continue above every stored one, readable or not.
  highest_version_ = listed->empty() ? 0 : listed->front().model_version;
  load_problems_ = std::move(problems);
  episode_ended_ = false;
  published_ = std::move(published);
  return absl::OkStatus();
}

absl::StatusOr<store::AppendResult> RobotRuntime::Append(
    const std::vector<store::TransitionRecord>& batch) {
  // One append at a time per robot, so that the dataset follows the store in commit order.
  absl::MutexLock append_lock(&append_mu_);
  uint64_t before;
  {
    absl::MutexLock lock(&mu_);
    before = last_seq_;
  }
  absl::StatusOr<store::AppendResult> result = store_->AppendTransitions(robot_id_, batch);
  if (!result.ok() || result->accepted == 0) return result;
  uint32_t beyond = 0;
  for (const store::TransitionRecord& t : batch) beyond += t.seq > before ? 1 : 0;
  if (beyond == result->accepted) {
    {
      absl::MutexLock lock(&mu_);
      for (const store::TransitionRecord& t : batch) {
        if (t.seq > before) AddToDataset(t);
      }
    }
    RecordProgress();
    return result;
  }
  // Some accepted transitions filled gaps below the last seq (rare): mirror the store anew.
  absl::StatusOr<std::vector<store::TransitionRecord>> all = store_->LoadTransitions(robot_id_);
  if (!all.ok()) return all.status();
  absl::MutexLock lock(&mu_);
  const int pending = new_since_training_ + static_cast<int>(result->accepted);
  states_.clear();
  actions_.clear();
  next_states_.clear();
  coverage_ = CoverageGrid();  // the rows come back in seq order: bin them anew
  rewards_.clear();
  terminals_.clear();
  last_seq_ = 0;
  last_episode_ = 0;
  last_terminal_ = false;
  const bool ended = episode_ended_;
  replaying_ = true;  // a rebuild: the finished episodes are on record already
  episodes_ = 0;
  current_steps_ = 0;
  for (const store::TransitionRecord& t : *all) AddToDataset(t);
  replaying_ = false;
  new_since_training_ = pending;
  episode_ended_ = ended;
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
  if (training_requested_ && rewards_.size() >= 2) return true;
  if (static_cast<int>(rewards_.size()) < config_.policy.min_transitions) return false;
  // After a failed round, wait for new data rather than fail again at once.
  if (last_round_failed_ && new_since_training_ == 0) return false;
  if (published_ == nullptr) return true;
  if (new_since_training_ >= config_.policy.every_n_transitions) return true;
  return config_.policy.at_episode_end && episode_ended_ && new_since_training_ > 0;
}

model::TransitionData RobotRuntime::Snapshot() const {
  const int n = static_cast<int>(rewards_.size());
  const int sd = config_.state_dim, ad = config_.action_dim;
  using RowMajor = RowMatrixXf;
  model::TransitionData d;
  d.states = Eigen::Map<const RowMajor>(states_.data(), n, sd);
  d.actions = Eigen::Map<const RowMajor>(actions_.data(), n, ad);
  d.next_states = Eigen::Map<const RowMajor>(next_states_.data(), n, sd);
  d.rewards = Eigen::Map<const Eigen::VectorXf>(rewards_.data(), n);
  d.terminals = Eigen::Map<const Eigen::VectorXf>(terminals_.data(), n);
  return d;
}

absl::StatusOr<std::shared_ptr<const PublishedModel>> RobotRuntime::TrainOnce(
    const std::function<void()>& between_epochs, const ParallelFor& parallel) {
  model::TransitionData data;
  RobotConfig config;
  std::shared_ptr<const PublishedModel> start;
  {
    absl::MutexLock lock(&mu_);
    if (training_) return absl::FailedPreconditionError("a training round is running already");
    if (static_cast<int>(rewards_.size()) < 2) {
      return absl::FailedPreconditionError(absl::StrFormat(
          "robot \"%s\" has %d transitions; training needs at least 2", config_.name,
          rewards_.size()));
    }
    data = Snapshot();
    config = config_;
    start = published_;
    training_ = true;
    training_requested_ = false;
    new_since_training_ = 0;
    episode_ended_ = false;
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
  checkpoint.report = ReportToWire(*published).SerializeAsString();
  checkpoint.model = model::SerializeEnsemble(published->ensemble);
  if (absl::Status s = store_->PutCheckpoint(robot_id_, checkpoint); !s.ok()) return s;
  {
    absl::MutexLock lock(&mu_);
    published_ = published;
  }
  store::ProgressRecord record;
  record.robot_id = robot_id_;
  record.at = published->finished_at;
  record.kind = store::ProgressKind::kTraining;
  record.payload = checkpoint.report;
  store_->AppendProgress(record).IgnoreError();  // informational, like episode records
  return published;
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
    warm = warm_start_;
    count = ++plans_;
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
  input.planner.seed = DeriveSeed(input.planner.seed, count);

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
      MarkEvaluation(input.episode);
    } else {
      evaluate_next_ = true;
    }
  }
  if (model == nullptr) {
    // No model: one draw of the optimiser's initial distribution (coloured noise around the
    // middle of the bounds), information gain off.
    const plan::PlannerOptions& p = input.planner;
    if (absl::Status s = p.Validate(); !s.ok()) return s;
    absl::StatusOr<plan::RowMatrixXf> actions = plan::SampleFromPrior(p.cem(), limits);
    if (!actions.ok()) return actions.status();
    outcome.result.actions = *std::move(actions);
    outcome.result.expected_reward = Eigen::VectorXf::Zero(p.horizon);
    outcome.result.information_gain = Eigen::VectorXf::Zero(p.horizon);
    outcome.from_prior = true;
  } else {
    plan::PlanContext context = input.context;
    context.deadline = input.deadline;
    const bool reuse = warm.has_value() && warm->mean.rows() == input.planner.horizon;
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
    warm_start_ = outcome.result.warm_start;
  }
  outcome.compute_ms = absl::ToDoubleMilliseconds(absl::Now() - start);
  {
    absl::MutexLock lock(&mu_);
    if (latencies_ms_.size() < 1000) {
      latencies_ms_.push_back(outcome.compute_ms);
    } else {
      latencies_ms_[plans_ % 1000] = outcome.compute_ms;
    }
    if (absl::Now() > input.deadline) ++deadline_misses_;
    if (!outcome.from_prior && outcome.result.information_gain.size() > 0) {
      plan_gain_sum_ += outcome.result.information_gain[0];
      ++plan_gain_count_;
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
    if (rewards_.size() < 2) {
      return absl::FailedPreconditionError(
          absl::StrFormat("robot \"%s\" has %d transitions; training needs at least 2",
                          config_.name, rewards_.size()));
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
