// foray: the command-line tool. This first part reads: the robots, one robot's status, and a
// live view of learning progress from the server's progress stream.
//
//   foray robots                 # every robot (admin token)
//   foray status ROBOT_ID        # one robot's progress
//   foray watch [ROBOT_ID]       # live table until Ctrl-C (or --seconds N)
//
// Credentials: --token, or the first line of --token_file (default ./foray-data/admin-token).
// Exit codes: 0 done, 1 the server refused or failed, 2 bad usage.

#include <csignal>
#include <cstdio>
#include <fstream>
#include <map>
#include <string>
#include <vector>

#include "absl/flags/flag.h"
#include "absl/flags/parse.h"
#include "absl/flags/usage.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_format.h"
#include "absl/strings/strip.h"
#include "absl/time/clock.h"
#include "absl/time/time.h"
#include "foray/v1/monitoring.grpc.pb.h"
#include "foray/v1/registry.grpc.pb.h"
#include "grpcpp/grpcpp.h"

ABSL_FLAG(std::string, address, "127.0.0.1:50151", "forayd's gRPC address, host:port.");
ABSL_FLAG(std::string, token, "", "Bearer token (admin or a robot's own); overrides --token_file.");
ABSL_FLAG(std::string, token_file, "./foray-data/admin-token", "File whose first line is the token.");
ABSL_FLAG(double, seconds, 0, "watch: stop after this many seconds (0: until Ctrl-C).");
ABSL_FLAG(bool, plain, false, "watch: print one line per event instead of redrawing a table.");

namespace {

namespace v1 = foray::v1;

constexpr char kUsage[] =
    "foray: read what the Foray planning server knows.\n\n"
    "  foray robots                 list every robot (admin token)\n"
    "  foray status ROBOT_ID        one robot's progress\n"
    "  foray watch [ROBOT_ID]       live learning progress (all robots with the admin token)\n\n"
    "Foray is not a safety system: keep emergency stops and safety-rated limits in place and\n"
    "follow your lab's risk assessment and local rules before any plan reaches a robot.";

grpc::ClientContext* WithToken(grpc::ClientContext* context, const std::string& token) {
  context->AddMetadata("authorization", "Bearer " + token);
  return context;
}

int Fail(const std::string& what, const grpc::Status& status) {
  std::fprintf(stderr, "foray: %s: %s\n", what.c_str(), status.error_message().c_str());
  if (status.error_code() == grpc::StatusCode::UNAVAILABLE) {
    std::fprintf(stderr, "foray: is forayd running at %s? (--address)\n",
                 absl::GetFlag(FLAGS_address).c_str());
  } else if (status.error_code() == grpc::StatusCode::UNAUTHENTICATED ||
             status.error_code() == grpc::StatusCode::PERMISSION_DENIED) {
    std::fprintf(stderr, "foray: check --token or --token_file\n");
  }
  return 1;
}

double Coverage(const v1::Coverage& c) {
  if (c.counts_size() == 0) return 0.0;
  int occupied = 0;
  for (uint32_t n : c.counts()) occupied += n > 0 ? 1 : 0;
  return static_cast<double>(occupied) / c.counts_size();
}

std::string Row(const v1::RobotProgress& p) {
  return absl::StrFormat("%-22s %-12s %9d %8d %5s %10s %8s %7.1f%% %8.1f",
                         p.name(), p.robot_id(), p.transitions(), p.episodes(),
                         absl::StrCat("v", p.model_version()),
                         p.has_last_training() ? absl::StrFormat("%.4f", p.last_training().holdout_mse()) : "-",
                         p.has_last_episode() ? absl::StrFormat("%g", p.last_episode().return_()) : "-",
                         100.0 * Coverage(p.coverage()), p.plan_latency().p50_ms());
}

std::string Header() {
  return absl::StrFormat("%-22s %-12s %9s %8s %5s %10s %8s %8s %8s", "robot", "id", "transit.",
                         "episodes", "model", "hold. MSE", "return", "coverage", "plan ms");
}

int Robots(v1::Monitoring::Stub& monitoring, const std::string& token) {
  grpc::ClientContext context;
  v1::ProgressSnapshot snapshot;
  const grpc::Status s = monitoring.GetProgress(WithToken(&context, token), v1::GetProgressRequest(), &snapshot);
  if (!s.ok()) return Fail("listing robots", s);
  absl::PrintF("%s\n", Header().c_str());
  for (const auto& p : snapshot.robots()) absl::PrintF("%s\n", Row(p).c_str());
  if (snapshot.robots_size() == 0) absl::PrintF("(no robots registered)\n");
  return 0;
}

int Status(v1::Monitoring::Stub& monitoring, const std::string& token, const std::string& robot_id) {
  grpc::ClientContext context;
  v1::GetProgressRequest request;
  request.set_robot_id(robot_id);
  v1::ProgressSnapshot snapshot;
  const grpc::Status s = monitoring.GetProgress(WithToken(&context, token), request, &snapshot);
  if (!s.ok()) return Fail("reading robot " + robot_id, s);
  const v1::RobotProgress& p = snapshot.robots(0);
  absl::PrintF("%s (%s)%s\n", p.name().c_str(), p.robot_id().c_str(), p.archived() ? " archived" : "");
  absl::PrintF("  transitions %d, episodes %d, model v%d%s\n", p.transitions(), p.episodes(),
              p.model_version(), p.queued_training() > 0 ? " (training)" : "");
  if (p.has_last_training()) {
    absl::PrintF("  last training: %d epochs on %d transitions, holdout NLL %.4f, MSE %.4f\n",
                p.last_training().epochs(), p.last_training().transitions(),
                p.last_training().holdout_nll(), p.last_training().holdout_mse());
  }
  if (p.has_last_episode()) {
    absl::PrintF("  last episode %d: %d steps, return %g, information gain %.3f nats/step\n",
                p.last_episode().episode(), p.last_episode().steps(), p.last_episode().return_(),
                p.last_episode().information_gain());
  }
  absl::PrintF("  coverage %.1f%% of a %dx%d grid; plans %d, p50 %.1f ms, p99 %.1f ms, deadline misses %d\n",
              100.0 * Coverage(p.coverage()), p.coverage().cells(), p.coverage().cells(),
              p.plan_latency().plans(), p.plan_latency().p50_ms(), p.plan_latency().p99_ms(),
              p.plan_latency().deadline_misses());
  return 0;
}

int Watch(v1::Monitoring::Stub& monitoring, const std::string& token, const std::string& robot_id) {
  grpc::ClientContext context;
  WithToken(&context, token);
  const double seconds = absl::GetFlag(FLAGS_seconds);
  if (seconds > 0) {
    context.set_deadline(std::chrono::system_clock::now() +
                         std::chrono::milliseconds(static_cast<int64_t>(seconds * 1000)));
  }
  v1::WatchProgressRequest request;
  request.set_robot_id(robot_id);
  auto reader = monitoring.WatchProgress(&context, request);
  const bool plain = absl::GetFlag(FLAGS_plain);
  std::map<std::string, v1::RobotProgress> latest;
  v1::ProgressEvent event;
  while (reader->Read(&event)) {
    if (event.has_snapshot()) {
      latest[event.robot_id()] = event.snapshot();
      if (plain) absl::PrintF("%s snapshot: %s\n", event.robot_id().c_str(), Row(event.snapshot()).c_str());
    } else if (event.has_episode()) {
      auto& p = latest[event.robot_id()];
      *p.mutable_last_episode() = event.episode();
      p.set_episodes(std::max<uint64_t>(p.episodes(), event.episode().episode()));
      if (plain) {
        absl::PrintF("%s episode %d: return %g, information gain %.3f nats/step\n",
                    event.robot_id().c_str(), event.episode().episode(), event.episode().return_(),
                    event.episode().information_gain());
      }
    } else if (event.has_training()) {
      auto& p = latest[event.robot_id()];
      *p.mutable_last_training() = event.training();
      p.set_model_version(event.training().model_version());
      if (plain) {
        absl::PrintF("%s model v%d: holdout NLL %.4f, MSE %.4f\n", event.robot_id().c_str(),
                    event.training().model_version(), event.training().holdout_nll(),
                    event.training().holdout_mse());
      }
    }
    if (!plain) {
      absl::PrintF("\033[H\033[2J%s   %s\n%s\n", "Foray learning progress",
                  absl::FormatTime("%H:%M:%S", absl::Now(), absl::LocalTimeZone()).c_str(),
                  Header().c_str());
      for (const auto& [id, p] : latest) absl::PrintF("%s\n", Row(p).c_str());
    }
    std::fflush(stdout);
  }
  const grpc::Status s = reader->Finish();
  if (!s.ok() && s.error_code() != grpc::StatusCode::DEADLINE_EXCEEDED &&
      s.error_code() != grpc::StatusCode::CANCELLED) {
    return Fail("watching", s);
  }
  return 0;
}

}  // namespace

int main(int argc, char** argv) {
  absl::SetProgramUsageMessage(kUsage);
  std::vector<char*> args = absl::ParseCommandLine(argc, argv);
  if (args.size() < 2) {
    std::fprintf(stderr, "%s\n", kUsage);
    return 2;
  }
  const std::string command = args[1];
  std::string token = absl::GetFlag(FLAGS_token);
  if (token.empty()) {
    std::ifstream in(absl::GetFlag(FLAGS_token_file));
    std::getline(in, token);
    token = std::string(absl::StripAsciiWhitespace(token));
  }
  if (token.empty()) {
    std::fprintf(stderr, "foray: no token: pass --token, or --token_file with the token on its first line\n");
    return 2;
  }
  auto channel = grpc::CreateChannel(absl::GetFlag(FLAGS_address), grpc::InsecureChannelCredentials());
  auto monitoring = v1::Monitoring::NewStub(channel);
  if (command == "robots" && args.size() == 2) return Robots(*monitoring, token);
  if (command == "status" && args.size() == 3) return Status(*monitoring, token, args[2]);
  if (command == "watch" && args.size() <= 3) {
    return Watch(*monitoring, token, args.size() == 3 ? args[2] : "");
  }
  std::fprintf(stderr, "foray: cannot read \"%s\" with %zu arguments\n\n%s\n", command.c_str(),
               args.size() - 2, kUsage);
  return 2;
}
