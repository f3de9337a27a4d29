// The wire form of the store's records (server/store/records.h), for the api and web layers.
#ifndef FORAY_SERVER_STORE_RECORDS_WIRE_H_
#define FORAY_SERVER_STORE_RECORDS_WIRE_H_

#include "foray/v1/monitoring.pb.h"
#include "foray/v1/types.pb.h"
#include "server/store/records.h"

namespace foray::store {

// Timestamps: microsecond precision (absl::Time's to the wire and back).
google::protobuf::Timestamp TimeToWire(absl::Time t);
absl::Time TimeFromWire(const google::protobuf::Timestamp& t);

v1::TrainingReport TrainingToWire(const TrainingRecord& training);
TrainingRecord TrainingFromWire(const v1::TrainingReport& wire);

v1::EpisodeSummary EpisodeToWire(const EpisodeRecord& episode);
EpisodeRecord EpisodeFromWire(const v1::EpisodeSummary& wire);

}  // namespace foray::store

#endif  // FORAY_SERVER_STORE_RECORDS_WIRE_H_
