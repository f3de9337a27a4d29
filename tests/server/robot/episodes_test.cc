// The robot runtime's parts without the runtime: the episode tracker (where an episode ends,
// which episodes count as evaluation, what is queued for the store, replays) and the dataset
// mirror (rows, the training policy's bookkeeping, the snapshot), checked against the rules
// documented with the Transition message (proto/foray/v1/types.proto): a terminal transition
// ends an episode, and so does a change of episode id (a time limit).

#include "server/robot/episodes.h"

#include <vector>

#include "gtest/gtest.h"
#include "server/robot/dataset.h"
#include "server/robot/plan_state.h"

namespace foray::robot {
namespace {

store::TransitionRecord Row(uint64_t seq, uint64_t episode, double reward, bool terminal = false) {
  store::TransitionRecord t;
  t.seq = seq;
  t.episode = episode;
  t.state = {static_cast<double>(seq), 0.0};
  t.action = {0.5};
  t.next_state = {static_cast<double>(seq) + 1.0, -1.0};
  t.reward = reward;
  t.terminal = terminal;
  return t;
}

TEST(EpisodeTrackerTest, AnEpisodeEndsAtATerminalTransitionOrANewEpisodeId) {
  EpisodeTracker tracker;
  tracker.Add(Row(1, 7, 1.0), /*success_return=*/1.5);
  tracker.Add(Row(2, 7, 1.0), 1.5);
  EXPECT_EQ(tracker.episodes(), 0u);  // still running
  tracker.Add(Row(3, 8, 0.0), 1.5);   // a new id: episode 7 ended by its time limit
  ASSERT_EQ(tracker.episodes(), 1u);
  EXPECT_EQ(tracker.last()->episode, 7u);
  EXPECT_EQ(tracker.last()->steps, 2);
  EXPECT_DOUBLE_EQ(tracker.last()->episode_return, 2.0);
  EXPECT_TRUE(tracker.last()->success);  // 2.0 > 1.5
  EXPECT_FALSE(tracker.last()->terminal);
  // The state it ended in: the next_state of its last transition (seq 2), not of seq 3.
  EXPECT_EQ(tracker.last()->final_state, (std::vector<double>{3.0, -1.0}));
  tracker.Add(Row(4, 8, 0.5, /*terminal=*/true), 1.5);
  ASSERT_EQ(tracker.episodes(), 2u);
  EXPECT_EQ(tracker.last()->steps, 2);
  EXPECT_TRUE(tracker.last()->terminal);
  EXPECT_FALSE(tracker.last()->success);
  EXPECT_EQ(tracker.last()->final_state, (std::vector<double>{5.0, -1.0}));
  EXPECT_EQ(tracker.exploration().episodes, 2u);
  EXPECT_EQ(tracker.exploration().terminals, 1u);
  EXPECT_EQ(tracker.exploration().successes, 1u);
  EXPECT_EQ(tracker.TakeUnrecorded().size(), 2u);
  EXPECT_TRUE(tracker.TakeUnrecorded().empty());
}

TEST(EpisodeTrackerTest, EvaluationEpisodesByIdOrTheNextTransitionAreTalliedApart) {
  EpisodeTracker tracker;
  tracker.MarkEvaluation(2);
  tracker.Add(Row(1, 1, 1.0, true), 0.0);
  tracker.Add(Row(2, 2, 1.0, true), 0.0);
  tracker.EvaluateNext();
  tracker.Add(Row(3, 3, 0.0, true), 0.0);
  EXPECT_EQ(tracker.exploration().episodes, 1u);
  EXPECT_EQ(tracker.evaluation().episodes, 2u);
  EXPECT_EQ(tracker.evaluation().successes, 1u);
  EXPECT_DOUBLE_EQ(tracker.evaluation().RecentSuccessRate(), 0.5);
  EXPECT_DOUBLE_EQ(tracker.evaluation().RecentMeanReturn(), 0.5);
}

TEST(EpisodeTrackerTest, PlanGainIsTheMeanOverTheEpisodesPlans) {
  EpisodeTracker tracker;
  tracker.AddPlanGain(1.0);
  tracker.AddPlanGain(2.0);
  tracker.Add(Row(1, 1, 0.0, true), 0.0);
  EXPECT_DOUBLE_EQ(tracker.last()->information_gain, 1.5);
  tracker.Add(Row(2, 2, 0.0, true), 0.0);
  EXPECT_DOUBLE_EQ(tracker.last()->information_gain, 0.0);  // no plan during it
}

TEST(EpisodeTrackerTest, ReplayedEpisodesAreCountedOnceAndNotQueued) {
  EpisodeTracker tracker;
  tracker.BeginReplay(/*rebuild=*/false);
  tracker.Add(Row(1, 1, 1.0, true), 0.0);
  tracker.EndReplay();
  EXPECT_EQ(tracker.episodes(), 1u);
  EXPECT_TRUE(tracker.TakeUnrecorded().empty());
  tracker.Add(Row(2, 2, 1.0, true), 0.0);
  ASSERT_EQ(tracker.TakeUnrecorded().size(), 1u);
  // A rebuild goes over every row again: the counts are those of the rows, not twice.
  tracker.BeginReplay(/*rebuild=*/true);
  tracker.Add(Row(1, 1, 1.0, true), 0.0);
  tracker.Add(Row(2, 2, 1.0, true), 0.0);
  tracker.EndReplay();
  EXPECT_EQ(tracker.episodes(), 2u);
  EXPECT_EQ(tracker.exploration().episodes, 2u);
  EXPECT_TRUE(tracker.TakeUnrecorded().empty());
}

TEST(DatasetMirrorTest, RowsAndWhatTheTrainingPolicyReads) {
  DatasetMirror data(/*state_dim=*/2, /*action_dim=*/1);
  data.Add(Row(1, 1, 0.25));
  data.Add(Row(2, 1, 0.5));
  EXPECT_EQ(data.size(), 2);
  EXPECT_EQ(data.last_seq(), 2u);
  EXPECT_EQ(data.new_since_training(), 2);
  EXPECT_FALSE(data.episode_ended());
  data.StartRound();
  data.Add(Row(3, 2, 1.0));  // a new episode id: episode 1 ended
  EXPECT_TRUE(data.episode_ended());
  EXPECT_EQ(data.new_since_training(), 1);
  data.StartRound();
  data.Add(Row(4, 2, 1.0, /*terminal=*/true));
  EXPECT_TRUE(data.episode_ended());
  data.StartRound();
  data.Add(Row(5, 3, 1.0));  // after a terminal transition a new id is no second ending
  EXPECT_FALSE(data.episode_ended());

  const model::TransitionData rows = data.Snapshot();
  ASSERT_EQ(rows.states.rows(), 5);
  ASSERT_EQ(rows.states.cols(), 2);
  EXPECT_FLOAT_EQ(rows.states(2, 0), 3.0f);
  EXPECT_FLOAT_EQ(rows.next_states(4, 1), -1.0f);
  EXPECT_FLOAT_EQ(rows.actions(0, 0), 0.5f);
  EXPECT_FLOAT_EQ(rows.rewards(1), 0.5f);
  EXPECT_FLOAT_EQ(rows.terminals(3), 1.0f);
  EXPECT_FLOAT_EQ(rows.terminals(4), 0.0f);

  data.Clear();
  EXPECT_EQ(data.size(), 0);
  EXPECT_EQ(data.last_seq(), 0u);
  EXPECT_EQ(data.new_since_training(), 1);  // the bookkeeping stays over a rebuild
}

TEST(PlanStateTest, LatencyPercentilesOverTheRing) {
  PlanState plans;
  EXPECT_DOUBLE_EQ(plans.Percentiles().p50_ms, 0.0);
  for (int i = 1; i <= 101; ++i) {
    plans.Start();
    plans.Finish(/*compute_ms=*/i, /*missed=*/i > 99);
  }
  // Nearest rank on the sorted 1..101: index q * 100.
  EXPECT_DOUBLE_EQ(plans.Percentiles().p50_ms, 51.0);
  EXPECT_DOUBLE_EQ(plans.Percentiles().p90_ms, 91.0);
  EXPECT_DOUBLE_EQ(plans.Percentiles().p99_ms, 100.0);
  EXPECT_EQ(plans.deadline_misses(), 2u);
  EXPECT_EQ(plans.plans(), 101u);
}

}  // namespace
}  // namespace foray::robot
