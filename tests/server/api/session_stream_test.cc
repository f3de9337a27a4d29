// The session stream's protocol without the network (server/api/session_stream.h): the group
// commit's replies and their order, the end of storing after a failed group, plans skipped for
// a client that has gone, and the inbox's bound and close. The same protocol runs end to end
// over gRPC in tests/server/test_service.py and tests/reliability/test_liveness.py.

#include "server/api/session_stream.h"

#include <atomic>
#include <string>
#include <thread>
#include <vector>

#include "absl/strings/match.h"
#include "absl/time/clock.h"
#include "gtest/gtest.h"
#include "tests/server/cart_config.h"

namespace foray::api {
namespace {

robot::RobotConfig Cart() { return test_configs::CartConfig("stream-cart"); }

v1::SessionClientMessage Transition(uint64_t seq, double action = 0.5) {
  v1::SessionClientMessage m;
  v1::Transition* t = m.mutable_transition();
  t->set_seq(seq);
  t->set_episode(1);
  t->set_step(static_cast<uint32_t>(seq));
  t->add_state(0.0);
  t->add_state(1.0);
  t->add_action(action);
  t->add_next_state(0.1);
  t->add_next_state(0.9);
  return m;
}

v1::SessionClientMessage PlanRequest(uint64_t request_id) {
  v1::SessionClientMessage m;
  m.mutable_plan_request()->set_request_id(request_id);
  return m;
}

// A store and a planner that log what they were asked, in order.
struct Recorder {
  std::vector<std::string> calls;
  std::vector<std::vector<uint64_t>> groups;
  bool fail_store = false;
  uint64_t durable = 0;

  SessionCommitter::Hooks Hooks() {
    return {.store =
                [this](const std::vector<store::TransitionRecord>& group, v1::Ack* ack) {
                  calls.push_back("store");
                  if (fail_store) return absl::UnavailableError("disk full");
                  std::vector<uint64_t> seqs;
                  for (const auto& t : group) seqs.push_back(t.seq);
                  groups.push_back(seqs);
                  durable = seqs.back();
                  ack->set_durable_seq(durable);
                  ack->set_accepted(seqs.size());
                  return absl::OkStatus();
                },
            .plan =
                [this](const v1::PlanRequest& request, v1::Plan* plan) {
                  calls.push_back("plan");
                  plan->set_request_id(request.request_id());
                  return absl::OkStatus();
                }};
  }
};

const auto kReads = [] { return true; };

TEST(SessionCommitterTest, TransitionsThatArriveTogetherAreStoredAsOneGroupWithOneAck) {
  Recorder recorder;
  SessionCommitter committer(Cart(), recorder.Hooks(), "test session");
  std::vector<v1::SessionClientMessage> in = {Transition(1), Transition(2), Transition(3)};
  std::vector<v1::SessionServerMessage> out = committer.Answer(std::move(in), kReads);
  ASSERT_EQ(out.size(), 1u);
  ASSERT_TRUE(out[0].has_ack());
  EXPECT_EQ(out[0].ack().durable_seq(), 3u);
  EXPECT_EQ(recorder.groups, (std::vector<std::vector<uint64_t>>{{1, 2, 3}}));
}

TEST(SessionCommitterTest, AnInvalidTransitionIsAnsweredInItsPlaceAndTheOthersAreStored) {
  Recorder recorder;
  SessionCommitter committer(Cart(), recorder.Hooks(), "test session");
  // seq 3's action is outside the limits [-1, 1]; seq 2 again does not increase.
  std::vector<v1::SessionClientMessage> in = {Transition(1), Transition(2), Transition(3, 7.0),
                                              Transition(2), Transition(4)};
  std::vector<v1::SessionServerMessage> out = committer.Answer(std::move(in), kReads);
  ASSERT_EQ(out.size(), 4u);
  EXPECT_TRUE(out[0].has_ack());
  EXPECT_EQ(out[0].ack().durable_seq(), 2u);
  ASSERT_TRUE(out[1].has_error());
  EXPECT_EQ(out[1].error().seq(), 3u);
  EXPECT_TRUE(absl::StrContains(out[1].error().message(), "action[0] is 7"))
      << out[1].error().message();
  ASSERT_TRUE(out[2].has_error());
  EXPECT_EQ(out[2].error().seq(), 2u);
  EXPECT_TRUE(absl::StrContains(out[2].error().message(), "seq must increase"))
      << out[2].error().message();
  EXPECT_TRUE(out[3].has_ack());
  EXPECT_EQ(out[3].ack().durable_seq(), 4u);
  EXPECT_EQ(recorder.groups, (std::vector<std::vector<uint64_t>>{{1, 2}, {4}}));
  EXPECT_FALSE(committer.stopped());
}

TEST(SessionCommitterTest, APlanComesAfterTheTransitionsSentBeforeItAreStored) {
  Recorder recorder;
  SessionCommitter committer(Cart(), recorder.Hooks(), "test session");
  std::vector<v1::SessionClientMessage> in = {Transition(1), Transition(2), PlanRequest(9),
                                              Transition(3)};
  std::vector<v1::SessionServerMessage> out = committer.Answer(std::move(in), kReads);
  EXPECT_EQ(recorder.calls, (std::vector<std::string>{"store", "plan", "store"}));
  ASSERT_EQ(out.size(), 3u);
  EXPECT_EQ(out[0].ack().durable_seq(), 2u);
  EXPECT_EQ(out[1].plan().request_id(), 9u);
  EXPECT_EQ(out[2].ack().durable_seq(), 3u);
}

TEST(SessionCommitterTest, AClientThatHasGoneGetsNoPlanButItsTransitionsAreStored) {
  Recorder recorder;
  SessionCommitter committer(Cart(), recorder.Hooks(), "test session");
  std::vector<v1::SessionClientMessage> in = {Transition(1), PlanRequest(9), Transition(2)};
  std::vector<v1::SessionServerMessage> out = committer.Answer(std::move(in), [] { return false; });
  EXPECT_EQ(recorder.calls, (std::vector<std::string>{"store", "store"}));
  ASSERT_EQ(out.size(), 2u);
  EXPECT_TRUE(out[0].has_ack());
  EXPECT_TRUE(out[1].has_ack());
}

TEST(SessionCommitterTest, AfterAGroupFailsNothingLaterIsStoredOrAcknowledged) {
  Recorder recorder;
  SessionCommitter committer(Cart(), recorder.Hooks(), "test session");
  ASSERT_EQ(committer.Answer({Transition(1)}, kReads).size(), 1u);
  recorder.fail_store = true;
  std::vector<v1::SessionClientMessage> in = {Transition(2), Transition(3), PlanRequest(5),
                                              Transition(4)};
  std::vector<v1::SessionServerMessage> out = committer.Answer(std::move(in), kReads);
  // One error naming the failed group's first seq; no plan and no ack after it: an ack of seq 4
  // would tell the client that 2 and 3 are durable.
  ASSERT_EQ(out.size(), 1u);
  ASSERT_TRUE(out[0].has_error());
  EXPECT_EQ(out[0].error().seq(), 2u);
  EXPECT_EQ(out[0].error().code(), static_cast<int>(absl::StatusCode::kUnavailable));
  EXPECT_TRUE(committer.stopped());
  recorder.fail_store = false;
  EXPECT_TRUE(committer.Answer({Transition(5)}, kReads).empty());
  EXPECT_EQ(recorder.calls, (std::vector<std::string>{"store", "store"}));
}

TEST(SessionCommitterTest, AMessageOfNeitherKindIsAnError) {
  Recorder recorder;
  SessionCommitter committer(Cart(), recorder.Hooks(), "test session");
  v1::SessionClientMessage hello;
  hello.mutable_hello()->set_robot_id("r-1");
  std::vector<v1::SessionServerMessage> out = committer.Answer({Transition(1), hello}, kReads);
  ASSERT_EQ(out.size(), 2u);
  EXPECT_TRUE(out[0].has_ack());
  ASSERT_TRUE(out[1].has_error());
  EXPECT_TRUE(
      absl::StrContains(out[1].error().message(), "expected a transition or a plan request"));
}

TEST(InboxTest, APushWaitsWhileTheInboxIsFullAndTakeAllHandsOverEverythingInOrder) {
  Inbox inbox(/*capacity=*/2, "test session");
  ASSERT_TRUE(inbox.Push(Transition(1)));
  ASSERT_TRUE(inbox.Push(Transition(2)));
  std::atomic<bool> third_in{false};
  std::thread pusher([&] {
    EXPECT_TRUE(inbox.Push(Transition(3)));
    third_in = true;
  });
  absl::SleepFor(absl::Milliseconds(100));
  EXPECT_FALSE(third_in.load());  // full: the reader is held back
  std::vector<v1::SessionClientMessage> first = inbox.TakeAll();
  pusher.join();
  ASSERT_EQ(first.size(), 2u);
  EXPECT_EQ(first[0].transition().seq(), 1u);
  EXPECT_EQ(first[1].transition().seq(), 2u);
  std::vector<v1::SessionClientMessage> second = inbox.TakeAll();
  ASSERT_EQ(second.size(), 1u);
  EXPECT_EQ(second[0].transition().seq(), 3u);
}

TEST(InboxTest, CloseReleasesAWaitingPushAndTakeAllDrainsThenReturnsEmpty) {
  Inbox inbox(/*capacity=*/1, "test session");
  ASSERT_TRUE(inbox.Push(Transition(1)));
  std::thread pusher([&] { EXPECT_FALSE(inbox.Push(Transition(2))); });
  absl::SleepFor(absl::Milliseconds(50));
  inbox.Close();
  pusher.join();
  EXPECT_EQ(inbox.TakeAll().size(), 1u);
  EXPECT_TRUE(inbox.TakeAll().empty());
  EXPECT_FALSE(inbox.Push(Transition(3)));
}

}  // namespace
}  // namespace foray::api
