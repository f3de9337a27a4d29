// Durable storage of robots, transitions, model checkpoints and progress records: one SQLite
// database in WAL mode with synchronous=FULL, so that a committed transaction survives a crash
// or power loss. Thread-safe: one connection behind a mutex; every method is one transaction.
//
//   FORAY_ASSIGN_OR_RETURN(std::unique_ptr<Store> store, Store::Open(data_dir / "foray.db"));
//   FORAY_ASSIGN_OR_RETURN(AppendResult r, store->AppendTransitions("r-1a2b", batch));
//   // every transition of `batch` is durable now; r.durable_seq is the robot's highest seq.
#ifndef FORAY_SERVER_STORE_STORE_H_
#define FORAY_SERVER_STORE_STORE_H_

#include <cstdint>
#include <memory>
#include <string>
#include <vector>

#include "absl/base/thread_annotations.h"
#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "absl/synchronization/mutex.h"
#include "absl/time/time.h"

struct sqlite3;

namespace foray::store {

// The schema version this build writes; Open migrates older databases up to it.
inline constexpr int kSchemaVersion = 1;

struct RobotRecord {
  std::string robot_id;
  std::string spec;        // serialised foray.v1.RobotSpec
  std::string token_hash;  // hex SHA-256 of the robot's bearer token
  absl::Time created_at;
  bool archived = false;
};

// One transition in robot units; vectors hold state_dim / action_dim values.
struct TransitionRecord {
  uint64_t seq = 0;
  uint64_t episode = 0;
  uint32_t step = 0;
  std::vector<double> state, action, next_state;
  double reward = 0.0;
  bool terminal = false;
  // When the robot measured next_state; InfinitePast means "when the store received it".
  absl::Time measured_at = absl::InfinitePast();
};

struct AppendResult {
  uint64_t durable_seq = 0;  // highest seq stored for the robot after the commit
  uint32_t accepted = 0;     // new transitions written
  uint32_t duplicates = 0;   // transitions whose seq was already stored (left unchanged)
};

struct CheckpointRecord {
  uint64_t model_version = 0;
  absl::Time created_at;
  std::string report;  // serialised foray.v1.TrainingReport
  std::string model;   // core/model/serialize bytes; empty in listings
  uint64_t size_bytes = 0;
};

// What a progress record holds; stored as the text "training" or "episode". A kind this
// version does not know (written by a newer one) reads as kUnknown and is skipped by readers.
enum class ProgressKind { kUnknown, kTraining, kEpisode };

// One progress record: a training report or an episode summary, as serialised wire messages.
struct ProgressRecord {
  int64_t row = 0;  // increasing with every record written
  std::string robot_id;
  absl::Time at;
  ProgressKind kind = ProgressKind::kUnknown;
  std::string payload;  // serialised foray.v1.TrainingReport (kTraining) or foray.v1.EpisodeSummary (kEpisode)
};

class Store {
 public:
  // Not copyable or movable (owns the connection).
  Store(const Store&) = delete;
  Store& operator=(const Store&) = delete;
  ~Store();

  // Opens or creates the database at `path` and migrates it to kSchemaVersion.
  // Unavailable when the file cannot be opened; FailedPrecondition when it was written by a
  // newer schema.
  // max_bytes > 0 caps the database's size: a write beyond it fails with ResourceExhausted, as
  // on a full disk, and stores nothing.
  static absl::StatusOr<std::unique_ptr<Store>> Open(const std::string& path, int64_t max_bytes = 0);

  int schema_version() const { return schema_version_; }

  // AlreadyExists when the id is taken.
  absl::Status InsertRobot(const RobotRecord& robot);
  absl::StatusOr<std::vector<RobotRecord>> ListRobots() const;
  // NotFound for an unknown id.
  absl::Status UpdateRobotSpec(const std::string& robot_id, const std::string& spec);
  absl::Status SetArchived(const std::string& robot_id, bool archived);

  // Writes the batch in one transaction; a transition whose (robot, seq) is stored already is
  // counted as a duplicate and not changed. Returns after the commit is durable. On an error
  // nothing of the batch is stored.
  absl::StatusOr<AppendResult> AppendTransitions(const std::string& robot_id,
                                                 const std::vector<TransitionRecord>& batch);
  // Every transition of the robot with seq > after_seq, in seq order.
  absl::StatusOr<std::vector<TransitionRecord>> LoadTransitions(const std::string& robot_id,
                                                                uint64_t after_seq = 0) const;
  // Highest stored seq and the number of transitions; 0 and 0 when none.
  absl::StatusOr<std::pair<uint64_t, uint64_t>> TransitionSummary(
      const std::string& robot_id) const;

  // Appends a progress record (row is assigned).
  absl::Status AppendProgress(const ProgressRecord& record);
  // Records with row > after_row and at >= since, of one robot (empty: all), in row order,
  // at most `limit`.
  absl::StatusOr<std::vector<ProgressRecord>> ReadProgress(int64_t after_row, absl::Time since,
                                                           const std::string& robot_id,
                                                           int limit = 1000) const;

  // AlreadyExists when the version is taken.
  absl::Status PutCheckpoint(const std::string& robot_id, const CheckpointRecord& checkpoint);
  // Newest first, without the model bytes.
  absl::StatusOr<std::vector<CheckpointRecord>> ListCheckpoints(const std::string& robot_id) const;
  // NotFound when the robot has no such version; version 0 means the newest.
  absl::StatusOr<CheckpointRecord> GetCheckpoint(const std::string& robot_id,
                                                 uint64_t model_version) const;

 private:
  explicit Store(sqlite3* db) : db_(db) {}
  absl::Status Migrate() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_);

  mutable absl::Mutex mu_;
  sqlite3* const db_;  // owned; closed by the destructor
  int schema_version_ = 0;
};

}  // namespace foray::store

#endif  // FORAY_SERVER_STORE_STORE_H_
