// The foray.v1 gRPC services: thin translations between the wire and the robot runtimes.
// Each call checks its credentials first, then validates everything it received, then acts.
// Thread-safe: gRPC calls the handlers from its own threads.
#ifndef FORAY_SERVER_API_SERVICES_H_
#define FORAY_SERVER_API_SERVICES_H_

#include "foray/v1/models.grpc.pb.h"
#include "foray/v1/monitoring.grpc.pb.h"
#include "foray/v1/registry.grpc.pb.h"
#include "foray/v1/session.grpc.pb.h"
#include "server/api/directory.h"
#include "server/api/write_watch.h"
#include "server/sched/plan_scheduler.h"
#include "server/sched/rate_limit.h"

namespace foray::api {

class RegistryService final : public v1::RobotRegistry::Service {
 public:
  explicit RegistryService(RobotDirectory* directory) : directory_(directory) {}

  grpc::Status RegisterRobot(grpc::ServerContext* context, const v1::RegisterRobotRequest* request,
                             v1::RegisterRobotResponse* response) override;
  grpc::Status GetRobot(grpc::ServerContext* context, const v1::GetRobotRequest* request,
                        v1::Robot* response) override;
  grpc::Status ListRobots(grpc::ServerContext* context, const v1::ListRobotsRequest* request,
                          v1::ListRobotsResponse* response) override;
  grpc::Status UpdateRobotSettings(grpc::ServerContext* context,
                                   const v1::UpdateRobotSettingsRequest* request,
                                   v1::Robot* response) override;
  grpc::Status ArchiveRobot(grpc::ServerContext* context, const v1::ArchiveRobotRequest* request,
                            v1::Robot* response) override;

 private:
  RobotDirectory* const directory_;
};

class SessionService final : public v1::RobotSession::Service {
 public:
  // `scheduler` runs plans on the cores; `write_watch` (may be null) ends sessions whose client
  // stops reading. All must outlive the service. transitions_per_s: each robot's limit (0:
  // none), with two seconds' worth of burst.
  SessionService(RobotDirectory* directory, sched::PlanScheduler* scheduler,
                 double transitions_per_s = 0.0, WriteWatch* write_watch = nullptr)
      : directory_(directory),
        scheduler_(scheduler),
        write_watch_(write_watch),
        transition_limit_(transitions_per_s, 2.0 * std::max(1.0, transitions_per_s)) {}

  grpc::Status Connect(
      grpc::ServerContext* context,
      grpc::ServerReaderWriter<v1::SessionServerMessage, v1::SessionClientMessage>* stream) override;
  grpc::Status AppendTransitions(grpc::ServerContext* context,
                                 const v1::AppendTransitionsRequest* request,
                                 v1::Ack* response) override;
  grpc::Status PlanActions(grpc::ServerContext* context, const v1::PlanActionsRequest* request,
                           v1::Plan* response) override;

 private:
  absl::Status Plan(const RobotEntry& entry, const v1::PlanRequest& request, v1::Plan* response);
  // ResourceExhausted, naming the limit, when `entry` sent more than its transitions per second.
  absl::Status AdmitTransitions(const RobotEntry& entry, size_t count);

  RobotDirectory* const directory_;
  sched::PlanScheduler* const scheduler_;
  WriteWatch* const write_watch_;
  sched::RateLimit transition_limit_;
};

class ModelsService final : public v1::Models::Service {
 public:
  explicit ModelsService(RobotDirectory* directory) : directory_(directory) {}

  grpc::Status Predict(grpc::ServerContext* context, const v1::PredictRequest* request,
                       v1::PredictResponse* response) override;
  grpc::Status TrainNow(grpc::ServerContext* context, const v1::TrainNowRequest* request,
                        v1::TrainNowResponse* response) override;
  grpc::Status ListCheckpoints(grpc::ServerContext* context,
                               const v1::ListCheckpointsRequest* request,
                               v1::ListCheckpointsResponse* response) override;
  grpc::Status RestoreCheckpoint(grpc::ServerContext* context,
                                 const v1::RestoreCheckpointRequest* request,
                                 v1::TrainingReport* response) override;
  grpc::Status ExportModel(grpc::ServerContext* context, const v1::ExportModelRequest* request,
                           v1::EnsembleModel* response) override;
  grpc::Status ImportModel(grpc::ServerContext* context, const v1::ImportModelRequest* request,
                           v1::TrainingReport* response) override;

 private:
  RobotDirectory* const directory_;
};

// Progress of learning: snapshots, a live stream resumable from a time, and transition export.
// GetProgress and WatchProgress accept the admin or the viewer token for every robot, and a
// robot's own token for that robot; ExportTransitions the admin or the robot's own token.
class MonitoringService final : public v1::Monitoring::Service {
 public:
  // `poll` is how often a watch looks for new records; `write_watch` (may be null) ends
  // streams whose client stops reading.
  explicit MonitoringService(RobotDirectory* directory, absl::Duration poll = absl::Milliseconds(200),
                             WriteWatch* write_watch = nullptr)
      : directory_(directory), poll_(poll), write_watch_(write_watch) {}

  grpc::Status GetProgress(grpc::ServerContext* context, const v1::GetProgressRequest* request,
                           v1::ProgressSnapshot* response) override;
  grpc::Status WatchProgress(grpc::ServerContext* context, const v1::WatchProgressRequest* request,
                             grpc::ServerWriter<v1::ProgressEvent>* writer) override;
  grpc::Status ExportTransitions(grpc::ServerContext* context,
                                 const v1::ExportTransitionsRequest* request,
                                 grpc::ServerWriter<v1::TransitionBatch>* writer) override;

 private:
  // The robots a call may see: one (its own token or the admin's) or all (admin).
  absl::StatusOr<std::vector<std::shared_ptr<const RobotEntry>>> Visible(
      const grpc::ServerContext& context, const std::string& robot_id) const;

  RobotDirectory* const directory_;
  const absl::Duration poll_;
  WriteWatch* const write_watch_;
};

}  // namespace foray::api

#endif  // FORAY_SERVER_API_SERVICES_H_
