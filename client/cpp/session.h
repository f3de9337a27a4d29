// RobotSession: the C++ client of a robot PC. It keeps one session stream to forayd open,
// buffers every recorded transition until the server acknowledges it as durable, resends what
// was not acknowledged after a reconnect (with exponential backoff), and asks for plans with
// deadlines. When no valid plan arrives in time, Act() returns the robot's safe action instead
// (the watchdog). Thread-safe: one control thread (or several) plus the library's own I/O threads.
// Liveness: while transitions wait, the server must acknowledge progress within ack_timeout of
// the stream's welcome or of its previous acknowledgement; otherwise the session logs a line on
// stderr, counts a stall and re-opens the stream, which resends what waits. Stats().healthy is
// the figure a robot's code can check.
//
//   foray::client::SessionOptions options;
//   options.identity = {robot_id, token};
//   foray::client::RobotSession session(options);
//   for (;;) {
//     Decision d = session.Act(state, last_action, absl::Milliseconds(30), absl::Milliseconds(45));
//     ... apply d.action, measure next_state ...
//     session.Record({episode, step, state, d.action, next_state, reward, terminal});
//   }
//
// Foray is not a safety system: the safe action is a convenience for the control loop, not a
// substitute for emergency stops and safety-rated limits on the robot.

#ifndef FORAY_CLIENT_CPP_SESSION_H_
#define FORAY_CLIENT_CPP_SESSION_H_

#include <cstdint>
#include <deque>
#include <map>
#include <memory>
#include <optional>
#include <string>
#include <thread>
#include <vector>

#include "absl/base/thread_annotations.h"
#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "absl/synchronization/mutex.h"
#include "absl/time/time.h"
#include "foray/v1/registry.pb.h"
#include "foray/v1/session.grpc.pb.h"
#include "grpcpp/grpcpp.h"

namespace foray::client {

// Metadata key carrying the robot's id on every call of a robot, so that a router in front of
// several servers (deploy/router) sends all of a robot's calls to the server holding its data.
inline constexpr char kRobotHeader[] = "foray-robot";

// A robot's credentials: its id and its own bearer token (from registration).
struct Identity {
  std::string robot_id;
  std::string token;
};

// A robot id of the client's choosing ("r-" and 16 random hex digits), sent at registration so
// that a router can place the robot by its foray-robot header before the robot exists.
std::string NewRobotId();

// Writes "ROBOT_ID TOKEN\n" to `path`, created with mode 0600 before anything is written (the
// token is a credential). With `exclusive`, an existing file is an error and is left alone.
absl::Status WriteIdentity(const std::string& path, const Identity& identity, bool exclusive);

// What Act() returns when no valid plan is there in time.
struct SafeAction {
  enum class Kind {
    kZeros,       // every action dimension 0 (make sure 0 lies within the robot's limits)
    kLastAction,  // the previous action passed to Act()
    kFixed,       // `fixed`, action_dim values in the action's units
  };
  Kind kind = Kind::kLastAction;
  std::vector<double> fixed;
};

struct SessionOptions {
  // forayd's gRPC address, host:port.
  std::string address = "127.0.0.1:50151";
  // Null means an insecure channel (loopback or a closed lab network); pass
  // grpc::SslCredentials(...) for TLS.
  std::shared_ptr<grpc::ChannelCredentials> credentials;
  // With TLS: the name forayd's certificate is checked against instead of the address's host
  // (a certificate made for the planner machine's DNS name, reached by its IP address). Empty:
  // the address's host.
  std::string tls_server_name;
  Identity identity;
  SafeAction safe_action;
  // Reconnect delays: the first retry after initial_backoff, doubling up to max_backoff.
  absl::Duration initial_backoff = absl::Milliseconds(100);
  absl::Duration max_backoff = absl::Seconds(5);
  // Record() refuses (ResourceExhausted) once this many transitions wait for an acknowledgement.
  size_t max_unacknowledged = 1'000'000;
  // Transitions written per wake-up of the I/O thread (the server commits what arrives
  // together as one group).
  int write_batch = 512;
  // How long the server may leave waiting transitions unacknowledged on an open stream (since
  // its welcome or its last acknowledgement) before the session re-opens the stream. Above 0;
  // a group commit takes milliseconds, so 15 s means the session is stuck, not slow.
  absl::Duration ack_timeout = absl::Seconds(15);
  std::string client_name = "foray-cpp/0.1";

  absl::Status Validate() const;
};

// One observed step, in the robot's units (sizes as in its spec). Set `terminal` only when the
// step ended the episode in an irrecoverable state (the object was lost, the robot left its
// workspace or fell): the model learns to predict it. An episode cut by a time limit is not
// terminal: leave it false and record the next episode under a new episode id.
struct StepRecord {
  uint64_t episode = 0;
  uint32_t step = 0;
  std::vector<double> state;       // state_dim values before the action
  std::vector<double> action;      // action_dim values applied
  std::vector<double> next_state;  // state_dim values one control period later
  double reward = 0.0;
  bool terminal = false;
};

// Per-request choices of a plan.
struct PlanChoices {
  // Reward only (no information term) on the current model; the episode (`episode`, or else
  // the episode of the next recorded transition) is recorded as an evaluation episode. The
  // server refuses it (FailedPrecondition) before the robot's first model.
  bool evaluate = false;
  uint64_t episode = 0;
  // Overrides of the robot's objective for this plan only (weights, discount, terminal_value,
  // known reward or termination); absent: the robot's settings.
  std::optional<foray::v1::ObjectiveSettings> objective;
  // Overrides of the robot's planner settings for this plan only (fields left at 0 keep the
  // robot's); absent: the robot's settings.
  std::optional<foray::v1::PlannerSettings> planner;
};

// What the control loop applies this period.
struct Decision {
  std::vector<double> action;  // action_dim values
  bool planned = false;        // false: the safe action
  absl::Status why;            // when !planned: why no plan was used
  foray::v1::Plan plan;        // the plan the action came from, when planned
};

struct SessionStats {
  bool connected = false;
  uint64_t durable_seq = 0;      // highest seq the server has acknowledged as durable
  uint64_t next_seq = 0;         // seq the next Record() gets; 0 until the first welcome
  size_t unacknowledged = 0;     // recorded, not yet durable
  uint64_t connects = 0;         // successful welcomes, the first one included
  uint64_t rejected = 0;         // transitions the server refused (see last_error)
  uint64_t safe_actions = 0;     // Act() calls that returned the safe action
  // How long the server has owed this client progress: zero when nothing waits or while
  // disconnected. healthy: connected and ack_wait within options.ack_timeout.
  absl::Duration ack_wait;
  bool healthy = false;
  uint64_t stalls = 0;           // streams re-opened for lack of acknowledgements
  std::string last_error;
};

class RobotSession {
 public:
  // Starts the I/O thread, which connects in the background and keeps reconnecting until
  // Stop() or destruction. Check options with Validate() first; invalid options abort.
  explicit RobotSession(SessionOptions options);
  RobotSession(const RobotSession&) = delete;
  RobotSession& operator=(const RobotSession&) = delete;
  ~RobotSession();

  // Registers a robot with the admin token; returns its id and token. The id is chosen here
  // (random) and sent in the foray-robot header too, so a router places the robot by it.
  // tls_server_name: as SessionOptions::tls_server_name.
  static absl::StatusOr<Identity> Register(const std::string& address,
                                           std::shared_ptr<grpc::ChannelCredentials> credentials,
                                           const std::string& admin_token,
                                           const foray::v1::RobotSpec& spec,
                                           const std::string& tls_server_name = {});
  // The identity stored in `path` ("ROBOT_ID TOKEN"), or a new registration saved there
  // (mode 0600) when the file does not exist. `registered` tells which happened.
  static absl::StatusOr<Identity> LoadOrRegister(
      const std::string& path, const std::string& address,
      std::shared_ptr<grpc::ChannelCredentials> credentials, const std::string& admin_token_file,
      const foray::v1::RobotSpec& spec, bool* registered = nullptr,
      const std::string& tls_server_name = {});

  // Waits until the stream is open and the server has said welcome.
  absl::Status WaitConnected(absl::Duration timeout);

  // Buffers one transition and returns at once; the I/O thread sends it. Its seq is the next
  // one after everything the server holds. InvalidArgument names a wrong-sized or non-finite
  // field; ResourceExhausted when max_unacknowledged transitions wait already.
  absl::Status Record(const StepRecord& step);

  // Waits until every recorded transition is durable on the server.
  absl::Status Flush(absl::Duration timeout);

  // Asks for a plan from `state` (state_dim values); `previous_action` (action_dim values, may be
  // empty) feeds the rate limit of the first step. The server plans for at most `deadline` (counted from the request's arrival);
  // this call waits at most `wait` for the reply. Unavailable while disconnected.
  absl::StatusOr<foray::v1::Plan> RequestPlan(const std::vector<double>& state,
                                              const std::vector<double>& previous_action,
                                              absl::Duration deadline, absl::Duration wait,
                                              const PlanChoices& choices = {});

  // The watchdog: the first action of a plan that arrives within `wait` and is still valid,
  // else the safe action (returned within `wait` plus scheduling noise, also when the server
  // is down). `previous_action` has action_dim values.
  Decision Act(const std::vector<double>& state, const std::vector<double>& previous_action,
               absl::Duration deadline, absl::Duration wait, const PlanChoices& choices = {});

  SessionStats Stats() const;

  // Closes the stream and joins the I/O threads. Unacknowledged transitions are dropped (call
  // Flush() first to keep them). Idempotent.
  void Stop();

 private:
  struct Waiter {
    bool done = false;
    absl::StatusOr<foray::v1::Plan> result = absl::UnavailableError("no reply");
  };

  void IoLoop();
  // Re-opens a connected stream that acknowledges nothing for ack_timeout.
  void WatchLoop();
  absl::Duration AckWaitLocked(absl::Time now) const ABSL_SHARED_LOCKS_REQUIRED(mu_);
  // Reads the stream until it ends; runs on its own thread per connection.
  void ReadLoop(grpc::ClientReaderWriter<foray::v1::SessionClientMessage,
                                         foray::v1::SessionServerMessage>* stream);
  void OnWelcome(const foray::v1::Welcome& welcome) ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_);
  void OnAck(const foray::v1::Ack& ack) ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_);
  void OnError(const foray::v1::MessageError& error) ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_);
  void FailWaiters(const absl::Status& status) ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_);
  std::vector<double> SafeActionFor(const std::vector<double>& previous_action) const;

  const SessionOptions options_;
  const std::shared_ptr<grpc::Channel> channel_;
  const std::unique_ptr<foray::v1::RobotSession::Stub> stub_;

  mutable absl::Mutex mu_;
  bool stopping_ ABSL_GUARDED_BY(mu_) = false;
  bool connected_ ABSL_GUARDED_BY(mu_) = false;
  bool stream_broken_ ABSL_GUARDED_BY(mu_) = false;
  grpc::ClientContext* context_ ABSL_GUARDED_BY(mu_) = nullptr;  // the open stream's, for Stop()
  // Recorded transitions not yet durable, in seq order; the first `sent_` of them went out on
  // the current stream. Before the first welcome their seq is 0 (assigned at the welcome).
  std::deque<foray::v1::Transition> unacked_ ABSL_GUARDED_BY(mu_);
  size_t sent_ ABSL_GUARDED_BY(mu_) = 0;
  std::deque<foray::v1::PlanRequest> plan_requests_ ABSL_GUARDED_BY(mu_);
  std::map<uint64_t, Waiter> waiters_ ABSL_GUARDED_BY(mu_);
  uint64_t next_request_id_ ABSL_GUARDED_BY(mu_) = 1;
  uint64_t next_seq_ ABSL_GUARDED_BY(mu_) = 0;
  uint64_t durable_seq_ ABSL_GUARDED_BY(mu_) = 0;
  int state_dim_ ABSL_GUARDED_BY(mu_) = 0;   // from the welcome's spec; 0 until then
  int action_dim_ ABSL_GUARDED_BY(mu_) = 0;
  uint64_t connects_ ABSL_GUARDED_BY(mu_) = 0;
  uint64_t rejected_ ABSL_GUARDED_BY(mu_) = 0;
  uint64_t safe_actions_ ABSL_GUARDED_BY(mu_) = 0;
  std::string last_error_ ABSL_GUARDED_BY(mu_);
  // Since when the server owes progress: the welcome, the last ack that advanced durable_seq_,
  // or the Record() that found nothing waiting, whichever is latest.
  absl::Time waiting_since_ ABSL_GUARDED_BY(mu_) = absl::Now();
  uint64_t stalls_ ABSL_GUARDED_BY(mu_) = 0;

  std::thread io_thread_;
  std::thread watch_thread_;
};

}  // namespace foray::client

#endif  // FORAY_CLIENT_CPP_SESSION_H_
