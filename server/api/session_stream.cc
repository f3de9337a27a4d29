#include "server/api/session_stream.h"

#include <cstdio>
#include <utility>

#include "absl/strings/str_format.h"
#include "server/api/convert.h"

namespace foray::api {

bool Inbox::Push(v1::SessionClientMessage message, absl::Duration slow_wait) {
  absl::MutexLock lock(&mu_);
  auto room = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) {
    return closed_ || queue_.size() < capacity_;
  };
  if (!mu_.AwaitWithTimeout(absl::Condition(&room), slow_wait)) {
    std::fprintf(stderr,
                 "forayd: the %s stopped reading its client for %s: %zu messages wait for the "
                 "store or for the client to read its replies (flow control holds the client)\n",
                 what_.c_str(), absl::FormatDuration(slow_wait).c_str(), queue_.size());
    mu_.Await(absl::Condition(&room));
  }
  if (closed_) return false;
  queue_.push_back(std::move(message));
  return true;
}

void Inbox::Close() {
  absl::MutexLock lock(&mu_);
  closed_ = true;
}

std::vector<v1::SessionClientMessage> Inbox::TakeAll() {
  absl::MutexLock lock(&mu_);
  auto ready = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) { return closed_ || !queue_.empty(); };
  mu_.Await(absl::Condition(&ready));
  std::vector<v1::SessionClientMessage> out;
  out.swap(queue_);
  return out;
}

v1::SessionServerMessage ErrorReply(const absl::Status& s, uint64_t seq, uint64_t request_id) {
  v1::SessionServerMessage out;
  out.mutable_error()->set_code(static_cast<int>(s.code()));
  out.mutable_error()->set_message(std::string(s.message()));
  out.mutable_error()->set_seq(seq);
  out.mutable_error()->set_request_id(request_id);
  return out;
}

SessionCommitter::SessionCommitter(robot::RobotConfig config, Hooks hooks, std::string what)
    : config_(std::move(config)), hooks_(std::move(hooks)), what_(std::move(what)) {}

void SessionCommitter::Commit(std::vector<v1::SessionServerMessage>* replies) {
  if (group_.empty()) return;
  v1::SessionServerMessage ack;
  if (absl::Status s = hooks_.store(group_, ack.mutable_ack()); !s.ok()) {
    ack = ErrorReply(s, group_.front().seq, 0);
    stopped_ = true;
    std::fprintf(stderr,
                 "forayd: ended the %s: a group of %zu transitions from seq %llu was not stored "
                 "(%s); the client reconnects and resends it\n",
                 what_.c_str(), group_.size(), static_cast<unsigned long long>(group_.front().seq),
                 std::string(s.message()).c_str());
  }
  replies->push_back(std::move(ack));
  group_.clear();
}

std::vector<v1::SessionServerMessage> SessionCommitter::Answer(
    std::vector<v1::SessionClientMessage> messages, const std::function<bool()>& client_reads) {
  std::vector<v1::SessionServerMessage> replies;
  for (v1::SessionClientMessage& in : messages) {
    if (stopped_) break;
    if (in.has_transition()) {
      const uint64_t seq = in.transition().seq();
      google::protobuf::RepeatedPtrField<v1::Transition> one;
      one.Add()->Swap(in.mutable_transition());
      absl::StatusOr<std::vector<store::TransitionRecord>> record =
          TransitionsFromWire(one, config_);
      absl::Status valid = record.status();
      if (valid.ok() && seq <= last_seq_seen_) {
        valid = absl::InvalidArgumentError(absl::StrFormat(
            "transition seq %d comes after seq %d in this session; seq must increase", seq,
            last_seq_seen_));
      }
      if (!valid.ok()) {
        Commit(&replies);  // keep the replies in the order of the messages
        replies.push_back(ErrorReply(valid, seq, 0));
        continue;
      }
      last_seq_seen_ = seq;
      group_.push_back(std::move(record->front()));
    } else if (in.has_plan_request()) {
      Commit(&replies);
      if (stopped_ || !client_reads()) continue;
      v1::SessionServerMessage out;
      if (absl::Status s = hooks_.plan(in.plan_request(), out.mutable_plan()); !s.ok()) {
        out = ErrorReply(s, 0, in.plan_request().request_id());
      }
      replies.push_back(std::move(out));
    } else {
      Commit(&replies);
      replies.push_back(ErrorReply(
          absl::InvalidArgumentError("expected a transition or a plan request after the hello"), 0,
          0));
    }
  }
  Commit(&replies);  // nothing left after a failed group: it was cleared
  return replies;
}

}  // namespace foray::api
