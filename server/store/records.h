// What the store's checkpoint and progress records hold, in domain terms, and their byte
// encoding. The bytes are the foray.v1 wire messages TrainingReport and EpisodeSummary, so that
// the monitoring stream passes a stored record on as it is; the layers above the store work
// with these structs and never with the generated types (the api layer converts them with
// server/store/records_wire.h).
//
//   record.payload = EncodeEpisode(episode);
//   std::optional<EpisodeRecord> back = DecodeEpisode(record.payload);
#ifndef FORAY_SERVER_STORE_RECORDS_H_
#define FORAY_SERVER_STORE_RECORDS_H_

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "absl/time/time.h"
#include "core/model/trainer.h"

namespace foray::store {

// A published model version's training: the trainer's report, how long the round took and
// when it finished (0 seconds and the publishing time for an imported or restored model).
struct TrainingRecord {
  uint64_t model_version = 0;
  model::TrainingReport report;
  double training_seconds = 0.0;
  absl::Time finished_at;
};

// One finished episode: steps, return, mean information gain of the plans made during it
// (the first step of each plan, the one executed), when it ended.
struct EpisodeRecord {
  uint64_t episode = 0;
  int steps = 0;
  double episode_return = 0.0;
  double information_gain = 0.0;  // nats per executed step
  absl::Time ended_at;
  bool evaluation = false;          // its plans were evaluation plans
  bool success = false;             // return > the robot's success_return
  bool terminal = false;            // ended by a terminal transition (not a time limit)
  std::vector<double> final_state;  // the last transition's next_state, state units
};

std::string EncodeTraining(const TrainingRecord& training);
// Bytes that do not parse give nullopt.
std::optional<TrainingRecord> DecodeTraining(std::string_view bytes);

std::string EncodeEpisode(const EpisodeRecord& episode);
std::optional<EpisodeRecord> DecodeEpisode(std::string_view bytes);

}  // namespace foray::store

#endif  // FORAY_SERVER_STORE_RECORDS_H_
