#include "client/cpp/session.h"

#include <fcntl.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <fstream>
#include <random>
#include <utility>

#include "absl/strings/str_cat.h"
#include "absl/strings/str_format.h"
#include "absl/strings/str_join.h"
#include "absl/strings/strip.h"
#include "foray/v1/registry.grpc.pb.h"

namespace foray::client {
namespace {

namespace v1 = foray::v1;

std::shared_ptr<grpc::Channel> MakeChannel(const std::string& address,
                                           std::shared_ptr<grpc::ChannelCredentials> credentials,
                                           const std::string& tls_server_name,
                                           absl::Duration initial_backoff,
                                           absl::Duration max_backoff) {
  if (credentials == nullptr) credentials = grpc::InsecureChannelCredentials();
  grpc::ChannelArguments args;
  if (!tls_server_name.empty()) args.SetSslTargetNameOverride(tls_server_name);
  // gRPC's own reconnect backoff (1 s doubling to 120 s by default) would otherwise hold the
  // channel down long after the server is back.
  const int initial_ms = static_cast<int>(absl::ToInt64Milliseconds(initial_backoff));
  args.SetInt(GRPC_ARG_INITIAL_RECONNECT_BACKOFF_MS, std::max(initial_ms, 1));
  args.SetInt(GRPC_ARG_MAX_RECONNECT_BACKOFF_MS,
              std::max(static_cast<int>(absl::ToInt64Milliseconds(max_backoff)), 1));
  // A ping every 20 s finds a dead server (or network) within 30 s even while nothing is sent;
  // forayd accepts pings that often.
  args.SetInt(GRPC_ARG_KEEPALIVE_TIME_MS, 20000);
  args.SetInt(GRPC_ARG_KEEPALIVE_TIMEOUT_MS, 10000);
  args.SetInt(GRPC_ARG_KEEPALIVE_PERMIT_WITHOUT_CALLS, 1);
  return grpc::CreateCustomChannel(address, credentials, args);
}

absl::Status FromGrpc(const grpc::Status& s) {
  return absl::Status(static_cast<absl::StatusCode>(s.error_code()), s.error_message());
}

// InvalidArgument naming `field` when a value is not finite or the size is not `expected`
// (expected 0: any size).
absl::Status CheckVector(const char* field, const std::vector<double>& v, int expected) {
  if (expected > 0 && static_cast<int>(v.size()) != expected) {
    return absl::InvalidArgumentError(
        absl::StrFormat("%s has %d values, the robot's spec has %d", field, v.size(), expected));
  }
  for (size_t i = 0; i < v.size(); ++i) {
    if (!std::isfinite(v[i])) {
      return absl::InvalidArgumentError(absl::StrFormat("%s[%d] is %g; values must be finite", field, i, v[i]));
    }
  }
  return absl::OkStatus();
}

}  // namespace

std::string NewRobotId() {
  std::random_device device;
  const uint64_t bits = (static_cast<uint64_t>(device()) << 32) ^ device();
  return absl::StrFormat("r-%016x", bits);
}

absl::Status WriteIdentity(const std::string& path, const Identity& identity, bool exclusive) {
  const int fd = ::open(path.c_str(), O_WRONLY | O_CREAT | (exclusive ? O_EXCL : O_TRUNC), 0600);
  if (fd < 0) {
    return absl::PermissionDeniedError(absl::StrFormat("cannot create %s: %s", path, std::strerror(errno)));
  }
  const std::string line = absl::StrCat(identity.robot_id, " ", identity.token, "\n");
  const bool written = ::write(fd, line.data(), line.size()) == static_cast<ssize_t>(line.size());
  ::close(fd);
  if (!written) return absl::DataLossError(absl::StrFormat("writing %s failed", path));
  return absl::OkStatus();
}

absl::Status SessionOptions::Validate() const {
  if (address.empty()) return absl::InvalidArgumentError("address is empty; give host:port");
  if (identity.robot_id.empty() || identity.token.empty()) {
    return absl::InvalidArgumentError("identity needs robot_id and token (from registration)");
  }
  if (initial_backoff <= absl::ZeroDuration() || max_backoff < initial_backoff) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "backoff: initial %s, max %s; need 0 < initial <= max", absl::FormatDuration(initial_backoff),
        absl::FormatDuration(max_backoff)));
  }
  if (max_unacknowledged == 0) return absl::InvalidArgumentError("max_unacknowledged is 0");
  if (write_batch < 1) return absl::InvalidArgumentError(absl::StrFormat("write_batch is %d", write_batch));
  if (ack_timeout <= absl::ZeroDuration()) {
    return absl::InvalidArgumentError(absl::StrFormat("ack_timeout is %s; give a duration above 0",
                                                      absl::FormatDuration(ack_timeout)));
  }
  if (safe_action.kind == SafeAction::Kind::kFixed) {
    if (safe_action.fixed.empty()) return absl::InvalidArgumentError("safe_action is kFixed but fixed is empty");
    if (absl::Status s = CheckVector("safe_action.fixed", safe_action.fixed, 0); !s.ok()) return s;
  }
  return absl::OkStatus();
}

RobotSession::RobotSession(SessionOptions options)
    : options_(std::move(options)),
      channel_(MakeChannel(options_.address, options_.credentials, options_.tls_server_name,
                           options_.initial_backoff, options_.max_backoff)),
      stub_(v1::RobotSession::NewStub(channel_)) {
  if (absl::Status s = options_.Validate(); !s.ok()) {
    std::fprintf(stderr, "foray::client::RobotSession: %s\n", std::string(s.message()).c_str());
    std::abort();
  }
  io_thread_ = std::thread([this] { IoLoop(); });
  watch_thread_ = std::thread([this] { WatchLoop(); });
}

RobotSession::~RobotSession() { Stop(); }

void RobotSession::Stop() {
  {
    absl::MutexLock lock(&mu_);
    stopping_ = true;
    if (context_ != nullptr) context_->TryCancel();
  }
  if (io_thread_.joinable()) io_thread_.join();
  if (watch_thread_.joinable()) watch_thread_.join();
}

absl::StatusOr<Identity> RobotSession::Register(
    const std::string& address, std::shared_ptr<grpc::ChannelCredentials> credentials,
    const std::string& admin_token, const v1::RobotSpec& spec, const std::string& tls_server_name) {
  auto registry = v1::RobotRegistry::NewStub(MakeChannel(
      address, std::move(credentials), tls_server_name, absl::Seconds(1), absl::Seconds(1)));
  grpc::ClientContext context;
  v1::RegisterRobotRequest request;
  *request.mutable_spec() = spec;
  request.set_robot_id(NewRobotId());
  context.AddMetadata("authorization", "Bearer " + admin_token);
  context.AddMetadata(kRobotHeader, request.robot_id());
  context.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(10));
  v1::RegisterRobotResponse response;
  const grpc::Status status = registry->RegisterRobot(&context, request, &response);
  if (!status.ok()) return FromGrpc(status);
  return Identity{response.robot().robot_id(), response.token()};
}

absl::StatusOr<Identity> RobotSession::LoadOrRegister(
    const std::string& path, const std::string& address,
    std::shared_ptr<grpc::ChannelCredentials> credentials, const std::string& admin_token_file,
    const v1::RobotSpec& spec, bool* registered, const std::string& tls_server_name) {
  if (registered != nullptr) *registered = false;
  Identity id;
  if (std::ifstream in(path); in >> id.robot_id >> id.token) return id;

  std::ifstream admin_in(admin_token_file);
  std::string admin;
  if (!std::getline(admin_in, admin) || absl::StripAsciiWhitespace(admin).empty()) {
    return absl::FailedPreconditionError(absl::StrFormat(
        "cannot read the admin token from %s (start forayd first, or give the right file)",
        admin_token_file));
  }
  absl::StatusOr<Identity> fresh = Register(
      address, credentials, std::string(absl::StripAsciiWhitespace(admin)), spec, tls_server_name);
  if (!fresh.ok()) return fresh.status();
  if (absl::Status s = WriteIdentity(path, *fresh, /*exclusive=*/false); !s.ok()) {
    return absl::Status(s.code(), absl::StrFormat("registered robot %s but could not keep its identity: %s",
                                                  fresh->robot_id, s.message()));
  }
  if (registered != nullptr) *registered = true;
  return fresh;
}

absl::Status RobotSession::WaitConnected(absl::Duration timeout) {
  absl::MutexLock lock(&mu_);
  auto ready = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) { return connected_ || stopping_; };
  if (!mu_.AwaitWithTimeout(absl::Condition(&ready), timeout) || !connected_) {
    return absl::UnavailableError(absl::StrFormat(
        "no session with forayd at %s after %s%s", options_.address, absl::FormatDuration(timeout),
        last_error_.empty() ? "" : absl::StrCat(": ", last_error_)));
  }
  return absl::OkStatus();
}

absl::Status RobotSession::Record(const StepRecord& step) {
  absl::MutexLock lock(&mu_);
  const int state_dim = state_dim_ > 0 ? state_dim_ : static_cast<int>(step.state.size());
  if (absl::Status s = CheckVector("state", step.state, state_dim_); !s.ok()) return s;
  if (absl::Status s = CheckVector("action", step.action, action_dim_); !s.ok()) return s;
  if (absl::Status s = CheckVector("next_state", step.next_state, state_dim); !s.ok()) return s;
  if (!std::isfinite(step.reward)) {
    return absl::InvalidArgumentError(absl::StrFormat("reward is %g; it must be finite", step.reward));
  }
  if (unacked_.size() >= options_.max_unacknowledged) {
    return absl::ResourceExhaustedError(absl::StrFormat(
        "%d transitions wait for an acknowledgement (max_unacknowledged); is forayd at %s reachable?",
        unacked_.size(), options_.address));
  }
  if (unacked_.empty()) waiting_since_ = absl::Now();
  v1::Transition& t = unacked_.emplace_back();
  if (next_seq_ != 0) t.set_seq(next_seq_++);
  t.set_episode(step.episode);
  t.set_step(step.step);
  t.mutable_state()->Add(step.state.begin(), step.state.end());
  t.mutable_action()->Add(step.action.begin(), step.action.end());
  t.mutable_next_state()->Add(step.next_state.begin(), step.next_state.end());
  t.set_reward(step.reward);
  t.set_terminal(step.terminal);
  return absl::OkStatus();
}

absl::Status RobotSession::Flush(absl::Duration timeout) {
  absl::MutexLock lock(&mu_);
  auto drained = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) {
    return stopping_ || (next_seq_ != 0 && unacked_.empty());
  };
  if (!mu_.AwaitWithTimeout(absl::Condition(&drained), timeout) || !unacked_.empty() ||
      next_seq_ == 0) {
    return absl::DeadlineExceededError(absl::StrFormat(
        "%d transitions not acknowledged after %s (%s)%s", unacked_.size(),
        absl::FormatDuration(timeout), connected_ ? "connected" : "not connected",
        last_error_.empty() ? "" : absl::StrCat("; last error: ", last_error_)));
  }
  return absl::OkStatus();
}

absl::StatusOr<v1::Plan> RobotSession::RequestPlan(const std::vector<double>& state,
                                                   const std::vector<double>& previous_action,
                                                   absl::Duration deadline, absl::Duration wait,
                                                   const PlanChoices& choices) {
  absl::MutexLock lock(&mu_);
  if (absl::Status s = CheckVector("state", state, state_dim_); !s.ok()) return s;
  if (!previous_action.empty()) {
    if (absl::Status s = CheckVector("previous_action", previous_action, action_dim_); !s.ok()) return s;
  }
  if (!connected_) {
    return absl::UnavailableError(absl::StrFormat(
        "not connected to forayd at %s%s", options_.address,
        last_error_.empty() ? "" : absl::StrCat(" (", last_error_, ")")));
  }
  const uint64_t id = next_request_id_++;
  v1::PlanRequest& request = plan_requests_.emplace_back();
  request.set_request_id(id);
  request.mutable_state()->Add(state.begin(), state.end());
  request.mutable_previous_action()->Add(previous_action.begin(), previous_action.end());
  request.set_deadline_ms(std::max(1.0, absl::ToDoubleMilliseconds(deadline)));
  request.set_evaluate(choices.evaluate);
  request.set_episode(choices.episode);
  if (choices.objective.has_value()) *request.mutable_objective() = *choices.objective;
  if (choices.planner.has_value()) *request.mutable_planner() = *choices.planner;
  waiters_[id];
  auto done = [this, id]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) {
    return stopping_ || waiters_.at(id).done;
  };
  mu_.AwaitWithTimeout(absl::Condition(&done), wait);
  Waiter waiter = std::move(waiters_.at(id));
  waiters_.erase(id);
  if (!waiter.done) {
    return absl::DeadlineExceededError(
        absl::StrFormat("no plan within %s", absl::FormatDuration(wait)));
  }
  return std::move(waiter.result);
}

Decision RobotSession::Act(const std::vector<double>& state, const std::vector<double>& previous_action,
                           absl::Duration deadline, absl::Duration wait, const PlanChoices& choices) {
  Decision decision;
  absl::StatusOr<v1::Plan> plan = RequestPlan(state, previous_action, deadline, wait, choices);
  if (!plan.ok()) {
    decision.why = plan.status();
  } else if (plan->steps_size() == 0 ||
             static_cast<size_t>(plan->steps(0).action_size()) != previous_action.size()) {
    decision.why = absl::InternalError(absl::StrFormat(
        "the plan's first step has %d actions, expected %d",
        plan->steps_size() == 0 ? 0 : plan->steps(0).action_size(), previous_action.size()));
  } else if (plan->has_valid_until() &&
             absl::FromUnixSeconds(plan->valid_until().seconds()) +
                     absl::Nanoseconds(plan->valid_until().nanos()) < absl::Now()) {
    decision.why = absl::DeadlineExceededError("the plan arrived after its valid_until");
  } else {
    decision.planned = true;
    decision.action.assign(plan->steps(0).action().begin(), plan->steps(0).action().end());
    decision.plan = *std::move(plan);
    return decision;
  }
  decision.action = SafeActionFor(previous_action);
  absl::MutexLock lock(&mu_);
  ++safe_actions_;
  return decision;
}

std::vector<double> RobotSession::SafeActionFor(const std::vector<double>& previous_action) const {
  switch (options_.safe_action.kind) {
    case SafeAction::Kind::kZeros:
      return std::vector<double>(previous_action.size(), 0.0);
    case SafeAction::Kind::kFixed:
      return options_.safe_action.fixed;
    case SafeAction::Kind::kLastAction:
      break;
  }
  return previous_action;
}

SessionStats RobotSession::Stats() const {
  absl::MutexLock lock(&mu_);
  SessionStats s;
  s.connected = connected_;
  s.durable_seq = durable_seq_;
  s.next_seq = next_seq_;
  s.unacknowledged = unacked_.size();
  s.connects = connects_;
  s.rejected = rejected_;
  s.safe_actions = safe_actions_;
  s.ack_wait = AckWaitLocked(absl::Now());
  s.healthy = connected_ && s.ack_wait <= options_.ack_timeout;
  s.stalls = stalls_;
  s.last_error = last_error_;
  return s;
}

absl::Duration RobotSession::AckWaitLocked(absl::Time now) const {
  if (!connected_ || unacked_.empty()) return absl::ZeroDuration();
  return std::max(absl::ZeroDuration(), now - waiting_since_);
}

void RobotSession::WatchLoop() {
  const absl::Duration poll = std::min(absl::Seconds(1), options_.ack_timeout / 4);
  absl::MutexLock lock(&mu_);
  auto stop = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) { return stopping_; };
  while (!mu_.AwaitWithTimeout(absl::Condition(&stop), poll)) {
    const absl::Duration wait = AckWaitLocked(absl::Now());
    if (wait <= options_.ack_timeout || context_ == nullptr) continue;
    ++stalls_;
    last_error_ = absl::StrFormat(
        "no acknowledgement for %s with %d transitions waiting (ack_timeout %s): re-opened the "
        "session", absl::FormatDuration(absl::Trunc(wait, absl::Milliseconds(100))), unacked_.size(),
        absl::FormatDuration(options_.ack_timeout));
    std::fprintf(stderr, "foray session of robot %s: %s\n", options_.identity.robot_id.c_str(),
                 last_error_.c_str());
    connected_ = false;
    stream_broken_ = true;
    context_->TryCancel();
  }
}

void RobotSession::IoLoop() {
  absl::Duration backoff = options_.initial_backoff;
  for (;;) {
    grpc::ClientContext context;
    context.AddMetadata("authorization", "Bearer " + options_.identity.token);
    context.AddMetadata(kRobotHeader, options_.identity.robot_id);
    // The stream waits for the channel to come up instead of failing at once, so reconnecting
    // follows the channel's own backoff (set from the options above).
    context.set_wait_for_ready(true);
    v1::SessionClientMessage hello;
    uint64_t connects_before = 0;
    {
      absl::MutexLock lock(&mu_);
      if (stopping_) return;
      connects_before = connects_;
      context_ = &context;
      stream_broken_ = false;
      sent_ = 0;
      hello.mutable_hello()->set_last_acked_seq(durable_seq_);
    }
    hello.mutable_hello()->set_robot_id(options_.identity.robot_id);
    hello.mutable_hello()->set_client(options_.client_name);
    auto stream = stub_->Connect(&context);
    bool writing = stream->Write(hello);
    std::thread reader;
    if (writing) reader = std::thread([this, s = stream.get()] { ReadLoop(s); });
    while (writing) {
      std::vector<v1::SessionClientMessage> out;
      {
        absl::MutexLock lock(&mu_);
        auto ready = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) {
          return stopping_ || stream_broken_ ||
                 (connected_ && (!plan_requests_.empty() || sent_ < unacked_.size()));
        };
        mu_.Await(absl::Condition(&ready));
        if (stopping_ || stream_broken_) break;
        // Plan requests first: a waiting control loop matters more than a backlog.
        for (; !plan_requests_.empty(); plan_requests_.pop_front()) {
          *out.emplace_back().mutable_plan_request() = std::move(plan_requests_.front());
        }
        for (int n = 0; sent_ < unacked_.size() && n < options_.write_batch; ++n) {
          *out.emplace_back().mutable_transition() = unacked_[sent_++];
        }
      }
      for (const v1::SessionClientMessage& message : out) {
        if (!stream->Write(message)) {
          writing = false;
          break;
        }
      }
    }
    context.TryCancel();
    if (reader.joinable()) reader.join();
    const grpc::Status status = stream->Finish();
    absl::MutexLock lock(&mu_);
    context_ = nullptr;
    connected_ = false;
    plan_requests_.clear();
    FailWaiters(absl::UnavailableError("the session stream to forayd closed"));
    if (stopping_) return;
    if (!status.ok() && status.error_code() != grpc::StatusCode::CANCELLED) {
      last_error_ = absl::StrCat("session stream: ", status.error_message());
    }
    // A session that got as far as a welcome starts the backoff over.
    if (connects_ > connects_before) backoff = options_.initial_backoff;
    auto stop = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) { return stopping_; };
    if (mu_.AwaitWithTimeout(absl::Condition(&stop), backoff)) return;
    backoff = std::min(backoff * 2, options_.max_backoff);
  }
}

void RobotSession::ReadLoop(
    grpc::ClientReaderWriter<v1::SessionClientMessage, v1::SessionServerMessage>* stream) {
  v1::SessionServerMessage in;
  while (stream->Read(&in)) {
    absl::MutexLock lock(&mu_);
    switch (in.message_case()) {
      case v1::SessionServerMessage::kWelcome:
        OnWelcome(in.welcome());
        break;
      case v1::SessionServerMessage::kAck:
        OnAck(in.ack());
        break;
      case v1::SessionServerMessage::kPlan:
        if (auto it = waiters_.find(in.plan().request_id()); it != waiters_.end()) {
          it->second.done = true;
          it->second.result = std::move(*in.mutable_plan());
        }
        break;
      case v1::SessionServerMessage::kError:
        OnError(in.error());
        break;
      case v1::SessionServerMessage::MESSAGE_NOT_SET:
        break;
    }
  }
  absl::MutexLock lock(&mu_);
  stream_broken_ = true;
  connected_ = false;
}

void RobotSession::OnWelcome(const v1::Welcome& welcome) {
  if (welcome.spec().state_size() > 0) {
    state_dim_ = welcome.spec().state_size();
    action_dim_ = welcome.spec().action_size();
  }
  const uint64_t server_last = welcome.last_seq();
  if (next_seq_ == 0) {
    // First welcome of this process: number what was recorded while connecting.
    next_seq_ = server_last + 1;
    for (v1::Transition& t : unacked_) t.set_seq(next_seq_++);
  } else if (server_last >= next_seq_) {
    last_error_ = absl::StrFormat(
        "the server holds seq %d, beyond this client's last seq %d: does another client write as "
        "robot %s?", server_last, next_seq_ - 1, options_.identity.robot_id);
  }
  durable_seq_ = std::max(durable_seq_, server_last);
  while (!unacked_.empty() && unacked_.front().seq() <= durable_seq_) unacked_.pop_front();
  sent_ = 0;
  waiting_since_ = absl::Now();
  connected_ = true;
  ++connects_;
  last_error_.clear();
}

void RobotSession::OnAck(const v1::Ack& ack) {
  if (ack.durable_seq() > durable_seq_) waiting_since_ = absl::Now();
  durable_seq_ = std::max(durable_seq_, ack.durable_seq());
  size_t popped = 0;
  for (; !unacked_.empty() && unacked_.front().seq() <= durable_seq_; ++popped) unacked_.pop_front();
  sent_ = sent_ > popped ? sent_ - popped : 0;
}

void RobotSession::OnError(const v1::MessageError& error) {
  last_error_ = absl::StrFormat("forayd: %s (code %d)", error.message(), error.code());
  if (error.request_id() != 0) {
    if (auto it = waiters_.find(error.request_id()); it != waiters_.end()) {
      it->second.done = true;
      it->second.result = absl::Status(static_cast<absl::StatusCode>(error.code()), error.message());
    }
    return;
  }
  if (error.code() == static_cast<int>(absl::StatusCode::kInvalidArgument) && error.seq() != 0) {
    // The transition itself is wrong: resending cannot help, so it leaves the buffer.
    for (size_t i = 0; i < unacked_.size(); ++i) {
      if (unacked_[i].seq() != error.seq()) continue;
      unacked_.erase(unacked_.begin() + static_cast<std::ptrdiff_t>(i));
      if (i < sent_) --sent_;
      ++rejected_;
      break;
    }
    return;
  }
  // The server could not store a group (disk, database): reconnect and resend it.
  stream_broken_ = true;
  if (context_ != nullptr) context_->TryCancel();
}

void RobotSession::FailWaiters(const absl::Status& status) {
  for (auto& [id, waiter] : waiters_) {
    if (waiter.done) continue;
    waiter.done = true;
    waiter.result = status;
  }
}

}  // namespace foray::client
