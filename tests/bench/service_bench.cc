// Service benchmark: what a running forayd delivers to its clients. Started by
// run_service_bench.sh against a fresh forayd on loopback; prints one JSON object per figure
// (name, configuration, median, min, max, unit; lines starting with '{').
//
//   overhead  a "small" plan over gRPC on loopback (unary PlanActions) versus the same plan's
//             time inside the server (the planner call the server times as compute_ms)
//   stream    acknowledged transitions per second of a 14-dimensional robot over one session
//             stream with group commits (every ack means durable: SQLite synchronous=FULL), and
//             SQLite bytes per transition
//   load      N simulated robots (N = 1, 2, 4, 8, 16) each streaming at 20 Hz and asking for a
//             plan every 0.5 s with a 200 ms deadline, for --load_seconds: plan latency p50/p99,
//             deadline misses, training rounds, server memory per robot
//
// Benchmarks measure; nothing here asserts.

#include <sys/stat.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <fstream>
#include <mutex>
#include <random>
#include <string>
#include <thread>
#include <vector>

#include "absl/flags/flag.h"
#include "absl/flags/parse.h"
#include "absl/strings/numbers.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_format.h"
#include "absl/strings/str_join.h"
#include "absl/strings/str_split.h"
#include "absl/strings/strip.h"
#include "client/cpp/session.h"
#include "foray/v1/models.grpc.pb.h"
#include "foray/v1/monitoring.grpc.pb.h"
#include "foray/v1/registry.grpc.pb.h"
#include "foray/v1/session.grpc.pb.h"

ABSL_FLAG(std::string, address, "127.0.0.1:50151", "forayd's address.");
ABSL_FLAG(std::string, admin_token_file, "", "forayd's admin token.");
ABSL_FLAG(std::string, data_dir, "", "forayd's data directory (for SQLite bytes per transition).");
ABSL_FLAG(int, server_pid, 0, "forayd's pid (for its memory).");
ABSL_FLAG(std::string, figures, "overhead,stream,load", "Which figures to measure.");
ABSL_FLAG(int, plans, 40, "overhead: plans timed.");
ABSL_FLAG(int, stream_transitions, 100000, "stream: transitions sent.");
ABSL_FLAG(std::string, load_robots, "1,2,4,8,16", "load: robot counts.");
ABSL_FLAG(double, load_seconds, 30, "load: seconds per robot count.");

namespace {

namespace v1 = foray::v1;
using Clock = std::chrono::steady_clock;

double Ms(Clock::duration d) { return std::chrono::duration<double, std::milli>(d).count(); }

struct Summary {
  double median = 0, min = 0, max = 0, p99 = 0;
};

Summary Summarise(std::vector<double> v) {
  Summary s;
  if (v.empty()) return s;
  std::sort(v.begin(), v.end());
  s.median = v.size() % 2 ? v[v.size() / 2] : 0.5 * (v[v.size() / 2 - 1] + v[v.size() / 2]);
  s.min = v.front();
  s.max = v.back();
  s.p99 = v[std::min(v.size() - 1, static_cast<size_t>(std::ceil(0.99 * v.size())) - 1)];
  return s;
}

void Emit(const std::string& name, const std::string& config, const Summary& s, const std::string& unit,
          const std::string& extra = "") {
  absl::PrintF("{\"name\": \"%s\", \"impl\": \"foray\", \"config\": \"%s\", \"median\": %.6g, \"min\": %.6g, "
               "\"max\": %.6g, \"unit\": \"%s\"%s}\n",
               name, config, s.median, s.min, s.max, unit, extra.empty() ? "" : ", " + extra);
  std::fflush(stdout);
}

std::string ReadAdmin() {
  std::ifstream in(absl::GetFlag(FLAGS_admin_token_file));
  std::string token;
  std::getline(in, token);
  return std::string(absl::StripAsciiWhitespace(token));
}

grpc::ClientContext* Bearer(grpc::ClientContext* c, const std::string& token) {
  c->AddMetadata("authorization", "Bearer " + token);
  return c;
}

// The "small" configuration of the planner issue: state 4, action 1, B = 5 members of 3x64,
// horizon 20, population 200, 5 particles, 4 iterations.
v1::RobotSpec SmallSpec(const std::string& name, uint32_t every_n) {
  v1::RobotSpec spec;
  spec.set_name(name);
  for (const char* label : {"x", "v", "angle", "rate"}) spec.add_state()->set_label(label);
  spec.add_action()->set_label("force");
  auto* limit = spec.add_action_limits();
  limit->set_min(-1);
  limit->set_max(1);
  spec.set_control_period_s(0.05);
  spec.mutable_model()->set_ensemble_size(5);
  for (int i = 0; i < 3; ++i) spec.mutable_model()->add_hidden_widths(64);
  spec.mutable_training()->set_min_transitions(200);
  spec.mutable_training()->set_every_n_transitions(every_n);
  spec.mutable_training()->set_no_train_at_episode_end(true);
  spec.mutable_training()->set_max_epochs(10);
  spec.mutable_planner()->set_horizon(20);
  spec.mutable_planner()->set_population(200);
  spec.mutable_planner()->set_elites(20);
  spec.mutable_planner()->set_iterations(4);
  spec.mutable_planner()->set_particles(5);
  return spec;
}

// A damped cart-pendulum-like system of our own, for data the model can learn.
v1::Transition SmallTransition(uint64_t seq, std::mt19937_64& rng) {
  std::uniform_real_distribution<double> u(-1.0, 1.0);
  const double x = u(rng), v = u(rng), th = u(rng), w = u(rng), a = u(rng), dt = 0.05;
  v1::Transition t;
  t.set_seq(seq);
  t.set_episode(1 + (seq - 1) / 100);
  t.set_step(static_cast<uint32_t>((seq - 1) % 100));
  for (double s : {x, v, th, w}) t.add_state(s);
  t.add_action(a);
  for (double s : {x + dt * v, v + dt * (a - 0.1 * v), th + dt * w, w + dt * (-9.81 * std::sin(th) - a * std::cos(th))}) {
    t.add_next_state(s);
  }
  t.set_reward(-x * x);
  return t;
}

// Registers a small robot, gives it `n` transitions and a first model; returns its identity.
absl::StatusOr<foray::client::Identity> PreparedSmallRobot(const std::string& name, uint32_t every_n, int n,
                                                           uint64_t seed) {
  const std::string address = absl::GetFlag(FLAGS_address);
  absl::StatusOr<foray::client::Identity> id =
      foray::client::RobotSession::Register(address, nullptr, ReadAdmin(), SmallSpec(name, every_n));
  if (!id.ok()) return id.status();
  auto channel = grpc::CreateChannel(address, grpc::InsecureChannelCredentials());
  auto session = v1::RobotSession::NewStub(channel);
  std::mt19937_64 rng(seed);
  v1::AppendTransitionsRequest append;
  append.set_robot_id(id->robot_id);
  for (int i = 1; i <= n; ++i) *append.add_transitions() = SmallTransition(i, rng);
  grpc::ClientContext c1;
  v1::Ack ack;
  if (grpc::Status s = session->AppendTransitions(Bearer(&c1, id->token), append, &ack); !s.ok()) {
    return absl::InternalError(s.error_message());
  }
  auto models = v1::Models::NewStub(channel);
  grpc::ClientContext c2;
  v1::TrainNowRequest train;
  train.set_robot_id(id->robot_id);
  train.set_wait(true);
  v1::TrainNowResponse trained;
  if (grpc::Status s = models->TrainNow(Bearer(&c2, id->token), train, &trained); !s.ok()) {
    return absl::InternalError(s.error_message());
  }
  return id;
}

void Overhead() {
  absl::StatusOr<foray::client::Identity> id = PreparedSmallRobot("bench-overhead", 1000000, 2000, 1);
  if (!id.ok()) {
    absl::FPrintF(stderr, "overhead: %s\n", id.status().message());
    return;
  }
  auto session = v1::RobotSession::NewStub(grpc::CreateChannel(absl::GetFlag(FLAGS_address),
                                                               grpc::InsecureChannelCredentials()));
  std::vector<double> wall, inside, overhead;
  for (int i = 0; i < absl::GetFlag(FLAGS_plans) + 3; ++i) {
    v1::PlanActionsRequest request;
    request.set_robot_id(id->robot_id);
    for (double s : {0.1, -0.2, 0.05, 0.0}) request.mutable_request()->add_state(s);
    request.mutable_request()->set_deadline_ms(5000);  // every iteration runs: the whole plan
    grpc::ClientContext context;
    v1::Plan plan;
    const auto start = Clock::now();
    const grpc::Status s = session->PlanActions(Bearer(&context, id->token), request, &plan);
    const double ms = Ms(Clock::now() - start);
    if (!s.ok()) {
      absl::FPrintF(stderr, "overhead: %s\n", s.error_message());
      return;
    }
    if (i < 3) continue;  // warm-up
    wall.push_back(ms);
    inside.push_back(plan.compute_ms());
    overhead.push_back(ms - plan.compute_ms());
  }
  const std::string config = "small: state 4, action 1, B=5, 3x64, H=20, pop 200, 5 particles, 4 iterations";
  const Summary in = Summarise(inside), out = Summarise(wall), over = Summarise(overhead);
  Emit("plan_small_in_server", config, in, "ms");
  Emit("plan_small_over_grpc", config, out, "ms",
       absl::StrFormat("\"reference\": \"plan_small_in_server\", \"reference_median\": %.6g", in.median));
  Emit("grpc_overhead_small", config + "; wall time over loopback minus the server's planner time", over, "ms");
}

uint64_t FileBytes(const std::string& path) {
  struct stat st;
  return ::stat(path.c_str(), &st) == 0 ? static_cast<uint64_t>(st.st_size) : 0;
}

void Stream() {
  v1::RobotSpec spec;
  spec.set_name("bench-stream");
  for (int k = 0; k < 14; ++k) spec.add_state()->set_label(absl::StrCat("q", k));
  for (int j = 0; j < 4; ++j) {
    spec.add_action()->set_label(absl::StrCat("tau", j));
    auto* limit = spec.add_action_limits();
    limit->set_min(-1);
    limit->set_max(1);
  }
  spec.set_control_period_s(0.01);
  spec.mutable_training()->set_min_transitions(100000000);  // ingest only
  absl::StatusOr<foray::client::Identity> id =
      foray::client::RobotSession::Register(absl::GetFlag(FLAGS_address), nullptr, ReadAdmin(), spec);
  if (!id.ok()) {
    absl::FPrintF(stderr, "stream: %s\n", id.status().message());
    return;
  }
  const std::string db = absl::GetFlag(FLAGS_data_dir) + "/foray.db";
  const uint64_t bytes_before = FileBytes(db) + FileBytes(db + "-wal");
  foray::client::SessionOptions options;
  options.address = absl::GetFlag(FLAGS_address);
  options.identity = *id;
  foray::client::RobotSession session(options);
  if (!session.WaitConnected(absl::Seconds(10)).ok()) return;
  const int n = absl::GetFlag(FLAGS_stream_transitions);
  std::mt19937_64 rng(2);
  std::uniform_real_distribution<double> u(-1.0, 1.0);
  foray::client::StepRecord r;
  r.state.resize(14);
  r.action.resize(4);
  r.next_state.resize(14);
  // Acked counts sampled every 100 ms give the rate's spread.
  std::vector<double> rates;
  std::atomic<bool> done{false};
  std::thread sampler([&] {
    uint64_t last = session.Stats().durable_seq;
    auto t = Clock::now();
    while (!done) {
      std::this_thread::sleep_for(std::chrono::milliseconds(100));
      const uint64_t now_seq = session.Stats().durable_seq;
      const auto now = Clock::now();
      if (now_seq > last) rates.push_back((now_seq - last) / (Ms(now - t) / 1000.0));
      last = now_seq;
      t = now;
    }
  });
  const auto start = Clock::now();
  for (int i = 0; i < n; ++i) {
    for (double& v : r.state) v = u(rng);
    for (double& v : r.action) v = u(rng);
    for (double& v : r.next_state) v = u(rng);
    r.episode = 1 + i / 1000;
    r.step = static_cast<uint32_t>(i % 1000);
    r.reward = u(rng);
    if (!session.Record(r).ok()) break;
  }
  const absl::Status flushed = session.Flush(absl::Minutes(10));
  const double seconds = Ms(Clock::now() - start) / 1000.0;
  done = true;
  sampler.join();
  if (!flushed.ok()) {
    absl::FPrintF(stderr, "stream: %s\n", flushed.message());
    return;
  }
  Summary s = Summarise(rates);
  const double overall = n / seconds;
  Emit("stream_acked_per_s", absl::StrFormat("14-D state, 4-D action, %d transitions over one session stream", n),
       s, "transitions/s", absl::StrFormat("\"overall\": %.6g", overall));
  session.Stop();
  const uint64_t bytes_after = FileBytes(db) + FileBytes(db + "-wal");
  if (bytes_before > 0 || bytes_after > 0) {
    Summary b;
    b.median = b.min = b.max = (static_cast<double>(bytes_after) - static_cast<double>(bytes_before)) / n;
    Emit("sqlite_bytes_per_transition", "14-D state, 4-D action; growth of foray.db plus its WAL / transitions",
         b, "bytes");
  }
}

uint64_t ServerRssKb() {
  std::ifstream in(absl::StrCat("/proc/", absl::GetFlag(FLAGS_server_pid), "/status"));
  std::string line;
  while (std::getline(in, line)) {
    if (absl::StartsWith(line, "VmRSS:")) {
      uint64_t kb = 0;
      std::vector<std::string> parts = absl::StrSplit(line, ' ', absl::SkipWhitespace());
      if (parts.size() >= 2 && absl::SimpleAtoi(parts[1], &kb)) return kb;
    }
  }
  return 0;
}

// The server's resident memory before the first load round, and the robots registered since:
// the robots of earlier rounds stay registered (and keep their models), so memory per robot is
// the growth since then over all of them. A difference of one round alone is noise (the
// allocator gives memory back at times, the resident size can shrink).
uint64_t load_rss_baseline_kb = 0;
int load_robots_so_far = 0;

void Load(int robots, int round) {
  const double seconds = absl::GetFlag(FLAGS_load_seconds);
  std::vector<foray::client::Identity> ids;
  if (round == 0) load_rss_baseline_kb = ServerRssKb();
  load_robots_so_far += robots;
  for (int r = 0; r < robots; ++r) {
    // Retrain every 200 new transitions: every 10 s at 20 Hz.
    absl::StatusOr<foray::client::Identity> id =
        PreparedSmallRobot(absl::StrFormat("bench-load-%d-%d", round, r), 200, 1000, 100 + r);
    if (!id.ok()) {
      absl::FPrintF(stderr, "load: %s\n", id.status().message());
      return;
    }
    ids.push_back(*id);
  }
  std::mutex mu;
  std::vector<double> latencies;
  int misses = 0, plans = 0;
  std::vector<uint64_t> first_version(robots), last_version(robots);
  std::vector<std::thread> threads;
  const auto start = Clock::now();
  for (int r = 0; r < robots; ++r) {
    threads.emplace_back([&, r] {
      foray::client::SessionOptions options;
      options.address = absl::GetFlag(FLAGS_address);
      options.identity = ids[r];
      foray::client::RobotSession session(options);
      if (!session.WaitConnected(absl::Seconds(10)).ok()) return;
      std::mt19937_64 rng(1000 + r);
      uint64_t seq = session.Stats().next_seq;
      // Stagger the robots over one plan period, as real robots are not in lockstep.
      auto tick = Clock::now() + std::chrono::milliseconds(500 * r / robots);
      std::this_thread::sleep_until(tick);
      for (int step = 0; Ms(Clock::now() - start) < seconds * 1000; ++step) {
        v1::Transition t = SmallTransition(seq++, rng);
        foray::client::StepRecord rec{t.episode(), t.step(), {t.state().begin(), t.state().end()},
                                      {t.action().begin(), t.action().end()},
                                      {t.next_state().begin(), t.next_state().end()}, t.reward(), false};
        (void)session.Record(rec);
        if (step % 10 == 0) {  // every 0.5 s
          const auto asked = Clock::now();
          absl::StatusOr<v1::Plan> plan = session.RequestPlan(rec.next_state, {}, absl::Milliseconds(200),
                                                              absl::Seconds(5));
          const double ms = Ms(Clock::now() - asked);
          std::lock_guard<std::mutex> lock(mu);
          ++plans;
          if (!plan.ok() || ms > 200) ++misses;
          if (plan.ok()) {
            latencies.push_back(ms);
            if (first_version[r] == 0) first_version[r] = plan->model_version();
            last_version[r] = plan->model_version();
          }
        }
        tick += std::chrono::milliseconds(50);
        std::this_thread::sleep_until(tick);
      }
      (void)session.Flush(absl::Seconds(30));
    });
  }
  for (std::thread& t : threads) t.join();
  const uint64_t rss_after = ServerRssKb();
  uint64_t rounds = 0;
  for (int r = 0; r < robots; ++r) rounds += last_version[r] - std::min(first_version[r], last_version[r]);
  const Summary s = Summarise(latencies);
  const std::string config = absl::StrFormat(
      "%d small robots, 20 Hz transitions, a plan every 0.5 s with a 200 ms deadline, %g s", robots, seconds);
  Emit(absl::StrFormat("load_plan_latency_n%d", robots), config, s, "ms",
       absl::StrFormat("\"robots\": %d, \"p99\": %.6g, \"plans\": %d, \"deadline_misses\": %d, "
                       "\"training_rounds\": %d, \"seconds_per_round_per_robot\": %.4g, "
                       "\"server_rss_kb\": %d, \"server_rss_kb_per_robot\": %.6g, "
                       "\"robots_registered\": %d",
                       robots, s.p99, plans, misses, rounds,
                       rounds > 0 ? seconds * robots / rounds : -1.0,
                       static_cast<int>(rss_after),
                       load_rss_baseline_kb > 0
                           ? (static_cast<double>(rss_after) - static_cast<double>(load_rss_baseline_kb)) /
                                 load_robots_so_far
                           : -1.0,
                       load_robots_so_far));
}

}  // namespace

int main(int argc, char** argv) {
  absl::ParseCommandLine(argc, argv);
  const std::vector<std::string> figures = absl::StrSplit(absl::GetFlag(FLAGS_figures), ',');
  auto wants = [&](const char* f) { return std::find(figures.begin(), figures.end(), f) != figures.end(); };
  if (wants("overhead")) Overhead();
  if (wants("stream")) Stream();
  if (wants("load")) {
    int round = 0;
    for (absl::string_view n : absl::StrSplit(absl::GetFlag(FLAGS_load_robots), ',')) {
      int robots = 0;
      if (absl::SimpleAtoi(n, &robots) && robots > 0) Load(robots, round++);
    }
  }
  return 0;
}
