// One robot's episodes as its transitions arrive: the episode in progress, the information
// gain of the plans made during it, which episodes are evaluation episodes, tallies per kind,
// and the finished episodes not yet written to the store. Not thread-safe: the robot runtime
// holds it under its mutex.
//
//   EpisodeTracker episodes;
//   episodes.Add(transition, config.success_return);   // closes an episode where one ends
//   for (const EpisodeRecord& e : episodes.TakeUnrecorded()) store->AppendProgress(...);
#ifndef FORAY_SERVER_ROBOT_EPISODES_H_
#define FORAY_SERVER_ROBOT_EPISODES_H_

#include <cstddef>
#include <cstdint>
#include <deque>
#include <optional>
#include <set>
#include <utility>
#include <vector>

#include "server/store/records.h"
#include "server/store/store.h"

namespace foray::robot {

using store::EpisodeRecord;

// Episodes of one kind (exploration or evaluation) so far; `recent` holds the last kRecent.
struct EpisodeTally {
  static constexpr int kRecent = 10;
  uint64_t episodes = 0;
  uint64_t successes = 0;
  uint64_t terminals = 0;
  double last_return = 0.0;
  std::deque<std::pair<double, bool>> recent;  // (return, success), oldest first
  void Add(const EpisodeRecord& e);
  double RecentMeanReturn() const;
  double RecentSuccessRate() const;
};

class EpisodeTracker {
 public:
  // Counts one transition into its episode. An episode ends at a terminal transition or where
  // the episode id changes (a time limit); it succeeds when its return exceeds success_return.
  void Add(const store::TransitionRecord& t, double success_return);
  // Adds the information gain of a plan made now (its first step, the one executed).
  void AddPlanGain(double nats);
  // Marks `episode` as an evaluation episode (the newest kMarked marks are kept).
  void MarkEvaluation(uint64_t episode);
  // The episode of the next transition added is an evaluation episode.
  void EvaluateNext() { evaluate_next_ = true; }

  // While replaying stored transitions (a load or a rebuild) finished episodes are on record
  // already: they are counted but not queued for the store, and no mark is taken. A rebuild
  // (every row again, after a load) counts the episodes afresh.
  void BeginReplay(bool rebuild);
  void EndReplay() { replaying_ = false; }
  // The finished episodes to write to the store, oldest first; the queue is left empty.
  std::vector<EpisodeRecord> TakeUnrecorded();

  uint64_t episodes() const { return episodes_; }
  const std::optional<EpisodeRecord>& last() const { return last_; }
  const EpisodeTally& exploration() const { return exploration_; }
  const EpisodeTally& evaluation() const { return evaluation_; }

 private:
  static constexpr size_t kMarked = 4096;
  // `terminal`: the episode ended by a terminal transition.
  void Close(bool terminal, double success_return);

  bool replaying_ = false;
  uint64_t current_episode_ = 0;
  int current_steps_ = 0;
  double current_return_ = 0.0;
  std::vector<double> current_final_state_;  // the newest transition's next_state
  double plan_gain_sum_ = 0.0;
  int plan_gain_count_ = 0;
  uint64_t episodes_ = 0;
  std::optional<EpisodeRecord> last_;
  std::vector<EpisodeRecord> unrecorded_;
  std::set<uint64_t> evaluation_episodes_;
  bool evaluate_next_ = false;
  EpisodeTally exploration_, evaluation_;
};

}  // namespace foray::robot

#endif  // FORAY_SERVER_ROBOT_EPISODES_H_
