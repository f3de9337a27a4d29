// A control loop on the C++ client library, for tests/client/test_cpp_session.py: a
// one-dimensional cart (x' = x + v dt, v' = v + a dt) that asks for a plan every period through
// RobotSession::Act and records every transition. One JSON line per step on stdout (flushed),
// then one line with the session's figures after a final Flush. The test stops and restarts
// forayd while this runs.
//
//   watchdog_drill --address=127.0.0.1:PORT --admin_token_file=F --identity_file=G --steps=120

#include <chrono>
#include <cstdio>
#include <string>
#include <thread>
#include <vector>

#include "absl/flags/flag.h"
#include "absl/flags/parse.h"
#include "absl/strings/str_format.h"
#include "absl/strings/escaping.h"
#include "client/cpp/session.h"

ABSL_FLAG(std::string, address, "127.0.0.1:50151", "forayd's address.");
ABSL_FLAG(std::string, admin_token_file, "", "Admin token, to register the cart once.");
ABSL_FLAG(std::string, identity_file, "", "Where the cart's id and token are kept.");
ABSL_FLAG(int, steps, 120, "Control steps.");
ABSL_FLAG(double, period_ms, 100, "Control period, milliseconds.");
ABSL_FLAG(double, wait_ms, 60, "Longest wait for a plan per step, milliseconds.");
ABSL_FLAG(double, compute_ms, 20, "Planning time asked of the server, milliseconds.");
ABSL_FLAG(double, safe_action, 0.25, "The fixed safe action (m/s^2).");

int main(int argc, char** argv) {
  absl::ParseCommandLine(argc, argv);
  const double dt = absl::GetFlag(FLAGS_period_ms) / 1000.0;
  foray::v1::RobotSpec spec;
  spec.set_name("drill-cart");
  spec.add_state()->set_label("x");
  spec.add_state()->set_label("v");
  spec.add_action()->set_label("a");
  auto* limit = spec.add_action_limits();
  limit->set_min(-1.0);
  limit->set_max(1.0);
  spec.set_control_period_s(dt);
  spec.mutable_planner()->set_horizon(5);
  spec.mutable_planner()->set_population(32);
  spec.mutable_planner()->set_elites(4);
  spec.mutable_planner()->set_iterations(2);
  spec.mutable_training()->set_min_transitions(1000000);  // prior plans only: fast and steady

  absl::StatusOr<foray::client::Identity> id = foray::client::RobotSession::LoadOrRegister(
      absl::GetFlag(FLAGS_identity_file), absl::GetFlag(FLAGS_address), nullptr,
      absl::GetFlag(FLAGS_admin_token_file), spec);
  if (!id.ok()) {
    std::fprintf(stderr, "watchdog_drill: %s\n", std::string(id.status().message()).c_str());
    return 1;
  }
  foray::client::SessionOptions options;
  options.address = absl::GetFlag(FLAGS_address);
  options.identity = *id;
  options.safe_action.kind = foray::client::SafeAction::Kind::kFixed;
  options.safe_action.fixed = {absl::GetFlag(FLAGS_safe_action)};
  options.initial_backoff = absl::Milliseconds(50);
  options.max_backoff = absl::Milliseconds(400);
  foray::client::RobotSession session(options);
  if (absl::Status s = session.WaitConnected(absl::Seconds(20)); !s.ok()) {
    std::fprintf(stderr, "watchdog_drill: %s\n", std::string(s.message()).c_str());
    return 1;
  }
  std::vector<double> state = {0.0, 0.0}, previous = {0.0};
  const auto period = std::chrono::duration<double, std::milli>(absl::GetFlag(FLAGS_period_ms));
  const auto begin = std::chrono::steady_clock::now();
  auto tick = begin;
  for (int t = 0; t < absl::GetFlag(FLAGS_steps); ++t) {
    const auto start = std::chrono::steady_clock::now();
    foray::client::Decision d = session.Act(state, previous, absl::Milliseconds(absl::GetFlag(FLAGS_compute_ms)),
                                            absl::Milliseconds(absl::GetFlag(FLAGS_wait_ms)));
    const double act_ms = std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - start).count();
    const double a = d.action.at(0);
    std::vector<double> next = {state[0] + dt * state[1], state[1] + dt * a};
    foray::client::StepRecord record{1, static_cast<uint32_t>(t), state, d.action, next, -next[0] * next[0],
                                     t + 1 == absl::GetFlag(FLAGS_steps)};
    const absl::Status recorded = session.Record(record);
    const foray::client::SessionStats stats = session.Stats();
    absl::PrintF("{\"step\": %d, \"planned\": %s, \"act_ms\": %.3f, \"action\": %.17g, \"connected\": %s, "
                "\"durable_seq\": %d, \"recorded\": %s, \"t_ms\": %.1f, \"why\": \"%s\"}\n",
                t, d.planned ? "true" : "false", act_ms, a, stats.connected ? "true" : "false",
                stats.durable_seq, recorded.ok() ? "true" : "false",
                std::chrono::duration<double, std::milli>(start - begin).count(),
                absl::CEscape(d.why.message()));
    std::fflush(stdout);
    state = next;
    previous = d.action;
    tick += std::chrono::duration_cast<std::chrono::steady_clock::duration>(period);
    std::this_thread::sleep_until(tick);
  }
  const absl::Status flushed = session.Flush(absl::Seconds(30));
  const foray::client::SessionStats stats = session.Stats();
  absl::PrintF("{\"final\": true, \"flushed\": %s, \"durable_seq\": %d, \"next_seq\": %d, \"unacknowledged\": %d, "
              "\"connects\": %d, \"rejected\": %d, \"safe_actions\": %d}\n",
              flushed.ok() ? "true" : "false", stats.durable_seq, stats.next_seq, stats.unacknowledged,
              stats.connects, stats.rejected, stats.safe_actions);
  if (!flushed.ok()) std::fprintf(stderr, "watchdog_drill: %s\n", std::string(flushed.message()).c_str());
  return flushed.ok() ? 0 : 1;
}
