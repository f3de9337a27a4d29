// A robot session stream's protocol, apart from the network: the inbox between the stream's
// reader thread and its handler, and the group commit that answers what arrived.
//
//   Inbox inbox(/*capacity=*/20000, "session of robot \"arm\"");
//   // reader thread: while (stream->Read(&in)) if (!inbox.Push(std::move(in))) break;
//   //                inbox.Close();
//   SessionCommitter committer(config, {.store = ..., .plan = ...}, what);
//   for (auto messages = inbox.TakeAll(); !messages.empty(); messages = inbox.TakeAll())
//     for (auto& reply : committer.Answer(std::move(messages), reads)) Write(reply);
#ifndef FORAY_SERVER_API_SESSION_STREAM_H_
#define FORAY_SERVER_API_SESSION_STREAM_H_

#include <cstddef>
#include <cstdint>
#include <functional>
#include <string>
#include <vector>

#include "absl/base/thread_annotations.h"
#include "absl/status/status.h"
#include "absl/synchronization/mutex.h"
#include "foray/v1/session.pb.h"
#include "server/robot/config.h"
#include "server/store/store.h"

namespace foray::api {

// Messages read from a session stream by its reader thread, taken by the handler in groups. It
// holds at most `capacity` messages: when the handler falls behind (slow disk, or a client that
// does not read its acks, so replies cannot be written), the reader stops reading and gRPC's
// flow control holds the client back, instead of memory growing without bound. Thread-safe;
// `capacity_` and `what_` are constant, `mu_` guards the rest.
class Inbox {
 public:
  // `what` names the session in the server's log.
  Inbox(size_t capacity, std::string what) : capacity_(capacity), what_(std::move(what)) {}
  // Waits while the inbox is full; false when it was closed meanwhile. A wait of more than
  // `slow_wait` is logged once per wait: the session has stopped reading its client.
  bool Push(v1::SessionClientMessage message, absl::Duration slow_wait = absl::Seconds(10));
  void Close();
  // Everything queued, waiting until there is something; empty when closed and drained.
  std::vector<v1::SessionClientMessage> TakeAll();

 private:
  const size_t capacity_;
  const std::string what_;
  absl::Mutex mu_;
  std::vector<v1::SessionClientMessage> queue_ ABSL_GUARDED_BY(mu_);
  bool closed_ ABSL_GUARDED_BY(mu_) = false;
};

// The error reply of a session stream.
v1::SessionServerMessage ErrorReply(const absl::Status& s, uint64_t seq, uint64_t request_id);

// The group commit of one session. The messages that arrived during one commit are answered in
// their order: consecutive valid transitions go to the store as one group (one transaction, one
// ack); an invalid transition gets an error reply naming its seq, after the group before it is
// stored; a plan request is answered after the transitions before it are stored. Once a group
// could not be stored (storage error, rate limit), nothing later in the session may be: an ack
// reports the highest stored seq, and a later group's ack would tell the client that the failed
// group is durable. The committer then stops (stopped()): the session ends, the client
// reconnects and resends. Not thread-safe: one per session, used by its handler thread.
class SessionCommitter {
 public:
  struct Hooks {
    // Stores a validated group, durable on return, and fills the ack.
    std::function<absl::Status(const std::vector<store::TransitionRecord>&, v1::Ack*)> store;
    // Plans for a request.
    std::function<absl::Status(const v1::PlanRequest&, v1::Plan*)> plan;
  };
  // `config` validates the transitions; `what` names the session in the server's log.
  SessionCommitter(robot::RobotConfig config, Hooks hooks, std::string what);

  // The replies to `messages`, in their order. `client_reads` (asked at each plan request):
  // whether anyone will read a plan; a client that has gone gets none, but its transitions are
  // still stored.
  std::vector<v1::SessionServerMessage> Answer(std::vector<v1::SessionClientMessage> messages,
                                               const std::function<bool()>& client_reads);
  // A group could not be stored; every later message is ignored.
  bool stopped() const { return stopped_; }

 private:
  // Stores `group_` and appends its ack or error to `replies`.
  void Commit(std::vector<v1::SessionServerMessage>* replies);

  const robot::RobotConfig config_;
  const Hooks hooks_;
  const std::string what_;
  std::vector<store::TransitionRecord> group_;  // validated, in arrival order
  uint64_t last_seq_seen_ = 0;
  bool stopped_ = false;
};

}  // namespace foray::api

#endif  // FORAY_SERVER_API_SESSION_STREAM_H_
