// foray: the command-line tool of engineers: register robots from spec files, read progress,
// ask for a plan, move transitions in and out (CSV, .npy), train, and manage checkpoints.
// Every command answers --help. Credentials: --token, or --token_file (the token is the last
// word of the file's first line, so a robot's "ROBOT_ID TOKEN" identity file works too).
// Exit codes: 0 done, 1 the server refused or failed, 2 bad usage or a bad input file.

#include <algorithm>
#include <cmath>
#include <csignal>
#include <cstdio>
#include <fstream>
#include <iterator>
#include <memory>
#include <map>
#include <string>
#include <vector>

#include "absl/flags/flag.h"
#include "absl/flags/parse.h"
#include "absl/flags/usage.h"
#include "absl/strings/match.h"
#include "absl/strings/numbers.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_join.h"
#include "absl/strings/str_split.h"
#include "absl/strings/str_format.h"
#include "absl/strings/strip.h"
#include "absl/time/clock.h"
#include "absl/time/time.h"
#include "client/cli/spec_file.h"
#include "client/cpp/session.h"
#include "client/cli/table_files.h"
#include "foray/v1/models.grpc.pb.h"
#include "foray/v1/monitoring.grpc.pb.h"
#include "foray/v1/registry.grpc.pb.h"
#include "foray/v1/session.grpc.pb.h"
#include "grpcpp/grpcpp.h"

ABSL_FLAG(std::string, address, "127.0.0.1:50151", "forayd's gRPC address, host:port.");
ABSL_FLAG(std::string, token, "", "Bearer token (admin or a robot's own); overrides --token_file.");
ABSL_FLAG(std::string, token_file, "./foray-data/admin-token", "File whose first line is the token.");
ABSL_FLAG(std::string, tls_ca, "",
          "PEM file of the certificate authority (or the self-signed certificate) that signed "
          "forayd's certificate: connect over TLS (forayd --tls_cert). Empty: plaintext.");
ABSL_FLAG(std::string, tls_server_name, "",
          "TLS: the name to check forayd's certificate against, when it is not the host in "
          "--address.");
ABSL_FLAG(double, seconds, 0, "watch: stop after this many seconds (0: until Ctrl-C).");
ABSL_FLAG(bool, plain, false, "watch: print one line per event instead of redrawing a table.");
ABSL_FLAG(std::string, token_out, "", "register: write the new robot's id and token to this file (0600).");
ABSL_FLAG(std::string, robot_id, "",
          "register: the id to register under (r- and 8..32 hex digits), e.g. to move a robot to "
          "another shard under its own id; empty: a new random id.");
ABSL_FLAG(std::string, state, "", "plan: the current state, comma-separated, state_dim values.");
ABSL_FLAG(std::string, previous_action, "", "plan: the action applied last, comma-separated (optional).");
ABSL_FLAG(double, deadline_ms, 100, "plan: planning time, milliseconds.");
ABSL_FLAG(std::string, out, "", "export: output file, FILE.csv or FILE.npy.");
ABSL_FLAG(uint64_t, from_seq, 0, "export: first seq (0: from the start).");
ABSL_FLAG(uint64_t, to_seq, 0, "export: last seq (0: to the end).");
ABSL_FLAG(bool, no_wait, false, "train: return once the round is queued, without its report.");

namespace {

namespace v1 = foray::v1;

constexpr char kCaution[] =
    "Foray is not a safety system: keep emergency stops and safety-rated limits in place and\n"
    "follow your lab's risk assessment and local rules before any plan reaches a robot.";

// The bearer token, and the robot's id in the foray-robot header (for a router in front of
// several servers) when the call is about one robot.
grpc::ClientContext* WithToken(grpc::ClientContext* context, const std::string& token,
                               const std::string& robot_id = "") {
  context->AddMetadata("authorization", "Bearer " + token);
  if (!robot_id.empty()) context->AddMetadata(foray::client::kRobotHeader, robot_id);
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

// A text progress bar of `width` cells for a fraction in [0, 1].
std::string Bar(double fraction, int width) {
  const int filled = static_cast<int>(std::clamp(fraction, 0.0, 1.0) * width + 0.5);
  return absl::StrCat("[", std::string(filled, '#'), std::string(width - filled, '.'), "]");
}

std::string Row(const v1::RobotProgress& p) {
  const v1::EpisodeTally& ev = p.evaluation();
  return absl::StrFormat("%-22s %-12s %9d %8d %5s %10s %8s %9s %7.1f%% %8.1f",
                         p.name(), p.robot_id(), p.transitions(), p.episodes(),
                         absl::StrCat("v", p.model_version()),
                         p.has_last_training() ? absl::StrFormat("%.4f", p.last_training().holdout_mse()) : "-",
                         p.exploration().episodes() > 0 ? absl::StrFormat("%g", p.exploration().last_return()) : "-",
                         ev.episodes() > 0 ? absl::StrFormat("%.0f%%", 100.0 * ev.recent_success_rate()) : "-",
                         100.0 * Coverage(p.coverage()), p.plan_latency().p50_ms());
}

std::string Header() {
  return absl::StrFormat("%-22s %-12s %9s %8s %5s %10s %8s %9s %8s %8s", "robot", "id", "transit.",
                         "episodes", "model", "hold. MSE", "return", "eval. ok", "coverage", "plan ms");
}

// "12 episodes, last return 3, recent mean 2.5, success 60% (last 10), 1 ended terminal"
std::string Tally(const v1::EpisodeTally& t) {
  if (t.episodes() == 0) return "none yet";
  return absl::StrFormat("%d episodes, last return %g, mean %.3g and success %.0f%% over the last %d, "
                         "%d successes and %d ended in a terminal state in all",
                         t.episodes(), t.last_return(), t.recent_mean_return(),
                         100.0 * t.recent_success_rate(), std::min<uint64_t>(t.episodes(), 10),
                         t.successes(), t.terminals());
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
  const grpc::Status s = monitoring.GetProgress(WithToken(&context, token, robot_id), request, &snapshot);
  if (!s.ok()) return Fail("reading robot " + robot_id, s);
  const v1::RobotProgress& p = snapshot.robots(0);
  absl::PrintF("%s (%s)%s\n", p.name().c_str(), p.robot_id().c_str(), p.archived() ? " archived" : "");
  absl::PrintF("  transitions %d, episodes %d, model v%d%s\n", p.transitions(), p.episodes(),
              p.model_version(),
              p.training() ? " (training)" : (p.queued_training() > 0 ? " (training due)" : ""));
  if (p.queued_plans() > 0) absl::PrintF("  plans waiting for a core: %d\n", p.queued_plans());
  if (p.has_last_training()) {
    absl::PrintF("  last training: %d epochs on %d transitions, holdout NLL %.4f, MSE %.4f\n",
                p.last_training().epochs(), p.last_training().transitions(),
                p.last_training().holdout_nll(), p.last_training().holdout_mse());
  }
  if (p.has_last_episode()) {
    absl::PrintF("  last episode %d (%s%s): %d steps, return %g, information gain %.3f nats/step\n",
                p.last_episode().episode(), p.last_episode().evaluation() ? "evaluation" : "exploration",
                p.last_episode().terminal() ? ", ended in a terminal state" : "",
                p.last_episode().steps(), p.last_episode().return_(),
                p.last_episode().information_gain());
  }
  absl::PrintF("  exploration: %s\n", Tally(p.exploration()).c_str());
  absl::PrintF("  evaluation:  %s\n", Tally(p.evaluation()).c_str());
  absl::PrintF("  coverage %.1f%% of a %dx%d grid; plans %d, p50 %.1f ms, p99 %.1f ms, deadline misses %d\n",
              100.0 * Coverage(p.coverage()), p.coverage().cells(), p.coverage().cells(),
              p.plan_latency().plans(), p.plan_latency().p50_ms(), p.plan_latency().p99_ms(),
              p.plan_latency().deadline_misses());
  return 0;
}

int Watch(v1::Monitoring::Stub& monitoring, const std::string& token, const std::string& robot_id) {
  grpc::ClientContext context;
  WithToken(&context, token, robot_id);
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
        absl::PrintF("%s %s episode %d: return %g%s%s, information gain %.3f nats/step\n",
                    event.robot_id().c_str(), event.episode().evaluation() ? "evaluation" : "exploration",
                    event.episode().episode(), event.episode().return_(),
                    event.episode().success() ? " (success)" : "",
                    event.episode().terminal() ? " (ended in a terminal state)" : "",
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
      absl::PrintF("\033[H\033[2J%s   %s\n%s  %s\n", "Foray learning progress",
                  absl::FormatTime("%H:%M:%S", absl::Now(), absl::LocalTimeZone()).c_str(),
                  Header().c_str(), "coverage of the state grid");
      for (const auto& [id, p] : latest) {
        absl::PrintF("%s  %s%s\n", Row(p), Bar(Coverage(p.coverage()), 20),
                     p.training() ? "  training..." : "");
      }
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


// A vector given on the command line: comma-separated finite numbers.
absl::StatusOr<std::vector<double>> ParseVector(const std::string& flag, const std::string& text) {
  std::vector<double> values;
  for (absl::string_view cell : absl::StrSplit(text, ',', absl::SkipWhitespace())) {
    double v;
    if (!absl::SimpleAtod(cell, &v) || !std::isfinite(v)) {
      return absl::InvalidArgumentError(absl::StrFormat("--%s: \"%s\" is not a finite number", flag, cell));
    }
    values.push_back(v);
  }
  return values;
}

int Usage(const absl::Status& s) {
  std::fprintf(stderr, "foray: %s\n", std::string(s.message()).c_str());
  return 2;
}

absl::StatusOr<v1::Robot> GetRobot(v1::RobotRegistry::Stub& registry, const std::string& token,
                                   const std::string& robot_id, grpc::Status* failure) {
  grpc::ClientContext context;
  v1::GetRobotRequest request;
  request.set_robot_id(robot_id);
  v1::Robot robot;
  *failure = registry.GetRobot(WithToken(&context, token, robot_id), request, &robot);
  if (!failure->ok()) return absl::UnavailableError(failure->error_message());
  return robot;
}

int Register(v1::RobotRegistry::Stub& registry, const std::string& token, const std::string& file) {
  absl::StatusOr<v1::RobotSpec> spec = foray::cli::ReadSpecFile(file);
  if (!spec.ok()) return Usage(spec.status());
  grpc::ClientContext context;
  v1::RegisterRobotRequest request;
  *request.mutable_spec() = *spec;
  // The id is chosen here, so a router can place the robot by it.
  request.set_robot_id(absl::GetFlag(FLAGS_robot_id).empty() ? foray::client::NewRobotId()
                                                             : absl::GetFlag(FLAGS_robot_id));
  v1::RegisterRobotResponse response;
  const grpc::Status s = registry.RegisterRobot(WithToken(&context, token, request.robot_id()), request, &response);
  if (!s.ok()) return Fail("registering " + spec->name(), s);
  const std::string out = absl::GetFlag(FLAGS_token_out);
  if (!out.empty()) {
    const foray::client::Identity identity{response.robot().robot_id(), response.token()};
    if (!foray::client::WriteIdentity(out, identity, /*exclusive=*/true).ok()) {
      std::fprintf(stderr, "foray: registered %s but cannot write a new %s (does it exist?); its token:\n%s\n",
                   identity.robot_id.c_str(), out.c_str(), identity.token.c_str());
      return 1;
    }
    absl::PrintF("registered %s as %s; id and token in %s\n", spec->name(), response.robot().robot_id(), out);
  } else {
    absl::PrintF("registered %s as %s\ntoken: %s\n(keep the token secret: it lets a client write this "
                 "robot's data; --token_out writes it to a file instead)\n",
                 spec->name(), response.robot().robot_id(), response.token());
  }
  return 0;
}

int PlanFrom(v1::RobotSession::Stub& session, const std::string& token, const std::string& robot_id) {
  absl::StatusOr<std::vector<double>> state = ParseVector("state", absl::GetFlag(FLAGS_state));
  if (!state.ok()) return Usage(state.status());
  if (state->empty()) return Usage(absl::InvalidArgumentError("--state is required: the current state, V,V,..."));
  absl::StatusOr<std::vector<double>> previous =
      ParseVector("previous_action", absl::GetFlag(FLAGS_previous_action));
  if (!previous.ok()) return Usage(previous.status());
  std::fprintf(stderr, "%s\n", kCaution);
  grpc::ClientContext context;
  context.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(30) +
                       std::chrono::milliseconds(static_cast<int64_t>(absl::GetFlag(FLAGS_deadline_ms))));
  v1::PlanActionsRequest request;
  request.set_robot_id(robot_id);
  request.mutable_request()->mutable_state()->Add(state->begin(), state->end());
  request.mutable_request()->mutable_previous_action()->Add(previous->begin(), previous->end());
  request.mutable_request()->set_deadline_ms(absl::GetFlag(FLAGS_deadline_ms));
  v1::Plan plan;
  const grpc::Status s = session.PlanActions(WithToken(&context, token, robot_id), request, &plan);
  if (!s.ok()) return Fail("planning", s);
  absl::PrintF("plan of %d steps, model v%d%s, %d iterations in %.1f ms; objective %.4g = return %.4g + "
               "information gain %.4g nats\n",
               plan.steps_size(), plan.model_version(),
               plan.from_prior() ? " (no model yet: random actions within the limits)" : "", plan.iterations(),
               plan.compute_ms(), plan.objective(), plan.expected_return(), plan.information_gain());
  absl::PrintF("%5s  %-28s %-40s %10s %10s\n", "step", "action", "predicted state (mean +- std)", "reward",
               "info gain");
  for (int t = 0; t < plan.steps_size(); ++t) {
    const v1::Plan::Step& step = plan.steps(t);
    std::string predicted;
    for (int k = 0; k < step.predicted_state_mean_size(); ++k) {
      absl::StrAppend(&predicted, k ? " " : "",
                      absl::StrFormat("%.3g+-%.2g", step.predicted_state_mean(k), step.predicted_state_std(k)));
    }
    absl::PrintF("%5d  %-28s %-40s %10.4g %10.4g\n", t, absl::StrJoin(step.action(), " ", [](std::string* o, double v) {
                   absl::StrAppend(o, absl::StrFormat("%.4g", v));
                 }),
                 predicted.empty() ? "-" : predicted, step.expected_reward(), step.information_gain());
  }
  return 0;
}

int Export(v1::RobotRegistry::Stub& registry, v1::Monitoring::Stub& monitoring, const std::string& token,
           const std::string& robot_id) {
  const std::string out = absl::GetFlag(FLAGS_out);
  const bool npy = absl::EndsWith(out, ".npy");
  if (!npy && !absl::EndsWith(out, ".csv")) {
    return Usage(absl::InvalidArgumentError(absl::StrFormat("--out is \"%s\"; give FILE.csv or FILE.npy", out)));
  }
  grpc::Status failure;
  absl::StatusOr<v1::Robot> robot = GetRobot(registry, token, robot_id, &failure);
  if (!robot.ok()) return Fail("reading robot " + robot_id, failure);
  grpc::ClientContext context;
  v1::ExportTransitionsRequest request;
  request.set_robot_id(robot_id);
  request.set_from_seq(absl::GetFlag(FLAGS_from_seq));
  request.set_to_seq(absl::GetFlag(FLAGS_to_seq));
  auto reader = monitoring.ExportTransitions(WithToken(&context, token, robot_id), request);
  std::vector<v1::Transition> transitions;
  v1::TransitionBatch batch;
  while (reader->Read(&batch)) {
    for (v1::Transition& t : *batch.mutable_transitions()) transitions.push_back(std::move(t));
  }
  if (const grpc::Status s = reader->Finish(); !s.ok()) return Fail("exporting " + robot_id, s);
  const absl::Status written = npy ? foray::cli::WriteTransitionsNpy(out, robot->spec(), transitions)
                                   : foray::cli::WriteTransitionsCsv(out, robot->spec(), transitions);
  if (!written.ok()) {
    std::fprintf(stderr, "foray: %s\n", std::string(written.message()).c_str());
    return 1;
  }
  absl::PrintF("wrote %d transitions of %s to %s\ncolumns: %s\n", transitions.size(), robot_id, out,
               absl::StrJoin(foray::cli::TransitionColumns(robot->spec()), ","));
  return 0;
}

int Import(v1::RobotRegistry::Stub& registry, v1::RobotSession::Stub& session, const std::string& token,
           const std::string& robot_id, const std::string& file) {
  grpc::Status failure;
  absl::StatusOr<v1::Robot> robot = GetRobot(registry, token, robot_id, &failure);
  if (!robot.ok()) return Fail("reading robot " + robot_id, failure);
  absl::StatusOr<std::vector<v1::Transition>> rows = foray::cli::ReadTransitionsCsv(file, robot->spec());
  if (!rows.ok()) return Usage(rows.status());
  uint64_t accepted = 0, duplicates = 0;
  constexpr size_t kBatch = 1000;
  for (size_t from = 0; from < rows->size(); from += kBatch) {
    v1::AppendTransitionsRequest request;
    request.set_robot_id(robot_id);
    for (size_t i = from; i < std::min(rows->size(), from + kBatch); ++i) *request.add_transitions() = (*rows)[i];
    grpc::ClientContext context;
    context.set_deadline(std::chrono::system_clock::now() + std::chrono::seconds(60));
    v1::Ack ack;
    const grpc::Status s = session.AppendTransitions(WithToken(&context, token, robot_id), request, &ack);
    if (!s.ok()) {
      std::fprintf(stderr, "foray: rows %zu..%zu were not stored; %s\n", from + 1,
                   std::min(rows->size(), from + kBatch),
                   from == 0 ? "nothing was stored" : absl::StrFormat("rows 1..%d are", from).c_str());
      return Fail("importing " + file, s);
    }
    accepted += ack.accepted();
    duplicates += ack.duplicates();
  }
  absl::PrintF("imported %d rows into %s: %d new, %d already there\n", rows->size(), robot_id, accepted,
               duplicates);
  return 0;
}

void PrintReport(const v1::TrainingReport& r) {
  absl::PrintF("model v%d: %d epochs on %d transitions in %.1f s; train NLL %.4f, holdout NLL %.4f, holdout MSE %.4g\n",
               r.model_version(), r.epochs(), r.transitions(), r.duration_s(), r.train_nll(), r.holdout_nll(),
               r.holdout_mse());
}

int Train(v1::Models::Stub& models, const std::string& token, const std::string& robot_id) {
  grpc::ClientContext context;
  v1::TrainNowRequest request;
  request.set_robot_id(robot_id);
  request.set_wait(!absl::GetFlag(FLAGS_no_wait));
  v1::TrainNowResponse response;
  const grpc::Status s = models.TrainNow(WithToken(&context, token, robot_id), request, &response);
  if (!s.ok()) return Fail("training " + robot_id, s);
  if (response.has_report()) {
    PrintReport(response.report());
  } else {
    absl::PrintF("training of %s queued\n", robot_id);
  }
  return 0;
}

int Checkpoints(v1::Models::Stub& models, const std::string& token, const std::string& robot_id) {
  grpc::ClientContext context;
  v1::ListCheckpointsRequest request;
  request.set_robot_id(robot_id);
  v1::ListCheckpointsResponse response;
  const grpc::Status s = models.ListCheckpoints(WithToken(&context, token, robot_id), request, &response);
  if (!s.ok()) return Fail("listing checkpoints of " + robot_id, s);
  absl::PrintF("%8s  %-20s %10s %8s %12s %12s\n", "model", "created", "bytes", "epochs", "holdout NLL",
               "holdout MSE");
  for (const v1::Checkpoint& c : response.checkpoints()) {
    absl::PrintF("%8s  %-20s %10d %8d %12.4f %12.4g\n", absl::StrCat("v", c.model_version()),
                 absl::FormatTime("%Y-%m-%d %H:%M:%S", absl::FromUnixSeconds(c.created_at().seconds()),
                                  absl::LocalTimeZone()),
                 c.size_bytes(), c.report().epochs(), c.report().holdout_nll(), c.report().holdout_mse());
  }
  if (response.checkpoints_size() == 0) absl::PrintF("(no checkpoints: no model trained yet)\n");
  return 0;
}

int Restore(v1::Models::Stub& models, const std::string& token, const std::string& robot_id,
            const std::string& version_text) {
  uint64_t version;
  if (!absl::SimpleAtoi(absl::StripPrefix(version_text, "v"), &version) || version == 0) {
    return Usage(absl::InvalidArgumentError(
        absl::StrFormat("VERSION is \"%s\"; give a model version from `foray checkpoints`", version_text)));
  }
  std::fprintf(stderr, "%s\n", kCaution);
  grpc::ClientContext context;
  v1::RestoreCheckpointRequest request;
  request.set_robot_id(robot_id);
  request.set_model_version(version);
  v1::TrainingReport report;
  const grpc::Status s = models.RestoreCheckpoint(WithToken(&context, token, robot_id), request, &report);
  if (!s.ok()) return Fail(absl::StrCat("restoring v", version, " of ", robot_id), s);
  absl::PrintF("restored checkpoint v%d of %s; plans now come from ", version, robot_id);
  PrintReport(report);
  return 0;
}

int Archive(v1::RobotRegistry::Stub& registry, const std::string& token, const std::string& robot_id) {
  grpc::ClientContext context;
  v1::ArchiveRobotRequest request;
  request.set_robot_id(robot_id);
  v1::Robot robot;
  const grpc::Status s = registry.ArchiveRobot(WithToken(&context, token, robot_id), request, &robot);
  if (!s.ok()) return Fail("archiving " + robot_id, s);
  absl::PrintF("archived %s (%s); its %d transitions stay in the data directory\n", robot.robot_id(),
               robot.spec().name(), robot.transitions());
  return 0;
}

// The token: --token, else the last word of --token_file's first line.
std::string ReadToken() {
  std::string token = absl::GetFlag(FLAGS_token);
  if (!token.empty()) return token;
  std::ifstream in(absl::GetFlag(FLAGS_token_file));
  std::string line;
  std::getline(in, line);
  const std::vector<std::string> words = absl::StrSplit(line, ' ', absl::SkipWhitespace());
  return words.empty() ? "" : std::string(absl::StripAsciiWhitespace(words.back()));
}

// Plaintext, or TLS checked against --tls_ca; null (after saying why) when the file cannot be
// read.
std::shared_ptr<grpc::Channel> OpenChannel() {
  const std::string address = absl::GetFlag(FLAGS_address);
  const std::string ca_path = absl::GetFlag(FLAGS_tls_ca);
  if (ca_path.empty()) {
    if (!absl::GetFlag(FLAGS_tls_server_name).empty()) {
      std::fprintf(stderr, "foray: --tls_server_name needs --tls_ca\n");
      return nullptr;
    }
    return grpc::CreateChannel(address, grpc::InsecureChannelCredentials());
  }
  std::ifstream in(ca_path, std::ios::binary);
  std::string pem((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
  if (!in.good() && !in.eof()) pem.clear();
  if (pem.find("-----BEGIN CERTIFICATE-----") == std::string::npos) {
    std::fprintf(stderr, "foray: --tls_ca \"%s\" %s\n", ca_path.c_str(),
                 pem.empty() ? "cannot be read" : "holds no PEM certificate");
    return nullptr;
  }
  grpc::SslCredentialsOptions options;
  options.pem_root_certs = std::move(pem);
  grpc::ChannelArguments arguments;
  if (const std::string name = absl::GetFlag(FLAGS_tls_server_name); !name.empty()) {
    arguments.SetSslTargetNameOverride(name);
  }
  return grpc::CreateCustomChannel(address, grpc::SslCredentials(options), arguments);
}

// The server's stubs and the caller's token, for the commands.
struct Server {
  std::unique_ptr<v1::Monitoring::Stub> monitoring;
  std::unique_ptr<v1::RobotRegistry::Stub> registry;
  std::unique_ptr<v1::RobotSession::Stub> session;
  std::unique_ptr<v1::Models::Stub> models;
  std::string token;
};
using Operands = std::vector<std::string>;

// A command of the CLI, declared once: its name, operands, help and what it runs. `run` gets
// between min_operands and max_operands operands (checked before).
struct Command {
  const char* name;
  const char* args;
  const char* help;
  size_t min_operands, max_operands;
  int (*run)(Server& server, const Operands& operands);
};

constexpr Command kCommands[] = {
    {"register", "SPEC.json [--token_out=FILE] [--robot_id=ID]",
     "Registers a robot from a spec file (admin token) and prints its id and token; with\n"
     "--token_out the id and token go to FILE (mode 0600) instead of the screen. The spec format\n"
     "is in DEVELOPERS.md, \"Robot spec files\". --robot_id registers under a given id (moving a\n"
     "robot to another shard keeps its id, so the router keeps finding it).",
     1, 1, [](Server& s, const Operands& o) { return Register(*s.registry, s.token, o[0]); }},
    {"robots", "", "Lists every robot with its progress (admin token).",
     0, 0, [](Server& s, const Operands&) { return Robots(*s.monitoring, s.token); }},
    {"status", "ROBOT_ID", "One robot's progress: data, model, last training, last episode, plans.",
     1, 1, [](Server& s, const Operands& o) { return Status(*s.monitoring, s.token, o[0]); }},
    {"watch", "[ROBOT_ID] [--seconds=N] [--plain]",
     "Live learning progress until Ctrl-C: a refreshing table with progress bars (all robots with\n"
     "the admin token), or one line per event with --plain.",
     0, 1, [](Server& s, const Operands& o) { return Watch(*s.monitoring, s.token, o.empty() ? "" : o[0]); }},
    {"plan", "ROBOT_ID --state=V,V,... [--previous_action=V,...] [--deadline_ms=100]",
     "Asks for a plan from a state (the robot's own token) and prints the action sequence with\n"
     "the predicted states. Printing a plan moves nothing; whoever sends it to a robot owns that step.",
     1, 1, [](Server& s, const Operands& o) { return PlanFrom(*s.session, s.token, o[0]); }},
    {"export", "ROBOT_ID --out=FILE.csv|FILE.npy [--from_seq=N] [--to_seq=N]",
     "Writes the robot's transitions to CSV (a header row of column names) or to a .npy file of\n"
     "float64, one row per transition, columns as in the CSV: seq, episode, step, state.*, action.*,\n"
     "next_state.*, reward, terminal. numpy.load reads it.",
     1, 1, [](Server& s, const Operands& o) { return Export(*s.registry, *s.monitoring, s.token, o[0]); }},
    {"import", "ROBOT_ID FILE.csv",
     "Sends the transitions of a CSV file in the export format (the robot's own token). Rows whose\n"
     "seq the server already holds are counted as duplicates and not stored twice.",
     2, 2, [](Server& s, const Operands& o) { return Import(*s.registry, *s.session, s.token, o[0], o[1]); }},
    {"train", "ROBOT_ID [--no_wait]", "Trains the robot's ensemble now and prints the training report.",
     1, 1, [](Server& s, const Operands& o) { return Train(*s.models, s.token, o[0]); }},
    {"checkpoints", "ROBOT_ID", "Lists the robot's model checkpoints, newest first.",
     1, 1, [](Server& s, const Operands& o) { return Checkpoints(*s.models, s.token, o[0]); }},
    {"archive", "ROBOT_ID",
     "Stops serving a robot (admin token): its token stops working, its data stays on disk.\n"
     "Used after moving a robot to another server.",
     1, 1, [](Server& s, const Operands& o) { return Archive(*s.registry, s.token, o[0]); }},
    {"restore", "ROBOT_ID VERSION",
     "Publishes the checkpoint of model VERSION again, as a new model version. The next plans\n"
     "come from it.",
     2, 2, [](Server& s, const Operands& o) { return Restore(*s.models, s.token, o[0], o[1]); }},
};

std::string Usage() {
  std::string text = "foray: talk to the Foray planning server.\n\n";
  for (const Command& c : kCommands) absl::StrAppend(&text, absl::StrFormat("  foray %-12s %s\n", c.name, c.args));
  absl::StrAppend(&text, "\nforay COMMAND --help tells more. Common flags: --address=HOST:PORT, --token or "
                         "--token_file.\nExit codes: 0 done, 1 the server refused or failed, 2 bad usage "
                         "or input file.\n\n", kCaution);
  return text;
}

const Command* FindCommand(const std::string& name) {
  for (const Command& c : kCommands) {
    if (name == c.name) return &c;
  }
  return nullptr;
}

}  // namespace

int main(int argc, char** argv) {
  // `foray COMMAND --help` and `foray help [COMMAND]` explain one command or all of them.
  std::vector<std::string> raw(argv + 1, argv + argc);
  const bool help = std::any_of(raw.begin(), raw.end(), [](const std::string& a) {
    return a == "--help" || a == "-h" || a == "help";
  });
  if (help) {
    for (const std::string& word : raw) {
      if (const Command* c = FindCommand(word)) {
        absl::PrintF("foray %s %s\n\n%s\n\n%s\n", c->name, c->args, c->help, kCaution);
        return 0;
      }
    }
    absl::PrintF("%s\n", Usage());
    return 0;
  }
  absl::SetProgramUsageMessage(Usage());
  std::vector<char*> args = absl::ParseCommandLine(argc, argv);
  if (args.size() < 2) {
    std::fprintf(stderr, "%s\n", Usage().c_str());
    return 2;
  }
  const std::string command = args[1];
  const Command* known = FindCommand(command);
  if (known == nullptr) {
    std::fprintf(stderr, "foray: \"%s\" is not a command\n\n%s\n", command.c_str(), Usage().c_str());
    return 2;
  }
  const std::string token = ReadToken();
  if (token.empty()) {
    std::fprintf(stderr, "foray: no token: pass --token, or --token_file with the token on its first line\n");
    return 2;
  }
  const Operands operands(args.begin() + 2, args.end());
  if (operands.size() >= known->min_operands && operands.size() <= known->max_operands) {
    const std::shared_ptr<grpc::Channel> channel = OpenChannel();
    if (channel == nullptr) return 2;
    Server server{v1::Monitoring::NewStub(channel), v1::RobotRegistry::NewStub(channel),
                  v1::RobotSession::NewStub(channel), v1::Models::NewStub(channel), token};
    return known->run(server, operands);
  }
  const size_t n = operands.size();
  std::fprintf(stderr, "foray: %s takes %s, not %zu operands\n\nforay %s %s\n%s\n", command.c_str(),
               *known->args ? known->args : "no operands", n, known->name, known->args, known->help);
  return 2;
}
