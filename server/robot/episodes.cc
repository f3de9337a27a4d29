#include "server/robot/episodes.h"

#include <utility>

#include "absl/time/clock.h"

namespace foray::robot {

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

void EpisodeTracker::Add(const store::TransitionRecord& t, double success_return) {
  if (current_steps_ > 0 && t.episode != current_episode_)
    Close(/*terminal=*/false, success_return);
  if (evaluate_next_ && !replaying_) {
    MarkEvaluation(t.episode);
    evaluate_next_ = false;
  }
  current_episode_ = t.episode;
  ++current_steps_;
  current_return_ += t.reward;
  current_final_state_ = t.next_state;
  if (t.terminal) Close(/*terminal=*/true, success_return);
}

void EpisodeTracker::AddPlanGain(double nats) {
  plan_gain_sum_ += nats;
  ++plan_gain_count_;
}

void EpisodeTracker::MarkEvaluation(uint64_t episode) {
  evaluation_episodes_.insert(episode);
  while (evaluation_episodes_.size() > kMarked)
    evaluation_episodes_.erase(evaluation_episodes_.begin());
}

void EpisodeTracker::BeginReplay(bool rebuild) {
  replaying_ = true;
  if (rebuild) {
    // Every episode is counted again from the rows: the counts start afresh (the evaluation
    // marks and the records not yet written stay).
    episodes_ = 0;
    current_steps_ = 0;
    current_return_ = 0.0;
    exploration_ = EpisodeTally();
    evaluation_ = EpisodeTally();
  }
}

std::vector<EpisodeRecord> EpisodeTracker::TakeUnrecorded() {
  std::vector<EpisodeRecord> out;
  out.swap(unrecorded_);
  return out;
}

void EpisodeTracker::Close(bool terminal, double success_return) {
  if (current_steps_ == 0) return;
  EpisodeRecord e;
  e.episode = current_episode_;
  e.steps = current_steps_;
  e.episode_return = current_return_;
  e.information_gain = plan_gain_count_ > 0 ? plan_gain_sum_ / plan_gain_count_ : 0.0;
  e.ended_at = absl::Now();
  e.evaluation = evaluation_episodes_.count(current_episode_) > 0;
  e.success = current_return_ > success_return;
  e.terminal = terminal;
  e.final_state = std::move(current_final_state_);
  current_final_state_.clear();
  (e.evaluation ? evaluation_ : exploration_).Add(e);
  ++episodes_;
  last_ = e;
  if (!replaying_) unrecorded_.push_back(e);
  current_steps_ = 0;
  current_return_ = 0.0;
  plan_gain_sum_ = 0.0;
  plan_gain_count_ = 0;
}

}  // namespace foray::robot
