// The HTTP side of forayd, on its own port: the dashboard page at /, /metrics in the
// Prometheus text exposition format (version 0.0.4) with per-robot labels, and the JSON the
// dashboard reads (/api/robots, /api/robots/ID/history). Read only. When a viewer token is configured every request must carry it
// (`Authorization: Bearer <token>` or `?token=<token>`). Serves from its own threads; Start and
// Stop from one thread.
#ifndef FORAY_SERVER_WEB_WEB_SERVER_H_
#define FORAY_SERVER_WEB_WEB_SERVER_H_

#include <memory>
#include <string>
#include <thread>

#include "absl/status/status.h"
#include "server/api/directory.h"
#include "server/sched/plan_gate.h"

namespace httplib {
class Server;
}

namespace foray::web {

// The text of /metrics for the robots in `directory` and the plan admission `gate`.
std::string MetricsText(const api::RobotDirectory& directory, const sched::PlanGate& gate);

// The JSON of /api/robots: one object per robot with its progress.
std::string RobotsJson(const api::RobotDirectory& directory);

// The JSON of /api/robots/ID/history: the robot's recorded episodes and training rounds.
std::string HistoryJson(const store::Store& store, const std::string& robot_id);

class WebServer {
 public:
  // Both must outlive the server. An empty viewer_token_hash means no token is needed.
  WebServer(const api::RobotDirectory* directory, const sched::PlanGate* gate,
            std::string viewer_token_hash);
  WebServer(const WebServer&) = delete;
  WebServer& operator=(const WebServer&) = delete;
  ~WebServer();

  // Binds host:port and serves on a background thread. Unavailable when it cannot bind.
  absl::Status Start(const std::string& host, int port);
  void Stop();

 private:
  const api::RobotDirectory* const directory_;
  const sched::PlanGate* const gate_;
  const std::string viewer_token_hash_;
  std::unique_ptr<httplib::Server> server_;
  std::thread thread_;
};

}  // namespace foray::web

#endif  // FORAY_SERVER_WEB_WEB_SERVER_H_
