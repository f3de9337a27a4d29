#include "server/store/records.h"

#include "server/store/records_wire.h"

namespace foray::store {

google::protobuf::Timestamp TimeToWire(absl::Time t) {
  google::protobuf::Timestamp out;
  const int64_t micros = absl::ToUnixMicros(t);
  out.set_seconds(micros / 1000000);
  out.set_nanos(static_cast<int32_t>(micros % 1000000) * 1000);
  return out;
}

absl::Time TimeFromWire(const google::protobuf::Timestamp& t) {
  return absl::FromUnixSeconds(t.seconds()) + absl::Nanoseconds(t.nanos());
}

v1::TrainingReport TrainingToWire(const TrainingRecord& training) {
  const model::TrainingReport& report = training.report;
  v1::TrainingReport r;
  r.set_model_version(training.model_version);
  r.set_epochs(static_cast<uint32_t>(report.epochs));
  r.set_transitions(static_cast<uint64_t>(report.transitions));
  r.set_train_nll(report.train_nll);
  r.set_holdout_nll(report.holdout_nll);
  r.set_holdout_mse(report.holdout_mse);
  for (double v : report.within_1sigma) r.add_within_1sigma(v);
  for (double v : report.within_2sigma) r.add_within_2sigma(v);
  for (double v : report.holdout_rmse) r.add_holdout_rmse(v);
  r.set_terminal_transitions(static_cast<uint64_t>(report.terminal_rows));
  r.set_terminal_weight(report.terminal_pos_weight);
  r.set_holdout_termination_bce(report.holdout_termination_bce);
  r.set_duration_s(training.training_seconds);
  *r.mutable_finished_at() = TimeToWire(training.finished_at);
  return r;
}

TrainingRecord TrainingFromWire(const v1::TrainingReport& r) {
  TrainingRecord out;
  out.model_version = r.model_version();
  out.report.epochs = static_cast<int>(r.epochs());
  out.report.transitions = static_cast<int>(r.transitions());
  out.report.train_nll = r.train_nll();
  out.report.holdout_nll = r.holdout_nll();
  out.report.holdout_mse = r.holdout_mse();
  out.report.within_1sigma.assign(r.within_1sigma().begin(), r.within_1sigma().end());
  out.report.within_2sigma.assign(r.within_2sigma().begin(), r.within_2sigma().end());
  out.report.holdout_rmse.assign(r.holdout_rmse().begin(), r.holdout_rmse().end());
  out.report.terminal_rows = static_cast<int>(r.terminal_transitions());
  out.report.terminal_pos_weight = r.terminal_weight();
  out.report.holdout_termination_bce = r.holdout_termination_bce();
  out.training_seconds = r.duration_s();
  out.finished_at = TimeFromWire(r.finished_at());
  return out;
}

v1::EpisodeSummary EpisodeToWire(const EpisodeRecord& e) {
  v1::EpisodeSummary s;
  s.set_episode(e.episode);
  s.set_steps(static_cast<uint32_t>(e.steps));
  s.set_return_(e.episode_return);
  s.set_information_gain(e.information_gain);
  *s.mutable_ended_at() = TimeToWire(e.ended_at);
  s.set_evaluation(e.evaluation);
  s.set_success(e.success);
  s.set_terminal(e.terminal);
  for (double v : e.final_state) s.add_final_state(v);
  return s;
}

EpisodeRecord EpisodeFromWire(const v1::EpisodeSummary& s) {
  return {.episode = s.episode(),
          .steps = static_cast<int>(s.steps()),
          .episode_return = s.return_(),
          .information_gain = s.information_gain(),
          .ended_at = TimeFromWire(s.ended_at()),
          .evaluation = s.evaluation(),
          .success = s.success(),
          .terminal = s.terminal(),
          .final_state = {s.final_state().begin(), s.final_state().end()}};
}

std::string EncodeTraining(const TrainingRecord& training) {
  return TrainingToWire(training).SerializeAsString();
}

std::optional<TrainingRecord> DecodeTraining(std::string_view bytes) {
  v1::TrainingReport wire;
  if (!wire.ParseFromArray(bytes.data(), static_cast<int>(bytes.size()))) return std::nullopt;
  return TrainingFromWire(wire);
}

std::string EncodeEpisode(const EpisodeRecord& episode) {
  return EpisodeToWire(episode).SerializeAsString();
}

std::optional<EpisodeRecord> DecodeEpisode(std::string_view bytes) {
  v1::EpisodeSummary wire;
  if (!wire.ParseFromArray(bytes.data(), static_cast<int>(bytes.size()))) return std::nullopt;
  return EpisodeFromWire(wire);
}

}  // namespace foray::store
