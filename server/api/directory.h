// The robots this server knows: runtime, spec, token hash and archive flag of each, loaded
// from the store at start and changed by the registry. Also answers who may call what.
// Thread-safe: entries are immutable and replaced whole under the mutex.
#ifndef FORAY_SERVER_API_DIRECTORY_H_
#define FORAY_SERVER_API_DIRECTORY_H_

#include <map>
#include <set>
#include <memory>
#include <string>
#include <vector>

#include "absl/base/thread_annotations.h"
#include "absl/status/statusor.h"
#include "absl/synchronization/mutex.h"
#include "absl/time/time.h"
#include "foray/v1/registry.pb.h"
#include "grpcpp/server_context.h"
#include "server/robot/runtime.h"
#include "server/store/store.h"

namespace foray::api {

struct RobotEntry {
  std::string robot_id;
  v1::RobotSpec spec;
  std::string token_hash;
  absl::Time created_at;
  bool archived = false;
  // Shared by every version of the entry; lives as long as someone plans or trains with it.
  std::shared_ptr<robot::RobotRuntime> runtime;
};

class RobotDirectory {
 public:
  // `store` must outlive the directory. `admin_token_hash` is HashToken of the admin token;
  // `viewer_token_hash` that of the viewer token (empty: none), which may read progress only.
  RobotDirectory(store::Store* store, std::string admin_token_hash,
                 std::string viewer_token_hash = "");
  RobotDirectory(const RobotDirectory&) = delete;
  RobotDirectory& operator=(const RobotDirectory&) = delete;

  // Loads every robot, its transitions and its newest checkpoint.
  absl::Status LoadAll();

  // Validates and stores a new robot; returns the entry and its token (shown once).
  // `requested_id` is the client's choice of id ("r-" and 8..32 lowercase hex digits) or empty
  // for a server-chosen one. Two registrations of one name or one id at the same time: one
  // wins, the other gets ALREADY_EXISTS.
  absl::StatusOr<std::pair<std::shared_ptr<const RobotEntry>, std::string>> Register(
      const v1::RobotSpec& spec, const std::string& requested_id = "");
  absl::StatusOr<std::shared_ptr<const RobotEntry>> UpdateSettings(
      const v1::UpdateRobotSettingsRequest& request);
  absl::StatusOr<std::shared_ptr<const RobotEntry>> Archive(const std::string& robot_id);
  std::vector<std::shared_ptr<const RobotEntry>> List(bool include_archived) const;

  // Unauthenticated without a known token; PermissionDenied for a token that is not the admin's.
  absl::Status CheckAdmin(const grpc::ServerContext& context) const;
  // Whether the call carries the viewer token (read-only access to every robot's progress).
  bool IsViewer(const grpc::ServerContext& context) const;
  // The robot `robot_id` when the call carries its own token (or, with admin_ok, the admin
  // token). Unauthenticated without a known token; PermissionDenied for another robot's token
  // or an archived robot; NotFound (for the admin) when no such robot exists.
  absl::StatusOr<std::shared_ptr<const RobotEntry>> Authorize(const grpc::ServerContext& context,
                                                              const std::string& robot_id,
                                                              bool admin_ok) const;

  store::Store* store() const { return store_; }

  // The wire view of an entry, with its current figures.
  static v1::Robot ToWire(const RobotEntry& entry);

 private:
  bool IsAdmin(const std::string& token_hash) const;

  store::Store* const store_;
  const std::string admin_token_hash_;
  const std::string viewer_token_hash_;
  mutable absl::Mutex mu_;
  std::map<std::string, std::shared_ptr<const RobotEntry>> robots_ ABSL_GUARDED_BY(mu_);
  // Names and ids of registrations being stored right now (held between the check and the insert).
  std::set<std::string> pending_names_ ABSL_GUARDED_BY(mu_);
  std::set<std::string> pending_ids_ ABSL_GUARDED_BY(mu_);
};

}  // namespace foray::api

#endif  // FORAY_SERVER_API_DIRECTORY_H_
