// The in-memory mirror of one robot's stored transitions (a row per transition, robot units),
// with what the training policy reads of it (rows added since the last round, whether an
// episode ended since) and the coverage view's visit counts, binned as rows arrive. Not
// thread-safe: the robot runtime holds it under its mutex.
//
//   DatasetMirror data(state_dim, action_dim);
//   data.Add(transition);                      // in seq order, as the store commits them
//   model::TransitionData rows = data.Snapshot();
#ifndef FORAY_SERVER_ROBOT_DATASET_H_
#define FORAY_SERVER_ROBOT_DATASET_H_

#include <cstdint>
#include <memory>
#include <vector>

#include "absl/status/statusor.h"
#include "core/model/trainer.h"
#include "core/plan/value.h"
#include "server/robot/coverage.h"
#include "server/store/store.h"

namespace foray::robot {

class DatasetMirror {
 public:
  DatasetMirror(int state_dim, int action_dim) : state_dim_(state_dim), action_dim_(action_dim) {}

  // Appends one transition (state_dim / action_dim values; the runtime checked them).
  void Add(const store::TransitionRecord& t);
  // Forgets every row, to mirror the store anew; the training bookkeeping stays.
  void Clear();

  int size() const { return static_cast<int>(rewards_.size()); }
  uint64_t last_seq() const { return last_seq_; }
  // A copy of every row, for a training round.
  model::TransitionData Snapshot() const;
  // The value of states from these rows: each row's discounted return after it within its
  // episode, regressed on its next state (core/plan/value.h). InvalidArgument from the fit
  // (bad options); FailedPrecondition with no rows.
  absl::StatusOr<std::shared_ptr<const plan::StateValue>> FitValue(
      const plan::ValueOptions& options) const;
  // The rewards received on arriving near a state: each row's reward regressed on its next
  // state (the average estimate of core/plan/value.h; options' estimate and discount are not
  // used). Errors as FitValue's.
  absl::StatusOr<std::shared_ptr<const plan::StateValue>> FitNearbyReward(
      const plan::ValueOptions& options) const;
  // The coverage view's counts over the next states.
  CoverageGrid::View Coverage(const CoverageGrid::Settings& settings);

  // Rows added since the last round started, and whether an episode ended since: a terminal
  // transition, or (when the client sends none) a change of episode id; either counts once.
  int new_since_training() const { return new_since_training_; }
  bool episode_ended() const { return episode_ended_; }
  // A round starts on the rows there are now.
  void StartRound() {
    new_since_training_ = 0;
    episode_ended_ = false;
  }
  // Sets what the policy reads, after a load or a rebuild.
  void SetPending(int new_since_training, bool episode_ended) {
    new_since_training_ = new_since_training;
    episode_ended_ = episode_ended;
  }

 private:
  const int state_dim_, action_dim_;
  std::vector<float> states_, actions_, next_states_, rewards_;
  std::vector<float> terminals_;  // 1 where the client's terminal flag was set
  std::vector<uint64_t> episodes_;  // each row's episode id
  uint64_t last_seq_ = 0;
  uint64_t last_episode_ = 0;
  bool last_terminal_ = false;
  int new_since_training_ = 0;
  bool episode_ended_ = false;
  CoverageGrid coverage_;
};

}  // namespace foray::robot

#endif  // FORAY_SERVER_ROBOT_DATASET_H_
