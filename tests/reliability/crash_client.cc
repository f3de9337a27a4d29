// Robots that stream transitions at full speed through the C++ client library while the test
// kills forayd again and again (tests/reliability/test_crash.py). Each robot records as fast as
// the library takes it (at most --max_unacked waiting, so memory stays bounded) until stdin
// closes; then every robot flushes and one JSON line per robot reports what was recorded and
// acknowledged. While running, a JSON line every 100 ms gives each robot's acknowledged seq.
//
//   crash_client --address=127.0.0.1:PORT --admin_token_file=F --robots=2 < control-pipe

#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cmath>
#include <fstream>
#include <memory>
#include <random>
#include <string>
#include <thread>
#include <vector>

#include "absl/flags/flag.h"
#include "absl/flags/parse.h"
#include "absl/strings/str_format.h"
#include "client/cpp/session.h"

ABSL_FLAG(std::string, address, "127.0.0.1:50151", "forayd's address.");
ABSL_FLAG(std::string, admin_token_file, "", "Admin token, to register the robots.");
ABSL_FLAG(int, robots, 2, "Robots streaming at once.");
ABSL_FLAG(int, max_unacked, 20000, "A robot pauses while this many transitions wait for an ack.");
ABSL_FLAG(int, min_transitions, 500, "Training starts after this many transitions.");
ABSL_FLAG(int, train_every, 3000, "Retrain after this many new transitions.");
ABSL_FLAG(double, ack_timeout_s, 15.0, "The sessions' ack_timeout, seconds.");
ABSL_FLAG(double, flush_timeout_s, 120.0, "How long the final flush may take, seconds.");

int main(int argc, char** argv) {
  absl::ParseCommandLine(argc, argv);
  const int robots = absl::GetFlag(FLAGS_robots);
  std::vector<std::unique_ptr<foray::client::RobotSession>> sessions;
  std::vector<foray::client::Identity> ids;
  for (int r = 0; r < robots; ++r) {
    foray::v1::RobotSpec spec;
    spec.set_name(absl::StrFormat("crash-%d", r));
    spec.add_state()->set_label("x");
    spec.add_state()->set_label("v");
    spec.add_action()->set_label("force");
    auto* limit = spec.add_action_limits();
    limit->set_min(-1);
    limit->set_max(1);
    spec.set_control_period_s(0.01);
    spec.mutable_model()->set_ensemble_size(2);
    spec.mutable_model()->add_hidden_widths(16);
    spec.mutable_training()->set_min_transitions(absl::GetFlag(FLAGS_min_transitions));
    spec.mutable_training()->set_every_n_transitions(absl::GetFlag(FLAGS_train_every));
    spec.mutable_training()->set_no_train_at_episode_end(true);
    spec.mutable_training()->set_max_epochs(3);
    absl::StatusOr<foray::client::Identity> id = absl::UnavailableError("not tried");
    for (int attempt = 0; attempt < 100 && !id.ok(); ++attempt) {
      std::ifstream admin_in(absl::GetFlag(FLAGS_admin_token_file));
      std::string admin;
      std::getline(admin_in, admin);
      id = foray::client::RobotSession::Register(absl::GetFlag(FLAGS_address), nullptr, admin, spec);
      if (!id.ok()) std::this_thread::sleep_for(std::chrono::milliseconds(100));
    }
    if (!id.ok()) {
      absl::FPrintF(stderr, "crash_client: registering: %s\n", id.status().message());
      return 1;
    }
    ids.push_back(*id);
    foray::client::SessionOptions options;
    options.address = absl::GetFlag(FLAGS_address);
    options.identity = *id;
    options.initial_backoff = absl::Milliseconds(20);
    options.max_backoff = absl::Milliseconds(200);
    options.ack_timeout = absl::Seconds(absl::GetFlag(FLAGS_ack_timeout_s));
    sessions.push_back(std::make_unique<foray::client::RobotSession>(options));
  }
  std::atomic<bool> stop{false};
  std::vector<uint64_t> recorded(robots, 0);
  std::vector<std::thread> writers;
  for (int r = 0; r < robots; ++r) {
    writers.emplace_back([&, r] {
      foray::client::RobotSession& s = *sessions[r];
      std::mt19937_64 rng(r + 1);
      std::uniform_real_distribution<double> u(-1.0, 1.0);
      foray::client::StepRecord step;
      uint64_t n = 0;
      while (!stop) {
        if (s.Stats().unacknowledged >= static_cast<size_t>(absl::GetFlag(FLAGS_max_unacked))) {
          std::this_thread::sleep_for(std::chrono::milliseconds(2));
          continue;
        }
        const double x = u(rng), v = u(rng), a = u(rng);
        step.episode = 1 + n / 1000;
        step.step = static_cast<uint32_t>(n % 1000);
        step.state = {x, v};
        step.action = {a};
        step.next_state = {x + 0.01 * v, v + 0.01 * (a - 0.2 * v)};
        step.reward = -x * x;
        if (!s.Record(step).ok()) break;
        recorded[r] = ++n;
      }
    });
  }
  std::thread reporter([&] {
    while (!stop) {
      std::this_thread::sleep_for(std::chrono::milliseconds(100));
      for (int r = 0; r < robots; ++r) {
        const foray::client::SessionStats st = sessions[r]->Stats();
        absl::PrintF("{\"robot_id\": \"%s\", \"durable_seq\": %d, \"connected\": %s, "
                     "\"unacknowledged\": %d, \"stalls\": %d, \"healthy\": %s}\n",
                     ids[r].robot_id, st.durable_seq, st.connected ? "true" : "false",
                     st.unacknowledged, st.stalls, st.healthy ? "true" : "false");
      }
      std::fflush(stdout);
    }
  });
  char byte;
  while (::read(0, &byte, 1) > 0) {
  }  // until the test closes our stdin
  stop = true;
  for (std::thread& t : writers) t.join();
  reporter.join();
  int failed = 0;
  for (int r = 0; r < robots; ++r) {
    const absl::Status flushed = sessions[r]->Flush(absl::Seconds(absl::GetFlag(FLAGS_flush_timeout_s)));
    const foray::client::SessionStats st = sessions[r]->Stats();
    absl::PrintF("{\"final\": true, \"robot_id\": \"%s\", \"recorded\": %d, \"durable_seq\": %d, "
                 "\"unacknowledged\": %d, \"rejected\": %d, \"connects\": %d, \"stalls\": %d, "
                 "\"flushed\": %s}\n",
                 ids[r].robot_id, recorded[r], st.durable_seq, st.unacknowledged, st.rejected, st.connects,
                 st.stalls, flushed.ok() ? "true" : "false");
    if (!flushed.ok()) {
      absl::FPrintF(stderr, "crash_client: %s\n", flushed.message());
      ++failed;
    }
    sessions[r]->Stop();
  }
  std::fflush(stdout);
  return failed > 0 ? 1 : 0;
}
