// The store's record encoding: what the runtime writes into checkpoints and progress records
// reads back the same, as the foray.v1 wire messages the monitoring stream passes on; bytes
// that are not such a message read as nothing.

#include "server/store/records.h"

#include "foray/v1/monitoring.pb.h"
#include "gtest/gtest.h"
#include "server/store/records_wire.h"

namespace foray::store {
namespace {

TEST(RecordsTest, TrainingRoundTripsThroughItsWireMessage) {
  TrainingRecord t;
  t.model_version = 12;
  t.report.epochs = 30;
  t.report.transitions = 4000;
  t.report.train_nll = -1.25;
  t.report.holdout_nll = -1.0;
  t.report.holdout_mse = 0.03;
  t.report.within_1sigma = {0.6, 0.7};
  t.report.within_2sigma = {0.9, 0.95};
  t.report.terminal_rows = 21;
  t.report.terminal_pos_weight = 10.0;
  t.report.holdout_termination_bce = 0.2;
  t.training_seconds = 3.5;
  t.finished_at = absl::FromUnixMicros(1796000000123456);
  const std::optional<TrainingRecord> back = DecodeTraining(EncodeTraining(t));
  ASSERT_TRUE(back.has_value());
  EXPECT_EQ(back->model_version, 12u);
  EXPECT_EQ(back->report.epochs, 30);
  EXPECT_EQ(back->report.transitions, 4000);
  EXPECT_DOUBLE_EQ(back->report.holdout_nll, -1.0);
  EXPECT_EQ(back->report.within_2sigma, t.report.within_2sigma);
  EXPECT_EQ(back->report.terminal_rows, 21);
  EXPECT_DOUBLE_EQ(back->report.terminal_pos_weight, 10.0);
  EXPECT_DOUBLE_EQ(back->training_seconds, 3.5);
  EXPECT_EQ(back->finished_at, t.finished_at);
  // The bytes are the wire message itself.
  v1::TrainingReport wire;
  ASSERT_TRUE(wire.ParseFromString(EncodeTraining(t)));
  EXPECT_EQ(wire.model_version(), 12u);
  EXPECT_EQ(wire.finished_at().seconds(), 1796000000);
  EXPECT_EQ(wire.finished_at().nanos(), 123456000);
}

TEST(RecordsTest, EpisodeRoundTripsThroughItsWireMessage) {
  const EpisodeRecord e{.episode = 9,
                        .steps = 150,
                        .episode_return = 2.5,
                        .information_gain = 0.75,
                        .ended_at = absl::FromUnixSeconds(1796000000),
                        .evaluation = true,
                        .success = true,
                        .terminal = false,
                        .final_state = {0.25, -1.5, 3.0}};
  const std::optional<EpisodeRecord> back = DecodeEpisode(EncodeEpisode(e));
  ASSERT_TRUE(back.has_value());
  EXPECT_EQ(back->episode, 9u);
  EXPECT_EQ(back->steps, 150);
  EXPECT_DOUBLE_EQ(back->episode_return, 2.5);
  EXPECT_DOUBLE_EQ(back->information_gain, 0.75);
  EXPECT_EQ(back->ended_at, e.ended_at);
  EXPECT_TRUE(back->evaluation);
  EXPECT_TRUE(back->success);
  EXPECT_FALSE(back->terminal);
  EXPECT_EQ(back->final_state, e.final_state);
  v1::EpisodeSummary wire;
  ASSERT_TRUE(wire.ParseFromString(EncodeEpisode(e)));
  EXPECT_DOUBLE_EQ(wire.return_(), 2.5);
}

TEST(RecordsTest, BytesThatAreNoMessageReadAsNothing) {
  // A field tag with wire type 7, which protobuf's wire format does not define.
  EXPECT_FALSE(DecodeEpisode(std::string("\x0f\x01", 2)).has_value());
  EXPECT_FALSE(DecodeTraining(std::string("\x0f\x01", 2)).has_value());
}

}  // namespace
}  // namespace foray::store
