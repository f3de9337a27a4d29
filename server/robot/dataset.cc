#include "server/robot/dataset.h"

#include "core/util/matrix.h"

namespace foray::robot {

void DatasetMirror::Add(const store::TransitionRecord& t) {
  for (double v : t.state) states_.push_back(static_cast<float>(v));
  for (double v : t.action) actions_.push_back(static_cast<float>(v));
  for (double v : t.next_state) next_states_.push_back(static_cast<float>(v));
  coverage_.Add(&next_states_[next_states_.size() - t.next_state.size()],
                static_cast<int>(t.next_state.size()));
  rewards_.push_back(static_cast<float>(t.reward));
  terminals_.push_back(t.terminal ? 1.0f : 0.0f);
  episodes_.push_back(t.episode);
  if (t.seq > last_seq_) last_seq_ = t.seq;
  if (t.terminal || (last_episode_ != 0 && t.episode != last_episode_ && !last_terminal_)) {
    episode_ended_ = true;
  }
  last_episode_ = t.episode;
  last_terminal_ = t.terminal;
  ++new_since_training_;
}

void DatasetMirror::Clear() {
  states_.clear();
  actions_.clear();
  next_states_.clear();
  rewards_.clear();
  terminals_.clear();
  episodes_.clear();
  coverage_ = CoverageGrid();  // the rows come back in seq order: bin them anew
  last_seq_ = 0;
  last_episode_ = 0;
  last_terminal_ = false;
}

model::TransitionData DatasetMirror::Snapshot() const {
  const int n = size();
  model::TransitionData d;
  d.states = Eigen::Map<const RowMatrixXf>(states_.data(), n, state_dim_);
  d.actions = Eigen::Map<const RowMatrixXf>(actions_.data(), n, action_dim_);
  d.next_states = Eigen::Map<const RowMatrixXf>(next_states_.data(), n, state_dim_);
  d.rewards = Eigen::Map<const Eigen::VectorXf>(rewards_.data(), n);
  d.terminals = Eigen::Map<const Eigen::VectorXf>(terminals_.data(), n);
  return d;
}

absl::StatusOr<std::shared_ptr<const plan::StateValue>> DatasetMirror::FitValue(
    const plan::ValueOptions& options) const {
  if (size() == 0) return absl::FailedPreconditionError("no transitions to value states from");
  absl::StatusOr<std::vector<double>> returns =
      plan::ReturnsAfter(rewards_, episodes_, terminals_, options.discount, options.terminal_value);
  if (!returns.ok()) return returns.status();
  absl::StatusOr<plan::StateValue> value =
      plan::StateValue::Fit(next_states_.data(), size(), state_dim_, *returns, options);
  if (!value.ok()) return value.status();
  return std::make_shared<const plan::StateValue>(*std::move(value));
}

absl::StatusOr<std::shared_ptr<const plan::StateValue>> DatasetMirror::FitNearbyReward(
    const plan::ValueOptions& options) const {
  if (size() == 0) return absl::FailedPreconditionError("no transitions to learn rewards from");
  plan::ValueOptions average = options;
  average.estimate = plan::ValueEstimate::kAverage;
  const std::vector<double> rewards(rewards_.begin(), rewards_.end());
  absl::StatusOr<plan::StateValue> fit =
      plan::StateValue::Fit(next_states_.data(), size(), state_dim_, rewards, average);
  if (!fit.ok()) return fit.status();
  return std::make_shared<const plan::StateValue>(*std::move(fit));
}

CoverageGrid::View DatasetMirror::Coverage(const CoverageGrid::Settings& settings) {
  return coverage_.Read(settings, next_states_, state_dim_);
}

}  // namespace foray::robot
