#include "server/api/directory.h"

#include <algorithm>
#include <cstdio>

#include "absl/strings/escaping.h"
#include "absl/strings/match.h"
#include "absl/strings/str_format.h"
#include "server/api/auth.h"
#include "server/api/convert.h"

namespace foray::api {

RobotDirectory::RobotDirectory(store::Store* store, std::string admin_token_hash,
                               std::string viewer_token_hash)
    : store_(store),
      admin_token_hash_(std::move(admin_token_hash)),
      viewer_token_hash_(std::move(viewer_token_hash)) {}

bool RobotDirectory::IsViewer(const grpc::ServerContext& context) const {
  if (viewer_token_hash_.empty()) return false;
  absl::StatusOr<std::string> token = BearerToken(context);
  return token.ok() && SameHash(HashToken(*token), viewer_token_hash_);
}

absl::Status RobotDirectory::LoadAll() {
  absl::StatusOr<std::vector<store::RobotRecord>> records = store_->ListRobots();
  if (!records.ok()) return records.status();
  std::map<std::string, std::shared_ptr<const RobotEntry>> loaded;
  for (const store::RobotRecord& r : *records) {
    auto entry = std::make_shared<RobotEntry>();
    entry->robot_id = r.robot_id;
    if (!entry->spec.ParseFromString(r.spec)) {
      return absl::DataLossError(absl::StrFormat("robot \"%s\": stored spec is unreadable", r.robot_id));
    }
    absl::StatusOr<robot::RobotConfig> config = ConfigFromSpec(entry->spec);
    if (!config.ok()) {
      return absl::DataLossError(absl::StrFormat("robot \"%s\": stored spec is invalid: %s",
                                                 r.robot_id, config.status().message()));
    }
    entry->token_hash = r.token_hash;
    entry->created_at = r.created_at;
    entry->archived = r.archived;
    entry->runtime = std::make_shared<robot::RobotRuntime>(r.robot_id, *std::move(config), store_);
    if (absl::Status s = entry->runtime->Load(); !s.ok()) return s;
    for (const std::string& problem : entry->runtime->load_problems()) {
      std::fprintf(stderr, "forayd: robot %s (%s): %s\n", r.robot_id.c_str(), entry->spec.name().c_str(),
                   problem.c_str());
    }
    loaded[r.robot_id] = std::move(entry);
  }
  absl::MutexLock lock(&mu_);
  robots_ = std::move(loaded);
  return absl::OkStatus();
}

absl::StatusOr<std::pair<std::shared_ptr<const RobotEntry>, std::string>> RobotDirectory::Register(
    const v1::RobotSpec& spec, const std::string& requested_id) {
  absl::StatusOr<robot::RobotConfig> config = ConfigFromSpec(spec);
  if (!config.ok()) return config.status();
  if (!requested_id.empty()) {
    const bool hex = requested_id.size() >= 10 && requested_id.size() <= 34 &&
                     absl::StartsWith(requested_id, "r-") &&
                     std::all_of(requested_id.begin() + 2, requested_id.end(),
                                 [](char c) { return (c >= '0' && c <= '9') || (c >= 'a' && c <= 'f'); });
    if (!hex) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "robot_id is \"%s\"; a chosen id is \"r-\" and 8 to 32 lowercase hex digits (or leave it "
          "empty)", absl::CHexEscape(requested_id.substr(0, 40))));
    }
  }
  const std::string token = NewToken();
  auto entry = std::make_shared<RobotEntry>();
  {
    absl::MutexLock lock(&mu_);
    for (const auto& [id, e] : robots_) {
      if (!e->archived && e->spec.name() == spec.name()) {
        return absl::AlreadyExistsError(absl::StrFormat(
            "a robot named \"%s\" is registered already (%s); archive it or choose another name",
            spec.name(), id));
      }
    }
    if (pending_names_.count(spec.name()) > 0) {
      return absl::AlreadyExistsError(absl::StrFormat(
          "a robot named \"%s\" is being registered right now; choose another name", spec.name()));
    }
    if (!requested_id.empty() && (robots_.count(requested_id) > 0 || pending_ids_.count(requested_id) > 0)) {
      return absl::AlreadyExistsError(absl::StrFormat("robot id %s is taken; choose another", requested_id));
    }
    entry->robot_id = requested_id;
    while (entry->robot_id.empty() || robots_.count(entry->robot_id) > 0 ||
           pending_ids_.count(entry->robot_id) > 0) {
      entry->robot_id = NewId("r-");
    }
    pending_names_.insert(spec.name());
    pending_ids_.insert(entry->robot_id);
  }
  entry->spec = spec;
  entry->token_hash = HashToken(token);
  entry->created_at = absl::Now();
  entry->runtime = std::make_shared<robot::RobotRuntime>(entry->robot_id, *std::move(config), store_);
  store::RobotRecord record;
  record.robot_id = entry->robot_id;
  record.spec = spec.SerializeAsString();
  record.token_hash = entry->token_hash;
  record.created_at = entry->created_at;
  const absl::Status stored = store_->InsertRobot(record);
  absl::MutexLock lock(&mu_);
  pending_names_.erase(spec.name());
  pending_ids_.erase(entry->robot_id);
  if (!stored.ok()) return stored;
  robots_[entry->robot_id] = entry;
  return std::make_pair(std::shared_ptr<const RobotEntry>(entry), token);
}

absl::StatusOr<std::shared_ptr<const RobotEntry>> RobotDirectory::UpdateSettings(
    const v1::UpdateRobotSettingsRequest& request) {
  absl::MutexLock lock(&mu_);
  auto it = robots_.find(request.robot_id());
  if (it == robots_.end()) {
    return absl::NotFoundError(absl::StrFormat("robot \"%s\" is not registered", request.robot_id()));
  }
  auto updated = std::make_shared<RobotEntry>(*it->second);
  if (request.has_planner()) *updated->spec.mutable_planner() = request.planner();
  if (request.has_objective()) *updated->spec.mutable_objective() = request.objective();
  if (request.has_training()) *updated->spec.mutable_training() = request.training();
  // The whole spec is checked again, so settings that do not fit the robot are refused.
  absl::StatusOr<robot::RobotConfig> config = ConfigFromSpec(updated->spec);
  if (!config.ok()) return config.status();
  if (absl::Status s = store_->UpdateRobotSpec(updated->robot_id, updated->spec.SerializeAsString());
      !s.ok()) {
    return s;
  }
  updated->runtime->UpdateSettings(config->planner, config->objective, config->training,
                                   config->policy);
  it->second = updated;
  return std::shared_ptr<const RobotEntry>(updated);
}

absl::StatusOr<std::shared_ptr<const RobotEntry>> RobotDirectory::Archive(const std::string& robot_id) {
  absl::MutexLock lock(&mu_);
  auto it = robots_.find(robot_id);
  if (it == robots_.end()) {
    return absl::NotFoundError(absl::StrFormat("robot \"%s\" is not registered", robot_id));
  }
  if (absl::Status s = store_->SetArchived(robot_id, true); !s.ok()) return s;
  auto updated = std::make_shared<RobotEntry>(*it->second);
  updated->archived = true;
  it->second = updated;
  return std::shared_ptr<const RobotEntry>(updated);
}

std::vector<std::shared_ptr<const RobotEntry>> RobotDirectory::List(bool include_archived) const {
  absl::MutexLock lock(&mu_);
  std::vector<std::shared_ptr<const RobotEntry>> out;
  for (const auto& [id, e] : robots_) {
    if (include_archived || !e->archived) out.push_back(e);
  }
  return out;
}

bool RobotDirectory::IsAdmin(const std::string& token_hash) const {
  return !admin_token_hash_.empty() && SameHash(token_hash, admin_token_hash_);
}

absl::Status RobotDirectory::CheckAdmin(const grpc::ServerContext& context) const {
  absl::StatusOr<std::string> token = BearerToken(context);
  if (!token.ok()) return token.status();
  const std::string hash = HashToken(*token);
  if (IsAdmin(hash)) return absl::OkStatus();
  absl::MutexLock lock(&mu_);
  for (const auto& [id, e] : robots_) {
    if (SameHash(hash, e->token_hash)) {
      return absl::PermissionDeniedError(
          "this call needs the admin token; a robot's token cannot manage the registry");
    }
  }
  return absl::UnauthenticatedError("the token is not known to this server");
}

absl::StatusOr<std::shared_ptr<const RobotEntry>> RobotDirectory::Authorize(
    const grpc::ServerContext& context, const std::string& robot_id, bool admin_ok) const {
  absl::StatusOr<std::string> token = BearerToken(context);
  if (!token.ok()) return token.status();
  const std::string hash = HashToken(*token);
  const bool admin = IsAdmin(hash);
  absl::MutexLock lock(&mu_);
  auto it = robots_.find(robot_id);
  if (it != robots_.end() && SameHash(hash, it->second->token_hash)) {
    if (it->second->archived) {
      return absl::PermissionDeniedError(
          absl::StrFormat("robot \"%s\" is archived; its token no longer works", robot_id));
    }
    return it->second;
  }
  if (admin && admin_ok) {
    if (it == robots_.end()) {
      return absl::NotFoundError(absl::StrFormat("robot \"%s\" is not registered", robot_id));
    }
    return it->second;
  }
  if (admin) {
    return absl::PermissionDeniedError(
        "this call needs the robot's own token, not the admin token");
  }
  for (const auto& [id, e] : robots_) {
    if (SameHash(hash, e->token_hash)) {
      return absl::PermissionDeniedError(absl::StrFormat(
          "this token belongs to another robot; it cannot reach robot \"%s\"", robot_id));
    }
  }
  return absl::UnauthenticatedError("the token is not known to this server");
}

v1::Robot RobotDirectory::ToWire(const RobotEntry& entry) {
  v1::Robot r;
  r.set_robot_id(entry.robot_id);
  *r.mutable_spec() = entry.spec;
  *r.mutable_created_at() = store::TimeToWire(entry.created_at);
  r.set_archived(entry.archived);
  const robot::RobotStatus status = entry.runtime->Status();
  r.set_last_seq(status.last_seq);
  r.set_transitions(status.transitions);
  r.set_model_version(status.model_version);
  return r;
}

}  // namespace foray::api
