// One robot's runtime: its settings and the training policy over four parts, each its own
// class: the dataset mirror (server/robot/dataset.h), the published model and its checkpoints
// (here), the plan state (server/robot/plan_state.h) and the episode tracker
// (server/robot/episodes.h). Thread-safe: plans run on the rpc threads while the trainer thread
// trains; a published model version is immutable and replaced by a pointer swap, so training
// never blocks planning.
// Locking: robot_id_ and store_ are constant after construction and plans_waiting_ is atomic;
// append_mu_ serialises appends (the store write and the mirror's update), publish_mu_
// serialises publishing (version, checkpoint, swap); both are taken before mu_, which guards
// everything else (settings, the four parts, the training flags). The parts are not
// thread-safe themselves: an update that touches two of them (a transition counts into the
// mirror and the episode tracker) is one step under mu_. No lock is held while planning or
// training.
//
//   auto runtime = std::make_shared<RobotRuntime>(id, config, store);
//   FORAY_RETURN_IF_ERROR(runtime->Load());          // transitions and newest checkpoint
//   FORAY_ASSIGN_OR_RETURN(auto ack, runtime->Append(batch));
//   FORAY_ASSIGN_OR_RETURN(auto plan, runtime->Plan(request));
#ifndef FORAY_SERVER_ROBOT_RUNTIME_H_
#define FORAY_SERVER_ROBOT_RUNTIME_H_

#include <atomic>
#include <cstdint>
#include <functional>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "absl/base/thread_annotations.h"
#include "absl/status/statusor.h"
#include "absl/synchronization/mutex.h"
#include "absl/time/time.h"
#include "core/model/ensemble.h"
#include "core/model/trainer.h"
#include "core/plan/planner.h"
#include "core/plan/rollout.h"
#include "core/util/parallel.h"
#include "server/robot/config.h"
#include "server/robot/dataset.h"
#include "server/robot/episodes.h"
#include "server/robot/plan_state.h"
#include "server/store/records.h"
#include "server/store/store.h"

namespace foray::robot {

// An immutable published model version. Shared as std::shared_ptr<const PublishedModel>:
// planners keep the version they started with while training publishes the next one.
struct PublishedModel {
  uint64_t version = 0;
  model::Ensemble ensemble;
  std::unique_ptr<const plan::EnsembleRolloutModel> rollout;
  model::TrainingReport report;
  double training_seconds = 0.0;
  absl::Time finished_at;
  // The training as checkpoints and progress records keep it.
  store::TrainingRecord training() const {
    return {.model_version = version,
            .report = report,
            .training_seconds = training_seconds,
            .finished_at = finished_at};
  }
};

struct PlanInput {
  Eigen::VectorXf state;            // (state_dim), robot units
  Eigen::VectorXf previous_action;  // (action_dim) or empty
  Eigen::VectorXf max_step;         // (action_dim) rate limits for this plan; empty: the config's
  // When the plan is due, counted from the request's arrival: waiting for a core is part of it.
  absl::Time deadline = absl::InfiniteFuture();
  plan::PlannerOptions planner;     // the robot's settings with the request's overrides
  explore::ObjectiveOptions objective;
  plan::PlanContext context;        // threads; the deadline is set by Plan from `deadline`
  // An evaluation plan: reward only (the information weight is set to 0 here), and the
  // episode is recorded as an evaluation episode: `episode` when not 0, else the episode of
  // the next transition recorded. Needs a published model.
  bool evaluate = false;
  uint64_t episode = 0;
};

struct PlanOutcome {
  plan::PlanResult result;
  uint64_t model_version = 0;  // 0 with from_prior
  bool from_prior = false;     // no model yet: one sample of the optimiser's initial distribution
  bool evaluation = false;     // planned for an evaluation episode
  double compute_ms = 0.0;
};

// A robot's figures for the registry and monitoring.
struct RobotStatus {
  uint64_t last_seq = 0;
  uint64_t transitions = 0;
  uint64_t model_version = 0;
  bool training = false;
};

// How a robot's learning goes, for monitoring.
struct ProgressView {
  RobotStatus status;
  uint64_t episodes = 0;
  std::optional<EpisodeRecord> last_episode;
  std::shared_ptr<const PublishedModel> model;  // null before the first
  // Coverage: visited-state counts on a cells x cells grid over two state dimensions, row
  // (first index) major.
  std::vector<int> coverage_indices;
  std::vector<double> coverage_lower, coverage_upper;
  int coverage_cells = 0;
  std::vector<uint32_t> coverage_counts;
  // Plan latency over the last 1,000 plans, milliseconds.
  uint64_t plans = 0;
  double p50_ms = 0, p90_ms = 0, p99_ms = 0;
  uint64_t deadline_misses = 0;
  // This robot's plans waiting for a core now, and whether a training round is due but has not
  // started (the trainer is busy with another robot or paused for plans).
  int plans_waiting = 0;
  bool training_due = false;
  EpisodeTally exploration, evaluation;
};

class RobotRuntime {
 public:
  // Not copyable or movable (shared by the services through std::shared_ptr).
  RobotRuntime(const RobotRuntime&) = delete;
  RobotRuntime& operator=(const RobotRuntime&) = delete;

  // `store` must outlive the runtime.
  RobotRuntime(std::string robot_id, RobotConfig config, store::Store* store);

  const std::string& robot_id() const { return robot_id_; }
  RobotConfig config() const;
  // Replaces the settings that may change after registration.
  void UpdateSettings(const plan::PlannerOptions& planner, const explore::ObjectiveOptions& objective,
                      const model::TrainingOptions& training, const TrainingPolicy& policy);
  RobotStatus Status() const;
  ProgressView Progress() const;
  std::shared_ptr<const PublishedModel> published() const;
  // The published model, or FailedPrecondition saying when the robot will have one.
  absl::StatusOr<std::shared_ptr<const PublishedModel>> RequirePublished() const;

  // Mirrors the stored transitions and publishes the newest checkpoint that decodes, without
  // retraining. Unreadable checkpoints are skipped and listed in load_problems(); when none can
  // be read, the robot trains anew.
  absl::Status Load();
  std::vector<std::string> load_problems() const;

  // Stores a validated batch (durable on return) and adds the new transitions to the dataset.
  absl::StatusOr<store::AppendResult> Append(const std::vector<store::TransitionRecord>& batch);

  // Plans from input.state. Without a published model, returns one draw of the optimiser's
  // initial distribution within the limits (from_prior).
  absl::StatusOr<PlanOutcome> Plan(PlanInput input);

  // Asks the trainer for a round as soon as possible (at least 2 transitions needed).
  void RequestTraining();
  // Whether the training policy (or a request) asks for a round now.
  bool WantsTraining() const;
  // Counts this robot's plans waiting for a core (the plan scheduler calls it around the gate).
  void AddPlansWaiting(int delta) { plans_waiting_.fetch_add(delta, std::memory_order_relaxed); }
  // Trains one round on the caller's thread (warm start from the published model), publishes
  // the new version and writes its checkpoint. `between_epochs` (may be empty) runs after every
  // epoch: the scheduler pauses training there while plans need the cores. `parallel` (may be
  // empty) may split each minibatch step's members over threads; the model is the same.
  // FailedPrecondition with too few transitions.
  absl::StatusOr<std::shared_ptr<const PublishedModel>> TrainOnce(
      const std::function<void()>& between_epochs = {}, const ParallelFor& parallel = {});

  // Stored checkpoint `version`, decoded: its ensemble, its training report and how long its
  // training took (seconds). NotFound when there is none; the decoder's error when it does not
  // decode.
  struct Checkpoint {
    model::Ensemble ensemble;
    model::TrainingReport report;
    double training_seconds = 0.0;
  };
  absl::StatusOr<Checkpoint> ReadCheckpoint(uint64_t version) const;
  // Publishes stored checkpoint `version` again, as the next version.
  absl::StatusOr<std::shared_ptr<const PublishedModel>> RestoreCheckpoint(uint64_t version);
  // Asks for a training round (RequestTraining) and waits for the version it publishes: the
  // first version newer than the one published now. DeadlineExceeded at `give_up` or once
  // `cancelled` (asked every 20 ms; may be empty) says so; the round goes on in the background.
  absl::StatusOr<std::shared_ptr<const PublishedModel>> TrainAndWait(
      absl::Time give_up, const std::function<bool()>& cancelled = {});

  // Every member's one-step prediction at `rows` (state, action) pairs in robot units, and the
  // information gain of each row's predicted observation under `objective`'s estimator and
  // observation noise: the same arithmetic as the planner's rollouts. states: rows x state_dim,
  // actions: rows x action_dim, row-major, finite. FailedPrecondition without a model.
  struct Prediction {
    uint64_t model_version = 0;
    int members = 0, rows = 0;
    // (members, rows, state_dim) and (members, rows), member-major.
    std::vector<double> next_state_mean, next_state_variance, reward_mean, reward_variance;
    std::vector<double> termination_probability;  // (members, rows); 0 without a head
    std::vector<float> information_gain;          // (rows), nats
  };
  absl::StatusOr<Prediction> Predict(const std::vector<float>& states, const std::vector<float>& actions,
                                     int rows, const explore::ObjectiveOptions& objective) const;

  // Publishes a model from elsewhere (a restored checkpoint or an import) as the next version
  // and writes its checkpoint. InvalidArgument when its dimensions are not the robot's.
  absl::StatusOr<std::shared_ptr<const PublishedModel>> PublishModel(model::Ensemble ensemble,
                                                                     model::TrainingReport report);

 private:
  RobotStatus StatusLocked() const ABSL_SHARED_LOCKS_REQUIRED(mu_);
  bool WantsTrainingLocked() const ABSL_SHARED_LOCKS_REQUIRED(mu_);
  absl::StatusOr<std::shared_ptr<const PublishedModel>> Publish(model::Ensemble ensemble,
                                                                model::TrainingReport report,
                                                                double seconds);
  // Fits value_ to the dataset mirror's rows with the objective's value discount and
  // terminal value, and nearby_reward_ to their rewards (Publish and Load call it whenever a
  // model is published; both are fitted whatever the robot's objective, so that a plan's
  // override may ask for them).
  void RefitValue() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_);
  // Counts one transition into the dataset mirror and the episode tracker.
  void AddTransition(const store::TransitionRecord& t) ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_);
  void RecordProgress();  // writes the tracker's finished episodes to the store

  const std::string robot_id_;
  store::Store* const store_;

  std::atomic<int> plans_waiting_{0};
  absl::Mutex append_mu_ ABSL_ACQUIRED_BEFORE(mu_);
  // Serialises publishing: choosing the next version, writing its checkpoint, the swap.
  absl::Mutex publish_mu_ ABSL_ACQUIRED_BEFORE(mu_);

  mutable absl::Mutex mu_;
  RobotConfig config_ ABSL_GUARDED_BY(mu_);
  // Mutable: Progress() bins the rows added since its last call into the coverage counts.
  mutable DatasetMirror dataset_ ABSL_GUARDED_BY(mu_);
  EpisodeTracker episodes_ ABSL_GUARDED_BY(mu_);
  PlanState plan_state_ ABSL_GUARDED_BY(mu_);
  // The published model and its checkpoints.
  std::shared_ptr<const PublishedModel> published_ ABSL_GUARDED_BY(mu_);
  // The value of states beyond a plan's horizon, fitted to the rows there were when the
  // published model was (null before the first model or when the fit failed).
  std::shared_ptr<const plan::StateValue> value_ ABSL_GUARDED_BY(mu_);
  // The rewards received near a state (objective reward_estimate kNearby), fitted likewise.
  std::shared_ptr<const plan::StateValue> nearby_reward_ ABSL_GUARDED_BY(mu_);
  // The highest version of every stored checkpoint, readable or not.
  uint64_t highest_version_ ABSL_GUARDED_BY(mu_) = 0;
  std::vector<std::string> load_problems_ ABSL_GUARDED_BY(mu_);
  // Training: a round is running, the last one failed, a round was asked for.
  bool training_ ABSL_GUARDED_BY(mu_) = false;
  bool last_round_failed_ ABSL_GUARDED_BY(mu_) = false;
  bool training_requested_ ABSL_GUARDED_BY(mu_) = false;
};

}  // namespace foray::robot

#endif  // FORAY_SERVER_ROBOT_RUNTIME_H_
