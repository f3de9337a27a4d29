#include "server/web/web_server.h"

#include <httplib.h>

#include <cmath>
#include <map>
#include <vector>

#include "absl/strings/match.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_format.h"
#include "absl/strings/str_join.h"
#include "absl/strings/str_replace.h"
#include "core/model/simd_kernels.h"
#include "server/api/auth.h"
#include "server/store/records.h"
#include "server/web/dashboard_html.h"

namespace foray::web {
namespace {

// Label values escape backslash, double quote and newline (exposition format 0.0.4).
std::string LabelValue(const std::string& v) {
  return absl::StrReplaceAll(v, {{"\\", "\\\\"}, {"\"", "\\\""}, {"\n", "\\n"}});
}

std::string JsonString(const std::string& v) {
  std::string out = "\"";
  for (char c : v) {
    switch (c) {
      case '"':
        out += "\\\"";
        break;
      case '\\':
        out += "\\\\";
        break;
      case '\n':
        out += "\\n";
        break;
      default:
        if (static_cast<unsigned char>(c) < 0x20) {
          out += absl::StrFormat("\\u%04x", c);
        } else {
          out += c;
        }
    }
  }
  return out + "\"";
}

std::string Number(double v) { return std::isfinite(v) ? absl::StrFormat("%.17g", v) : "null"; }

std::string NumberArray(const std::vector<double>& values) {
  return absl::StrCat(
      "[", absl::StrJoin(values, ",", [](std::string* out, double v) { out->append(Number(v)); }),
      "]");
}

double Mean(const std::vector<double>& values) {
  if (values.empty()) return std::nan("");
  double sum = 0.0;
  for (double v : values) sum += v;
  return sum / values.size();
}

// Seconds since the Unix epoch (the dashboard's time axis), null for an unset time.
std::string UnixSeconds(absl::Time t) {
  return t == absl::InfinitePast() ? "null" : Number(absl::ToUnixMicros(t) * 1e-6);
}

// [{"label": ..., "unit": ...}, ...] of a spec's state or action dimensions.
std::string DimensionsJson(const google::protobuf::RepeatedPtrField<v1::Dimension>& dims) {
  std::string out = "[";
  for (int i = 0; i < dims.size(); ++i) {
    absl::StrAppend(&out, i == 0 ? "" : ", ", "{\"label\": ", JsonString(dims[i].label()),
                    ", \"unit\": ", JsonString(dims[i].unit()), "}");
  }
  return out + "]";
}

double CoverageFraction(const robot::ProgressView& p) {
  if (p.coverage_counts.empty()) return 0.0;
  int occupied = 0;
  for (uint32_t n : p.coverage_counts) occupied += n > 0 ? 1 : 0;
  return static_cast<double>(occupied) / p.coverage_counts.size();
}

// One metric family: HELP, TYPE, then a sample per robot.
struct Family {
  std::string name, type, help;
  std::vector<std::pair<std::string, double>> samples;  // label set, value
};

}  // namespace

std::string MetricsText(const api::RobotDirectory& directory, const sched::PlanGate& gate) {
  std::map<std::string, Family> families;
  auto add = [&](const std::string& name, const std::string& type, const std::string& help,
                 const std::string& labels, double value) {
    Family& f = families[name];
    f.name = name;
    f.type = type;
    f.help = help;
    f.samples.emplace_back(labels, value);
  };
  for (const auto& entry : directory.List(/*include_archived=*/false)) {
    const robot::ProgressView p = entry->runtime->Progress();
    const std::string robot = absl::StrFormat(
        "robot_id=\"%s\",name=\"%s\"", LabelValue(entry->robot_id), LabelValue(entry->spec.name()));
    add("foray_robot_transitions_total", "counter", "Transitions stored for the robot.", robot,
        static_cast<double>(p.status.transitions));
    add("foray_robot_episodes_total", "counter", "Episodes finished by the robot.", robot,
        static_cast<double>(p.episodes));
    add("foray_robot_model_version", "gauge", "Published model version (0: none yet).", robot,
        static_cast<double>(p.status.model_version));
    add("foray_robot_plans_total", "counter", "Plans computed for the robot.", robot,
        static_cast<double>(p.plans));
    add("foray_robot_plan_deadline_misses_total", "counter",
        "Plans that took longer than their deadline.", robot,
        static_cast<double>(p.deadline_misses));
    for (const auto& [q, v] : {std::pair{"0.5", p.p50_ms}, {"0.9", p.p90_ms}, {"0.99", p.p99_ms}}) {
      add("foray_robot_plan_latency_milliseconds", "gauge",
          "Plan compute time over the last 1000 plans, by quantile.",
          absl::StrCat(robot, ",quantile=\"", q, "\""), v);
    }
    add("foray_robot_plans_waiting", "gauge", "The robot's plans waiting for a core now.", robot,
        static_cast<double>(p.plans_waiting));
    add("foray_robot_training_due", "gauge",
        "1 when a training round is due but has not started (the trainer is busy or paused).",
        robot, p.training_due ? 1.0 : 0.0);
    add("foray_robot_coverage_ratio", "gauge",
        "Fraction of the coverage grid's cells the robot has visited.", robot, CoverageFraction(p));
    if (p.model) {
      add("foray_robot_holdout_nll", "gauge", "Holdout NLL of the published model, nats.", robot,
          p.model->report.holdout_nll);
      add("foray_robot_holdout_mse", "gauge",
          "Holdout MSE of the published model, normalised units.", robot,
          p.model->report.holdout_mse);
    }
    for (const auto& [kind, tally] :
         {std::pair{"exploration", &p.exploration}, std::pair{"evaluation", &p.evaluation}}) {
      const std::string labels = absl::StrCat(robot, ",kind=\"", kind, "\"");
      add("foray_robot_episodes_by_kind_total", "counter",
          "Episodes finished by the robot, by kind (exploration or evaluation plans).", labels,
          static_cast<double>(tally->episodes));
      add("foray_robot_episode_successes_total", "counter",
          "Episodes whose return passed the robot's success_return, by kind.", labels,
          static_cast<double>(tally->successes));
      add("foray_robot_episode_terminals_total", "counter",
          "Episodes that ended in a terminal (irrecoverable) state, by kind.", labels,
          static_cast<double>(tally->terminals));
      add("foray_robot_recent_success_ratio", "gauge",
          "Success rate over the robot's last 10 episodes of the kind.", labels,
          tally->RecentSuccessRate());
      add("foray_robot_recent_mean_return", "gauge",
          "Mean return over the robot's last 10 episodes of the kind.", labels,
          tally->RecentMeanReturn());
    }
    if (p.last_episode) {
      add("foray_robot_last_episode_return", "gauge", "Return of the robot's last episode.", robot,
          p.last_episode->episode_return);
      add("foray_robot_last_episode_information_gain", "gauge",
          "Mean information gain of the executed plans in the last episode, nats.", robot,
          p.last_episode->information_gain);
    }
    add("foray_robot_training", "gauge", "1 while a training round runs for the robot.", robot,
        p.status.training ? 1.0 : 0.0);
  }
  add("foray_simd_target_info", "gauge",
      "The SIMD target the model's kernels run on (AVX3 is AVX-512), as the label; always 1.",
      absl::StrFormat("target=\"%s\"", LabelValue(model::simd::TargetName())), 1.0);
  add("foray_planner_busy_cores", "gauge", "Plans computing now (at most one per core).", "",
      static_cast<double>(gate.busy()));
  add("foray_planner_cores", "gauge", "Plans that may compute at once.", "",
      static_cast<double>(gate.slots()));
  add("foray_planner_waiting_plans", "gauge", "Plans waiting for a core now.", "",
      static_cast<double>(gate.waiting()));
  std::string out;
  for (const auto& [name, f] : families) {
    absl::StrAppend(&out, "# HELP ", name, " ", f.help, "\n# TYPE ", name, " ", f.type, "\n");
    for (const auto& [labels, value] : f.samples) {
      absl::StrAppend(&out, name, labels.empty() ? "" : absl::StrCat("{", labels, "}"), " ",
                      Number(value), "\n");
    }
  }
  return out;
}

std::string RobotsJson(const api::RobotDirectory& directory) {
  std::string out = "{\"robots\": [";
  bool first = true;
  for (const auto& entry : directory.List(/*include_archived=*/false)) {
    const robot::ProgressView p = entry->runtime->Progress();
    if (!first) out += ", ";
    first = false;
    absl::StrAppend(
        &out, "{\"robot_id\": ", JsonString(entry->robot_id),
        ", \"name\": ", JsonString(entry->spec.name()), ", \"transitions\": ", p.status.transitions,
        ", \"episodes\": ", p.episodes, ", \"model_version\": ", p.status.model_version,
        ", \"training\": ", p.status.training ? "true" : "false",
        ", \"training_due\": ", p.training_due ? "true" : "false",
        ", \"plans_waiting\": ", p.plans_waiting, ", \"plans\": ", p.plans,
        ", \"plan_p50_ms\": ", Number(p.p50_ms), ", \"plan_p99_ms\": ", Number(p.p99_ms),
        ", \"deadline_misses\": ", p.deadline_misses,
        ", \"coverage_ratio\": ", Number(CoverageFraction(p)),
        ", \"control_period_s\": ", Number(entry->spec.control_period_s()),
        ", \"success_return\": ",
        Number(entry->spec.has_success_return() ? entry->spec.success_return() : 0.0),
        ", \"state\": ", DimensionsJson(entry->spec.state()),
        ", \"action\": ", DimensionsJson(entry->spec.action()));
    if (p.model) {
      absl::StrAppend(&out, ", \"holdout_nll\": ", Number(p.model->report.holdout_nll),
                      ", \"holdout_mse\": ", Number(p.model->report.holdout_mse));
    }
    if (p.last_episode) {
      absl::StrAppend(&out, ", \"last_episode\": {\"episode\": ", p.last_episode->episode,
                      ", \"return\": ", Number(p.last_episode->episode_return),
                      ", \"information_gain\": ", Number(p.last_episode->information_gain),
                      ", \"evaluation\": ", p.last_episode->evaluation ? "true" : "false",
                      ", \"terminal\": ", p.last_episode->terminal ? "true" : "false", "}");
    }
    for (const auto& [kind, tally] :
         {std::pair{"exploration", &p.exploration}, std::pair{"evaluation", &p.evaluation}}) {
      absl::StrAppend(&out, ", \"", kind, "\": {\"episodes\": ", tally->episodes,
                      ", \"successes\": ", tally->successes, ", \"terminals\": ", tally->terminals,
                      ", \"last_return\": ", Number(tally->last_return),
                      ", \"recent_mean_return\": ", Number(tally->RecentMeanReturn()),
                      ", \"recent_success_rate\": ", Number(tally->RecentSuccessRate()), "}");
    }
    absl::StrAppend(&out, ", \"coverage\": {\"indices\": [", absl::StrJoin(p.coverage_indices, ","),
                    "], \"lower\": ", NumberArray(p.coverage_lower),
                    ", \"upper\": ", NumberArray(p.coverage_upper),
                    ", \"cells\": ", p.coverage_cells, ", \"counts\": [",
                    absl::StrJoin(p.coverage_counts, ","), "]}}");
  }
  return out + "]}";
}

std::string HistoryJson(const store::Store& store, const std::string& robot_id) {
  std::string episodes, trainings;
  auto records = store.ReadProgress(0, absl::InfinitePast(), robot_id, 100000);
  if (records.ok()) {
    for (const store::ProgressRecord& r : *records) {
      if (r.kind == store::ProgressKind::kEpisode) {
        std::optional<store::EpisodeRecord> e = store::DecodeEpisode(r.payload);
        if (!e) continue;
        absl::StrAppend(&episodes, episodes.empty() ? "" : ", ", "{\"episode\": ", e->episode,
                        ", \"steps\": ", e->steps, ", \"return\": ", Number(e->episode_return),
                        ", \"information_gain\": ", Number(e->information_gain),
                        ", \"evaluation\": ", e->evaluation ? "true" : "false",
                        ", \"success\": ", e->success ? "true" : "false",
                        ", \"terminal\": ", e->terminal ? "true" : "false",
                        ", \"ended_at\": ", UnixSeconds(e->ended_at),
                        ", \"final_state\": ", NumberArray(e->final_state), "}");
      } else if (r.kind == store::ProgressKind::kTraining) {
        std::optional<store::TrainingRecord> t = store::DecodeTraining(r.payload);
        if (!t) continue;
        absl::StrAppend(&trainings, trainings.empty() ? "" : ", ",
                        "{\"model_version\": ", t->model_version,
                        ", \"epochs\": ", t->report.epochs,
                        ", \"holdout_nll\": ", Number(t->report.holdout_nll),
                        ", \"holdout_mse\": ", Number(t->report.holdout_mse),
                        ", \"transitions\": ", t->report.transitions,
                        ", \"training_seconds\": ", Number(t->training_seconds),
                        ", \"finished_at\": ", UnixSeconds(t->finished_at),
                        ", \"within_1sigma\": ", Number(Mean(t->report.within_1sigma)),
                        ", \"within_2sigma\": ", Number(Mean(t->report.within_2sigma)), "}");
      }
    }
  }
  return absl::StrCat("{\"robot_id\": ", JsonString(robot_id), ", \"episodes\": [", episodes,
                      "], \"trainings\": [", trainings, "]}");
}

WebServer::WebServer(const api::RobotDirectory* directory, const sched::PlanGate* gate,
                     std::string viewer_token_hash)
    : directory_(directory), gate_(gate), viewer_token_hash_(std::move(viewer_token_hash)) {}

WebServer::~WebServer() { Stop(); }

absl::Status WebServer::Start(const std::string& host, int port) {
  server_ = std::make_unique<httplib::Server>();
  auto allowed = [this](const httplib::Request& req, httplib::Response& res) {
    if (viewer_token_hash_.empty()) return true;
    std::string token = req.get_param_value("token");
    const std::string header = req.get_header_value("Authorization");
    if (absl::StartsWith(header, "Bearer ")) token = header.substr(7);
    if (!token.empty() && api::SameHash(api::HashToken(token), viewer_token_hash_)) return true;
    res.status = 401;
    res.set_content("a viewer token is needed: Authorization: Bearer <token> or ?token=<token>\n",
                    "text/plain");
    return false;
  };
  server_->Get("/metrics", [this, allowed](const httplib::Request& req, httplib::Response& res) {
    if (!allowed(req, res)) return;
    res.set_content(MetricsText(*directory_, *gate_), "text/plain; version=0.0.4; charset=utf-8");
  });
  server_->Get("/api/robots", [this, allowed](const httplib::Request& req, httplib::Response& res) {
    if (!allowed(req, res)) return;
    res.set_content(RobotsJson(*directory_), "application/json");
  });
  server_->Get(R"(/api/robots/([A-Za-z0-9_.-]+)/history)",
               [this, allowed](const httplib::Request& req, httplib::Response& res) {
                 if (!allowed(req, res)) return;
                 res.set_content(HistoryJson(*directory_->store(), req.matches[1]),
                                 "application/json");
               });
  server_->Get("/", [allowed](const httplib::Request& req, httplib::Response& res) {
    if (!allowed(req, res)) return;
    res.set_content(kDashboardHtml, "text/html; charset=utf-8");
  });
  if (!server_->bind_to_port(host.c_str(), port)) {
    return absl::UnavailableError(absl::StrFormat("cannot serve HTTP on %s:%d", host, port));
  }
  thread_ = std::thread([this] { server_->listen_after_bind(); });
  return absl::OkStatus();
}

void WebServer::Stop() {
  if (server_) server_->stop();
  if (thread_.joinable()) thread_.join();
}

}  // namespace foray::web
