#include "server/api/services.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <thread>

#include "absl/strings/str_format.h"
#include "server/api/convert.h"
#include "server/api/session_stream.h"
#include "server/store/records_wire.h"

namespace foray::api {
namespace {

void PlanToWire(const robot::PlanOutcome& outcome, const robot::RobotConfig& config,
                uint64_t request_id, v1::Plan* plan) {
  const plan::PlanResult& r = outcome.result;
  const int horizon = static_cast<int>(r.actions.rows());
  for (int t = 0; t < horizon; ++t) {
    v1::Plan::Step* step = plan->add_steps();
    for (int j = 0; j < r.actions.cols(); ++j) step->add_action(r.actions(t, j));
    if (!outcome.from_prior) {
      for (int k = 0; k < r.state_mean.cols(); ++k) {
        step->add_predicted_state_mean(r.state_mean(t, k));
        step->add_predicted_state_std(r.state_std(t, k));
      }
      step->set_expected_reward(r.expected_reward[t]);
      step->set_information_gain(r.information_gain[t]);
      step->set_survival(r.survival.size() > t ? r.survival[t] : 1.0);
    }
  }
  plan->set_objective(r.objective);
  plan->set_expected_return(r.expected_return);
  plan->set_information_gain(r.total_information_gain);
  plan->set_value_beyond(r.value_beyond);
  plan->set_model_version(outcome.model_version);
  plan->set_from_prior(outcome.from_prior);
  plan->set_iterations(static_cast<uint32_t>(r.iterations));
  plan->set_compute_ms(outcome.compute_ms);
  // A plan is worth executing for at most its horizon of control periods.
  *plan->mutable_valid_until() =
      store::TimeToWire(absl::Now() + absl::Seconds(config.control_period_s * horizon));
  plan->set_request_id(request_id);
  plan->set_evaluation(outcome.evaluation);
}

// Stores validated transitions (durable on return) and fills the ack.
absl::Status AppendRecords(const RobotEntry& entry, const std::vector<store::TransitionRecord>& batch,
                           v1::Ack* ack) {
  absl::StatusOr<store::AppendResult> result = entry.runtime->Append(batch);
  if (!result.ok()) return result.status();
  ack->set_durable_seq(result->durable_seq);
  ack->set_accepted(result->accepted);
  ack->set_duplicates(result->duplicates);
  return absl::OkStatus();
}

absl::Status Append(const RobotEntry& entry,
                    const google::protobuf::RepeatedPtrField<v1::Transition>& transitions,
                    v1::Ack* ack) {
  absl::StatusOr<std::vector<store::TransitionRecord>> batch =
      TransitionsFromWire(transitions, entry.runtime->config());
  if (!batch.ok()) return batch.status();
  return AppendRecords(entry, *batch, ack);
}

}  // namespace

absl::Status SessionService::AdmitTransitions(const RobotEntry& entry, size_t count) {
  if (transition_limit_.Take(entry.robot_id, static_cast<double>(count), absl::Now())) return absl::OkStatus();
  return absl::ResourceExhaustedError(absl::StrFormat(
      "robot \"%s\" sends more than %g transitions per second (forayd --robot_transitions_per_s); "
      "nothing of this batch was stored: send it again a little later",
      entry.spec.name(), transition_limit_.rate()));
}

absl::Status SessionService::Plan(const RobotEntry& entry, const v1::PlanRequest& request,
                                  v1::Plan* response) {
  const robot::RobotConfig config = entry.runtime->config();
  absl::StatusOr<robot::PlanInput> input = PlanInputFromWire(request, config, absl::Now());
  if (!input.ok()) return input.status();
  absl::StatusOr<robot::PlanOutcome> outcome = scheduler_->Plan(*entry.runtime, *std::move(input));
  if (!outcome.ok()) return outcome.status();
  PlanToWire(*outcome, config, request.request_id(), response);
  return absl::OkStatus();
}

grpc::Status RegistryService::RegisterRobot(grpc::ServerContext* context,
                                            const v1::RegisterRobotRequest* request,
                                            v1::RegisterRobotResponse* response) {
  if (absl::Status s = directory_->CheckAdmin(*context); !s.ok()) return ToGrpc(s);
  auto registered = directory_->Register(request->spec(), request->robot_id());
  if (!registered.ok()) return ToGrpc(registered.status());
  *response->mutable_robot() = RobotDirectory::ToWire(*registered->first);
  response->set_token(registered->second);
  return grpc::Status::OK;
}

grpc::Status RegistryService::GetRobot(grpc::ServerContext* context,
                                       const v1::GetRobotRequest* request, v1::Robot* response) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/true);
  if (!entry.ok()) return ToGrpc(entry.status());
  *response = RobotDirectory::ToWire(**entry);
  return grpc::Status::OK;
}

grpc::Status RegistryService::ListRobots(grpc::ServerContext* context,
                                         const v1::ListRobotsRequest* request,
                                         v1::ListRobotsResponse* response) {
  if (absl::Status s = directory_->CheckAdmin(*context); !s.ok()) return ToGrpc(s);
  for (const auto& entry : directory_->List(request->include_archived())) {
    *response->add_robots() = RobotDirectory::ToWire(*entry);
  }
  return grpc::Status::OK;
}

grpc::Status RegistryService::UpdateRobotSettings(grpc::ServerContext* context,
                                                  const v1::UpdateRobotSettingsRequest* request,
                                                  v1::Robot* response) {
  if (absl::Status s = directory_->CheckAdmin(*context); !s.ok()) return ToGrpc(s);
  auto entry = directory_->UpdateSettings(*request);
  if (!entry.ok()) return ToGrpc(entry.status());
  *response = RobotDirectory::ToWire(**entry);
  return grpc::Status::OK;
}

grpc::Status RegistryService::ArchiveRobot(grpc::ServerContext* context,
                                           const v1::ArchiveRobotRequest* request,
                                           v1::Robot* response) {
  if (absl::Status s = directory_->CheckAdmin(*context); !s.ok()) return ToGrpc(s);
  auto entry = directory_->Archive(request->robot_id());
  if (!entry.ok()) return ToGrpc(entry.status());
  *response = RobotDirectory::ToWire(**entry);
  return grpc::Status::OK;
}

grpc::Status SessionService::AppendTransitions(grpc::ServerContext* context,
                                               const v1::AppendTransitionsRequest* request,
                                               v1::Ack* response) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/false);
  if (!entry.ok()) return ToGrpc(entry.status());
  if (absl::Status s = AdmitTransitions(**entry, request->transitions_size()); !s.ok()) return ToGrpc(s);
  return ToGrpc(Append(**entry, request->transitions(), response));
}

grpc::Status SessionService::PlanActions(grpc::ServerContext* context,
                                         const v1::PlanActionsRequest* request, v1::Plan* response) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/false);
  if (!entry.ok()) return ToGrpc(entry.status());
  return ToGrpc(Plan(**entry, request->request(), response));
}

grpc::Status SessionService::Connect(
    grpc::ServerContext* context,
    grpc::ServerReaderWriter<v1::SessionServerMessage, v1::SessionClientMessage>* stream) {
  v1::SessionClientMessage first;
  if (!stream->Read(&first)) return grpc::Status::OK;  // the client left before saying hello
  if (!first.has_hello()) {
    return grpc::Status(grpc::StatusCode::INVALID_ARGUMENT,
                        "the first message of a session must be a hello");
  }
  auto authorized = directory_->Authorize(*context, first.hello().robot_id(), /*admin_ok=*/false);
  if (!authorized.ok()) return ToGrpc(authorized.status());
  const std::shared_ptr<const RobotEntry> entry = *authorized;
  const std::string what = absl::StrFormat("session of robot \"%s\" (%s)", entry->spec.name(),
                                           entry->robot_id);
  WriteWatch::Call watched(write_watch_, context, what);
  {
    v1::SessionServerMessage out;
    const robot::RobotStatus status = entry->runtime->Status();
    out.mutable_welcome()->set_last_seq(status.last_seq);
    out.mutable_welcome()->set_model_version(status.model_version);
    *out.mutable_welcome()->mutable_spec() = entry->spec;
    if (!watched.Write(stream, out)) return grpc::Status::OK;
  }
  // A reader thread queues what arrives while this thread commits: the transitions that arrived
  // during one commit go into the next as one group (one SQLite transaction, one ack).
  // 20,000 transitions: about a second of a fast robot, a few MB at most.
  Inbox inbox(/*capacity=*/20000, what);
  std::thread reader([&] {
    v1::SessionClientMessage in;
    while (stream->Read(&in)) {
      if (!inbox.Push(std::move(in))) break;
    }
    inbox.Close();
  });
  SessionCommitter committer(
      entry->runtime->config(),
      {.store = [&](const std::vector<store::TransitionRecord>& group, v1::Ack* ack) {
         absl::Status s = AdmitTransitions(*entry, group.size());
         return s.ok() ? AppendRecords(*entry, group, ack) : s;
       },
       .plan = [&](const v1::PlanRequest& request, v1::Plan* plan) { return Plan(*entry, request, plan); }},
      what);
  bool writing = true;
  auto client_reads = [&] { return writing && !context->IsCancelled(); };
  for (;;) {
    std::vector<v1::SessionClientMessage> messages = inbox.TakeAll();
    if (messages.empty()) break;
    if (committer.stopped()) continue;  // drains what the reader still hands over until the call ends
    for (const v1::SessionServerMessage& reply : committer.Answer(std::move(messages), client_reads)) {
      if (writing && !watched.Write(stream, reply)) writing = false;
    }
    // The client is gone, or the session stopped storing: end the reader's Read too.
    if (!writing || committer.stopped()) context->TryCancel();
  }
  reader.join();
  return grpc::Status::OK;
}

namespace {

absl::Status PredictRows(const RobotEntry& entry, const v1::PredictRequest& request,
                         v1::PredictResponse* response) {
  const robot::RobotConfig config = entry.runtime->config();
  const int n = request.rows_size(), sd = config.state_dim, ad = config.action_dim;
  if (n < 1 || n > 10000) {
    return absl::InvalidArgumentError(absl::StrFormat("rows has %d entries, send 1..10000", n));
  }
  std::vector<float> states(static_cast<size_t>(n) * sd), actions(static_cast<size_t>(n) * ad);
  for (int r = 0; r < n; ++r) {
    const v1::PredictRequest::Row& row = request.rows(r);
    if (row.state_size() != sd || row.action_size() != ad) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "rows[%d] has %d state and %d action values, robot \"%s\" expects %d and %d", r,
          row.state_size(), row.action_size(), config.name, sd, ad));
    }
    for (int k = 0; k < sd; ++k) states[r * sd + k] = static_cast<float>(row.state(k));
    for (int j = 0; j < ad; ++j) actions[r * ad + j] = static_cast<float>(row.action(j));
  }
  for (float v : states) {
    if (!std::isfinite(v)) return absl::InvalidArgumentError("rows: a state value is not finite");
  }
  for (float v : actions) {
    if (!std::isfinite(v)) return absl::InvalidArgumentError("rows: an action value is not finite");
  }
  explore::ObjectiveOptions objective = config.objective;  // the robot's observation noise
  v1::ObjectiveSettings settings;
  settings.set_estimator(request.estimator());
  if (absl::Status s = ApplyObjectiveSettings(settings, sd, ad, &objective); !s.ok()) return s;

  absl::StatusOr<robot::RobotRuntime::Prediction> p = entry.runtime->Predict(states, actions, n, objective);
  if (!p.ok()) return p.status();
  for (int r = 0; r < n; ++r) {
    v1::PredictResponse::Row* row = response->add_rows();
    for (int b = 0; b < p->members; ++b) {
      const size_t at = static_cast<size_t>(b) * n + r;
      v1::GaussianPrediction* next = row->add_next_state();
      for (int k = 0; k < sd; ++k) {
        next->add_mean(p->next_state_mean[at * sd + k]);
        next->add_variance(p->next_state_variance[at * sd + k]);
      }
      v1::GaussianPrediction* reward = row->add_reward();
      reward->add_mean(p->reward_mean[at]);
      reward->add_variance(p->reward_variance[at]);
      row->add_termination_probability(p->termination_probability[at]);
    }
    row->set_information_gain(p->information_gain[r]);
  }
  response->set_model_version(p->model_version);
  return absl::OkStatus();
}

}  // namespace

grpc::Status ModelsService::Predict(grpc::ServerContext* context, const v1::PredictRequest* request,
                                    v1::PredictResponse* response) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/true);
  if (!entry.ok()) return ToGrpc(entry.status());
  return ToGrpc(PredictRows(**entry, *request, response));
}

grpc::Status ModelsService::TrainNow(grpc::ServerContext* context,
                                     const v1::TrainNowRequest* request,
                                     v1::TrainNowResponse* response) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/true);
  if (!entry.ok()) return ToGrpc(entry.status());
  robot::RobotRuntime& runtime = *(*entry)->runtime;
  if (!request->wait()) {
    if (runtime.Status().transitions < 2) {
      return ToGrpc(absl::FailedPreconditionError(absl::StrFormat(
          "robot \"%s\" has %d transitions; training needs at least 2", (*entry)->spec.name(),
          runtime.Status().transitions)));
    }
    runtime.RequestTraining();
    return grpc::Status::OK;
  }
  // Bounded by the call's deadline (cancellation) and by ten minutes.
  auto model = runtime.TrainAndWait(absl::Now() + absl::Minutes(10), [context] { return context->IsCancelled(); });
  if (!model.ok()) return ToGrpc(model.status());
  *response->mutable_report() = store::TrainingToWire((*model)->training());
  return grpc::Status::OK;
}

grpc::Status ModelsService::ListCheckpoints(grpc::ServerContext* context,
                                            const v1::ListCheckpointsRequest* request,
                                            v1::ListCheckpointsResponse* response) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/true);
  if (!entry.ok()) return ToGrpc(entry.status());
  auto list = directory_->store()->ListCheckpoints(request->robot_id());
  if (!list.ok()) return ToGrpc(list.status());
  for (const store::CheckpointRecord& c : *list) {
    v1::Checkpoint* out = response->add_checkpoints();
    out->set_model_version(c.model_version);
    out->mutable_report()->ParseFromString(c.report);
    out->mutable_created_at()->set_seconds(absl::ToUnixSeconds(c.created_at));
    out->set_size_bytes(c.size_bytes);
  }
  return grpc::Status::OK;
}

grpc::Status ModelsService::RestoreCheckpoint(grpc::ServerContext* context,
                                              const v1::RestoreCheckpointRequest* request,
                                              v1::TrainingReport* response) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/true);
  if (!entry.ok()) return ToGrpc(entry.status());
  if (request->model_version() == 0) {
    return ToGrpc(absl::InvalidArgumentError("model_version is 0; name the version to restore"));
  }
  auto published = (*entry)->runtime->RestoreCheckpoint(request->model_version());
  if (!published.ok()) return ToGrpc(published.status());
  *response = store::TrainingToWire((*published)->training());
  return grpc::Status::OK;
}

grpc::Status ModelsService::ExportModel(grpc::ServerContext* context,
                                        const v1::ExportModelRequest* request,
                                        v1::EnsembleModel* response) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/true);
  if (!entry.ok()) return ToGrpc(entry.status());
  if (request->model_version() == 0) {
    auto model = (*entry)->runtime->RequirePublished();
    if (!model.ok()) return ToGrpc(model.status());
    *response = EnsembleToWire((*model)->ensemble);
    return grpc::Status::OK;
  }
  auto checkpoint = (*entry)->runtime->ReadCheckpoint(request->model_version());
  if (!checkpoint.ok()) return ToGrpc(checkpoint.status());
  *response = EnsembleToWire(checkpoint->ensemble);
  return grpc::Status::OK;
}

grpc::Status ModelsService::ImportModel(grpc::ServerContext* context,
                                        const v1::ImportModelRequest* request,
                                        v1::TrainingReport* response) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/true);
  if (!entry.ok()) return ToGrpc(entry.status());
  auto ensemble = EnsembleFromWire(request->model());
  if (!ensemble.ok()) return ToGrpc(ensemble.status());
  auto published = (*entry)->runtime->PublishModel(*std::move(ensemble), model::TrainingReport{});
  if (!published.ok()) return ToGrpc(published.status());
  *response = store::TrainingToWire((*published)->training());
  return grpc::Status::OK;
}

namespace {

v1::RobotProgress ProgressToWire(const RobotEntry& entry) {
  const robot::ProgressView p = entry.runtime->Progress();
  v1::RobotProgress out;
  out.set_robot_id(entry.robot_id);
  out.set_name(entry.spec.name());
  out.set_transitions(p.status.transitions);
  out.set_episodes(p.episodes);
  out.set_model_version(p.status.model_version);
  if (p.model) *out.mutable_last_training() = store::TrainingToWire(p.model->training());
  if (p.last_episode) {
    *out.mutable_last_episode() = store::EpisodeToWire(*p.last_episode);
  }
  for (auto [tally, wire] : {std::pair{&p.exploration, out.mutable_exploration()},
                             std::pair{&p.evaluation, out.mutable_evaluation()}}) {
    wire->set_episodes(tally->episodes);
    wire->set_successes(tally->successes);
    wire->set_terminals(tally->terminals);
    wire->set_last_return(tally->last_return);
    wire->set_recent_mean_return(tally->RecentMeanReturn());
    wire->set_recent_success_rate(tally->RecentSuccessRate());
  }
  v1::Coverage* c = out.mutable_coverage();
  for (int i : p.coverage_indices) c->add_indices(static_cast<uint32_t>(i));
  for (double v : p.coverage_lower) c->add_lower(v);
  for (double v : p.coverage_upper) c->add_upper(v);
  c->set_cells(static_cast<uint32_t>(p.coverage_cells));
  for (uint32_t n : p.coverage_counts) c->add_counts(n);
  v1::LatencySummary* l = out.mutable_plan_latency();
  l->set_plans(p.plans);
  l->set_p50_ms(p.p50_ms);
  l->set_p90_ms(p.p90_ms);
  l->set_p99_ms(p.p99_ms);
  l->set_deadline_misses(p.deadline_misses);
  out.set_queued_plans(static_cast<uint32_t>(std::max(0, p.plans_waiting)));
  out.set_queued_training(p.training_due ? 1 : 0);
  out.set_training(p.status.training);
  out.set_archived(entry.archived);
  return out;
}

}  // namespace

absl::StatusOr<std::vector<std::shared_ptr<const RobotEntry>>> MonitoringService::Visible(
    const grpc::ServerContext& context, const std::string& robot_id) const {
  if (directory_->IsViewer(context)) {  // read-only access to every robot's progress
    std::vector<std::shared_ptr<const RobotEntry>> all = directory_->List(/*include_archived=*/true);
    if (robot_id.empty()) return all;
    for (auto& entry : all) {
      if (entry->robot_id == robot_id) return std::vector<std::shared_ptr<const RobotEntry>>{entry};
    }
    return absl::NotFoundError(absl::StrFormat("robot \"%s\" is not registered", robot_id));
  }
  if (robot_id.empty()) {
    if (absl::Status s = directory_->CheckAdmin(context); !s.ok()) return s;
    return directory_->List(/*include_archived=*/true);
  }
  auto entry = directory_->Authorize(context, robot_id, /*admin_ok=*/true);
  if (!entry.ok()) return entry.status();
  return std::vector<std::shared_ptr<const RobotEntry>>{*entry};
}

grpc::Status MonitoringService::GetProgress(grpc::ServerContext* context,
                                            const v1::GetProgressRequest* request,
                                            v1::ProgressSnapshot* response) {
  auto robots = Visible(*context, request->robot_id());
  if (!robots.ok()) return ToGrpc(robots.status());
  for (const auto& entry : *robots) *response->add_robots() = ProgressToWire(*entry);
  *response->mutable_taken_at() = store::TimeToWire(absl::Now());
  return grpc::Status::OK;
}

grpc::Status MonitoringService::WatchProgress(grpc::ServerContext* context,
                                              const v1::WatchProgressRequest* request,
                                              grpc::ServerWriter<v1::ProgressEvent>* writer) {
  auto robots = Visible(*context, request->robot_id());
  if (!robots.ok()) return ToGrpc(robots.status());
  WriteWatch::Call watched(write_watch_, context, "progress watch");
  // First where every robot stands now, then the records since the requested time (history
  // from the store), then new records as they are written, until the client goes away.
  for (const auto& entry : *robots) {
    v1::ProgressEvent event;
    event.set_robot_id(entry->robot_id);
    *event.mutable_at() = store::TimeToWire(absl::Now());
    *event.mutable_snapshot() = ProgressToWire(*entry);
    if (!watched.Write(writer, event)) return grpc::Status::OK;
  }
  const absl::Time since = request->has_since() ? store::TimeFromWire(request->since()) : absl::Now();
  int64_t after_row = 0;
  while (!context->IsCancelled()) {
    auto records = directory_->store()->ReadProgress(after_row, since, request->robot_id());
    if (!records.ok()) return ToGrpc(records.status());
    for (const store::ProgressRecord& r : *records) {
      after_row = r.row;
      v1::ProgressEvent event;
      event.set_robot_id(r.robot_id);
      *event.mutable_at() = store::TimeToWire(r.at);
      if (r.kind == store::ProgressKind::kTraining) {
        event.mutable_training()->ParseFromString(r.payload);
      } else if (r.kind == store::ProgressKind::kEpisode) {
        event.mutable_episode()->ParseFromString(r.payload);
      } else {
        continue;
      }
      if (!watched.Write(writer, event)) return grpc::Status::OK;
    }
    if (records->size() < 1000) absl::SleepFor(poll_);
  }
  return grpc::Status::OK;
}

grpc::Status MonitoringService::ExportTransitions(grpc::ServerContext* context,
                                                  const v1::ExportTransitionsRequest* request,
                                                  grpc::ServerWriter<v1::TransitionBatch>* writer) {
  auto entry = directory_->Authorize(*context, request->robot_id(), /*admin_ok=*/true);
  if (!entry.ok()) return ToGrpc(entry.status());
  const uint64_t from = std::max<uint64_t>(request->from_seq(), 1);
  const uint64_t to = request->to_seq() == 0 ? UINT64_MAX : request->to_seq();
  if (to < from) {
    return ToGrpc(absl::InvalidArgumentError(absl::StrFormat(
        "to_seq %d is below from_seq %d", request->to_seq(), request->from_seq())));
  }
  auto transitions = directory_->store()->LoadTransitions(request->robot_id(), from - 1);
  if (!transitions.ok()) return ToGrpc(transitions.status());
  WriteWatch::Call watched(write_watch_, context,
                           absl::StrFormat("export of robot \"%s\"", (*entry)->spec.name()));
  v1::TransitionBatch batch;
  auto send = [&] {
    const bool ok = watched.Write(writer, batch);
    batch.Clear();
    return ok;
  };
  for (const store::TransitionRecord& t : *transitions) {
    if (t.seq > to || context->IsCancelled()) break;
    v1::Transition* out = batch.add_transitions();
    out->set_seq(t.seq);
    out->set_episode(t.episode);
    out->set_step(t.step);
    for (double v : t.state) out->add_state(v);
    for (double v : t.action) out->add_action(v);
    for (double v : t.next_state) out->add_next_state(v);
    out->set_reward(t.reward);
    out->set_terminal(t.terminal);
    *out->mutable_measured_at() = store::TimeToWire(t.measured_at);
    if (batch.transitions_size() == 1000 && !send()) return grpc::Status::OK;
  }
  if (batch.transitions_size() > 0) send();
  return grpc::Status::OK;
}

}  // namespace foray::api
