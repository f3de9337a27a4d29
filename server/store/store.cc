#include "server/store/store.h"

#include <sqlite3.h>

#include <algorithm>
#include <cstdint>
#include <cstring>
#include <utility>

#include "absl/strings/str_cat.h"
#include "absl/strings/str_format.h"

namespace foray::store {
namespace {

// Schema version 1. Vectors are little-endian float64 blobs; times are Unix microseconds.
constexpr char kSchemaV1[] = R"sql(
CREATE TABLE robots (
  robot_id    TEXT PRIMARY KEY,
  spec        BLOB NOT NULL,
  token_hash  TEXT NOT NULL,
  created_us  INTEGER NOT NULL,
  archived    INTEGER NOT NULL DEFAULT 0
);
CREATE TABLE transitions (
  robot_id    TEXT NOT NULL REFERENCES robots(robot_id),
  seq         INTEGER NOT NULL,
  episode     INTEGER NOT NULL,
  step        INTEGER NOT NULL,
  state       BLOB NOT NULL,
  action      BLOB NOT NULL,
  next_state  BLOB NOT NULL,
  reward      REAL NOT NULL,
  terminal    INTEGER NOT NULL,
  measured_us INTEGER NOT NULL,
  received_us INTEGER NOT NULL,
  PRIMARY KEY (robot_id, seq)
) WITHOUT ROWID;
CREATE TABLE checkpoints (
  robot_id      TEXT NOT NULL REFERENCES robots(robot_id),
  model_version INTEGER NOT NULL,
  created_us    INTEGER NOT NULL,
  report        BLOB NOT NULL,
  model         BLOB NOT NULL,
  PRIMARY KEY (robot_id, model_version)
);
CREATE TABLE progress (
  robot_id  TEXT NOT NULL REFERENCES robots(robot_id),
  at_us     INTEGER NOT NULL,
  kind      TEXT NOT NULL,
  payload   BLOB NOT NULL
);
CREATE INDEX progress_by_robot_time ON progress (robot_id, at_us);
)sql";

// A write that found no room: nothing of it is stored; the caller should not retry at once.
absl::Status FullError(absl::string_view what) {
  return absl::ResourceExhaustedError(absl::StrCat(
      what, " (no space left on the data directory's disk, or the size limit --max_db_mb reached); "
            "nothing of this write was stored"));
}

// A write the disk refused (an I/O error, or a file system that turned read-only after a disk
// error): the transaction is rolled back, so nothing of it is stored.
absl::Status DiskError(sqlite3* db, absl::string_view what) {
  const int os_error = sqlite3_system_errno(db);
  return absl::UnavailableError(absl::StrCat(
      what, os_error != 0 ? absl::StrCat(" (", std::strerror(os_error), ")") : std::string(),
      ": the disk of the data directory failed a write or turned read-only; nothing of this "
      "write was stored"));
}

// What a failed SQLite call on `db` returned, as a status naming `what` (which starts with
// "store: ").
absl::Status ErrorOf(sqlite3* db, int code, const std::string& what) {
  switch (code & 0xff) {
    case SQLITE_FULL: return FullError(what);
    case SQLITE_IOERR:
    case SQLITE_READONLY:
    case SQLITE_CANTOPEN: return DiskError(db, what);
    default: return absl::UnavailableError(what);
  }
}

absl::Status SqlError(sqlite3* db, absl::string_view what) {
  return ErrorOf(db, sqlite3_extended_errcode(db), absl::StrCat("store: ", what, ": ", sqlite3_errmsg(db)));
}

// A prepared statement, finalised on destruction.
class Statement {
 public:
  Statement(sqlite3* db, const char* sql) {
    ok_ = sqlite3_prepare_v2(db, sql, -1, &stmt_, nullptr) == SQLITE_OK;
  }
  ~Statement() { sqlite3_finalize(stmt_); }
  Statement(const Statement&) = delete;
  Statement& operator=(const Statement&) = delete;

  bool ok() const { return ok_; }
  void Bind(int i, int64_t v) { sqlite3_bind_int64(stmt_, i, v); }
  void Bind(int i, double v) { sqlite3_bind_double(stmt_, i, v); }
  void BindText(int i, const std::string& v) {
    sqlite3_bind_text(stmt_, i, v.data(), static_cast<int>(v.size()), SQLITE_TRANSIENT);
  }
  void BindBlob(int i, const std::string& v) {
    sqlite3_bind_blob(stmt_, i, v.data(), static_cast<int>(v.size()), SQLITE_TRANSIENT);
  }
  // SQLITE_ROW, SQLITE_DONE or an error code.
  int Step() { return sqlite3_step(stmt_); }
  void Reset() {
    sqlite3_reset(stmt_);
    sqlite3_clear_bindings(stmt_);
  }
  int64_t Int(int col) const { return sqlite3_column_int64(stmt_, col); }
  double Double(int col) const { return sqlite3_column_double(stmt_, col); }
  std::string Blob(int col) const {
    const void* p = sqlite3_column_blob(stmt_, col);
    return std::string(static_cast<const char*>(p), sqlite3_column_bytes(stmt_, col));
  }
  std::string Text(int col) const {
    const unsigned char* p = sqlite3_column_text(stmt_, col);
    return p == nullptr ? std::string() : std::string(reinterpret_cast<const char*>(p));
  }

 private:
  sqlite3_stmt* stmt_ = nullptr;
  bool ok_ = false;
};

absl::Status Exec(sqlite3* db, const char* sql) {
  char* error = nullptr;
  const int code = sqlite3_exec(db, sql, nullptr, nullptr, &error);
  if (code != SQLITE_OK) {
    const std::string what = absl::StrCat("store: ", error != nullptr ? error : "error");
    sqlite3_free(error);
    return ErrorOf(db, code, what);
  }
  return absl::OkStatus();
}

// BEGIN IMMEDIATE ... COMMIT, rolled back unless committed.
class Transaction {
 public:
  explicit Transaction(sqlite3* db) : db_(db) { status_ = Exec(db, "BEGIN IMMEDIATE"); }
  ~Transaction() {
    if (status_.ok() && !committed_) Exec(db_, "ROLLBACK").IgnoreError();
  }
  const absl::Status& status() const { return status_; }
  absl::Status Commit() {
    absl::Status s = Exec(db_, "COMMIT");
    committed_ = s.ok();
    return s;
  }

 private:
  sqlite3* db_;
  absl::Status status_;
  bool committed_ = false;
};

std::string PackDoubles(const std::vector<double>& v) {
  std::string bytes(v.size() * sizeof(double), '\0');
  if (!v.empty()) std::memcpy(bytes.data(), v.data(), bytes.size());
  return bytes;
}

std::vector<double> UnpackDoubles(const std::string& bytes) {
  std::vector<double> v(bytes.size() / sizeof(double));
  if (!v.empty()) std::memcpy(v.data(), bytes.data(), v.size() * sizeof(double));
  return v;
}

int64_t Micros(absl::Time t) { return absl::ToUnixMicros(t); }

}  // namespace

Store::~Store() { sqlite3_close(db_); }

absl::StatusOr<std::unique_ptr<Store>> Store::Open(const std::string& path, int64_t max_bytes) {
  sqlite3* db = nullptr;
  if (sqlite3_open_v2(path.c_str(), &db, SQLITE_OPEN_READWRITE | SQLITE_OPEN_CREATE | SQLITE_OPEN_NOMUTEX,
                      nullptr) != SQLITE_OK) {
    absl::Status status = absl::UnavailableError(absl::StrFormat(
        "store: cannot open database \"%s\": %s", path, db != nullptr ? sqlite3_errmsg(db) : "out of memory"));
    sqlite3_close(db);
    return status;
  }
  std::unique_ptr<Store> store(new Store(db));
  sqlite3_busy_timeout(db, 5000);
  absl::MutexLock lock(&store->mu_);
  for (const char* pragma : {"PRAGMA journal_mode=WAL", "PRAGMA synchronous=FULL",
                             "PRAGMA foreign_keys=ON"}) {
    if (absl::Status s = Exec(db, pragma); !s.ok()) return s;
  }
  if (absl::Status s = store->Migrate(); !s.ok()) return s;
  if (max_bytes > 0) {
    Statement size(db, "PRAGMA page_size");
    if (!size.ok() || size.Step() != SQLITE_ROW) return SqlError(db, "reading the page size");
    const int64_t pages = std::max<int64_t>(1, max_bytes / size.Int(0));
    if (absl::Status s = Exec(db, absl::StrCat("PRAGMA max_page_count = ", pages).c_str()); !s.ok()) return s;
  }
  return store;
}

absl::Status Store::Migrate() {
  Statement get(db_, "PRAGMA user_version");
  if (!get.ok() || get.Step() != SQLITE_ROW) return SqlError(db_, "reading the schema version");
  int version = static_cast<int>(get.Int(0));
  if (version > kSchemaVersion) {
    return absl::FailedPreconditionError(absl::StrFormat(
        "store: the database has schema version %d, newer than this forayd's %d; use a newer "
        "forayd or another data directory",
        version, kSchemaVersion));
  }
  // One step per version; each runs in its own transaction with the version bump.
  while (version < kSchemaVersion) {
    Transaction tx(db_);
    if (!tx.status().ok()) return tx.status();
    if (version == 0) {
      if (absl::Status s = Exec(db_, kSchemaV1); !s.ok()) return s;
    }
    ++version;
    if (absl::Status s = Exec(db_, absl::StrCat("PRAGMA user_version = ", version).c_str()); !s.ok()) {
      return s;
    }
    if (absl::Status s = tx.Commit(); !s.ok()) return s;
  }
  schema_version_ = version;
  return absl::OkStatus();
}

absl::Status Store::InsertRobot(const RobotRecord& robot) {
  absl::MutexLock lock(&mu_);
  Statement st(db_,
               "INSERT INTO robots (robot_id, spec, token_hash, created_us, archived) "
               "VALUES (?, ?, ?, ?, ?)");
  if (!st.ok()) return SqlError(db_, "preparing a robot insert");
  st.BindText(1, robot.robot_id);
  st.BindBlob(2, robot.spec);
  st.BindText(3, robot.token_hash);
  st.Bind(4, Micros(robot.created_at));
  st.Bind(5, static_cast<int64_t>(robot.archived));
  const int rc = st.Step();
  if (rc == SQLITE_CONSTRAINT) {
    return absl::AlreadyExistsError(absl::StrFormat("robot \"%s\" exists already", robot.robot_id));
  }
  if (rc != SQLITE_DONE) return SqlError(db_, "inserting a robot");
  return absl::OkStatus();
}

absl::StatusOr<std::vector<RobotRecord>> Store::ListRobots() const {
  absl::MutexLock lock(&mu_);
  Statement st(db_,
               "SELECT robot_id, spec, token_hash, created_us, archived FROM robots "
               "ORDER BY created_us, robot_id");
  if (!st.ok()) return SqlError(db_, "preparing the robot list");
  std::vector<RobotRecord> robots;
  int rc;
  while ((rc = st.Step()) == SQLITE_ROW) {
    RobotRecord r;
    r.robot_id = st.Text(0);
    r.spec = st.Blob(1);
    r.token_hash = st.Text(2);
    r.created_at = absl::FromUnixMicros(st.Int(3));
    r.archived = st.Int(4) != 0;
    robots.push_back(std::move(r));
  }
  if (rc != SQLITE_DONE) return SqlError(db_, "listing robots");
  return robots;
}

absl::Status Store::UpdateRobotSpec(const std::string& robot_id, const std::string& spec) {
  absl::MutexLock lock(&mu_);
  Statement st(db_, "UPDATE robots SET spec = ? WHERE robot_id = ?");
  if (!st.ok()) return SqlError(db_, "preparing a robot update");
  st.BindBlob(1, spec);
  st.BindText(2, robot_id);
  if (st.Step() != SQLITE_DONE) return SqlError(db_, "updating a robot");
  if (sqlite3_changes(db_) == 0) {
    return absl::NotFoundError(absl::StrFormat("robot \"%s\" is not registered", robot_id));
  }
  return absl::OkStatus();
}

absl::Status Store::SetArchived(const std::string& robot_id, bool archived) {
  absl::MutexLock lock(&mu_);
  Statement st(db_, "UPDATE robots SET archived = ? WHERE robot_id = ?");
  if (!st.ok()) return SqlError(db_, "preparing a robot update");
  st.Bind(1, static_cast<int64_t>(archived));
  st.BindText(2, robot_id);
  if (st.Step() != SQLITE_DONE) return SqlError(db_, "archiving a robot");
  if (sqlite3_changes(db_) == 0) {
    return absl::NotFoundError(absl::StrFormat("robot \"%s\" is not registered", robot_id));
  }
  return absl::OkStatus();
}

absl::StatusOr<AppendResult> Store::AppendTransitions(const std::string& robot_id,
                                                      const std::vector<TransitionRecord>& batch) {
  absl::MutexLock lock(&mu_);
  Transaction tx(db_);
  if (!tx.status().ok()) return tx.status();
  Statement insert(db_,
                   "INSERT OR IGNORE INTO transitions (robot_id, seq, episode, step, state, action, "
                   "next_state, reward, terminal, measured_us, received_us) "
                   "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)");
  if (!insert.ok()) return SqlError(db_, "preparing a transition insert");
  AppendResult result;
  const int64_t now = Micros(absl::Now());
  for (const TransitionRecord& t : batch) {
    insert.BindText(1, robot_id);
    insert.Bind(2, static_cast<int64_t>(t.seq));
    insert.Bind(3, static_cast<int64_t>(t.episode));
    insert.Bind(4, static_cast<int64_t>(t.step));
    insert.BindBlob(5, PackDoubles(t.state));
    insert.BindBlob(6, PackDoubles(t.action));
    insert.BindBlob(7, PackDoubles(t.next_state));
    insert.Bind(8, t.reward);
    insert.Bind(9, static_cast<int64_t>(t.terminal));
    insert.Bind(10, t.measured_at == absl::InfinitePast() ? now : Micros(t.measured_at));
    insert.Bind(11, now);
    const int rc = insert.Step();
    if (rc == SQLITE_CONSTRAINT) {
      return absl::NotFoundError(absl::StrFormat("robot \"%s\" is not registered", robot_id));
    }
    if (rc != SQLITE_DONE) return SqlError(db_, "inserting a transition");
    if (sqlite3_changes(db_) > 0) {
      ++result.accepted;
    } else {
      ++result.duplicates;
    }
    insert.Reset();
  }
  Statement top(db_, "SELECT COALESCE(MAX(seq), 0) FROM transitions WHERE robot_id = ?");
  top.BindText(1, robot_id);
  if (!top.ok() || top.Step() != SQLITE_ROW) return SqlError(db_, "reading the last seq");
  result.durable_seq = static_cast<uint64_t>(top.Int(0));
  if (absl::Status s = tx.Commit(); !s.ok()) return s;
  return result;
}

absl::StatusOr<std::vector<TransitionRecord>> Store::LoadTransitions(const std::string& robot_id,
                                                                     uint64_t after_seq) const {
  absl::MutexLock lock(&mu_);
  Statement st(db_,
               "SELECT seq, episode, step, state, action, next_state, reward, terminal, "
               "measured_us FROM transitions WHERE robot_id = ? AND seq > ? ORDER BY seq");
  if (!st.ok()) return SqlError(db_, "preparing a transition load");
  st.BindText(1, robot_id);
  st.Bind(2, static_cast<int64_t>(after_seq));
  std::vector<TransitionRecord> out;
  int rc;
  while ((rc = st.Step()) == SQLITE_ROW) {
    TransitionRecord t;
    t.seq = static_cast<uint64_t>(st.Int(0));
    t.episode = static_cast<uint64_t>(st.Int(1));
    t.step = static_cast<uint32_t>(st.Int(2));
    t.state = UnpackDoubles(st.Blob(3));
    t.action = UnpackDoubles(st.Blob(4));
    t.next_state = UnpackDoubles(st.Blob(5));
    t.reward = st.Double(6);
    t.terminal = st.Int(7) != 0;
    t.measured_at = absl::FromUnixMicros(st.Int(8));
    out.push_back(std::move(t));
  }
  if (rc != SQLITE_DONE) return SqlError(db_, "loading transitions");
  return out;
}

absl::StatusOr<std::pair<uint64_t, uint64_t>> Store::TransitionSummary(
    const std::string& robot_id) const {
  absl::MutexLock lock(&mu_);
  Statement st(db_, "SELECT COALESCE(MAX(seq), 0), COUNT(*) FROM transitions WHERE robot_id = ?");
  if (!st.ok()) return SqlError(db_, "preparing a transition summary");
  st.BindText(1, robot_id);
  if (st.Step() != SQLITE_ROW) return SqlError(db_, "summarising transitions");
  return std::make_pair(static_cast<uint64_t>(st.Int(0)), static_cast<uint64_t>(st.Int(1)));
}

namespace {

constexpr char kTrainingText[] = "training", kEpisodeText[] = "episode";

}  // namespace

absl::Status Store::AppendProgress(const ProgressRecord& record) {
  if (record.kind == ProgressKind::kUnknown) {
    return absl::InvalidArgumentError("a progress record needs a kind (training or episode)");
  }
  absl::MutexLock lock(&mu_);
  Statement st(db_, "INSERT INTO progress (robot_id, at_us, kind, payload) VALUES (?, ?, ?, ?)");
  if (!st.ok()) return SqlError(db_, "preparing a progress insert");
  st.BindText(1, record.robot_id);
  st.Bind(2, Micros(record.at));
  st.BindText(3, record.kind == ProgressKind::kTraining ? kTrainingText : kEpisodeText);
  st.BindBlob(4, record.payload);
  if (st.Step() != SQLITE_DONE) return SqlError(db_, "writing a progress record");
  return absl::OkStatus();
}

absl::StatusOr<std::vector<ProgressRecord>> Store::ReadProgress(int64_t after_row, absl::Time since,
                                                                const std::string& robot_id,
                                                                int limit) const {
  absl::MutexLock lock(&mu_);
  Statement st(db_,
               "SELECT rowid, robot_id, at_us, kind, payload FROM progress WHERE rowid > ? AND "
               "at_us >= ? AND (? = '' OR robot_id = ?) ORDER BY rowid LIMIT ?");
  if (!st.ok()) return SqlError(db_, "preparing a progress read");
  st.Bind(1, after_row);
  st.Bind(2, since == absl::InfinitePast() ? INT64_MIN : Micros(since));
  st.BindText(3, robot_id);
  st.BindText(4, robot_id);
  st.Bind(5, static_cast<int64_t>(limit));
  std::vector<ProgressRecord> out;
  int rc;
  while ((rc = st.Step()) == SQLITE_ROW) {
    ProgressRecord r;
    r.row = st.Int(0);
    r.robot_id = st.Text(1);
    r.at = absl::FromUnixMicros(st.Int(2));
    const std::string kind = st.Text(3);
    r.kind = kind == kTrainingText ? ProgressKind::kTraining
             : kind == kEpisodeText ? ProgressKind::kEpisode
                                    : ProgressKind::kUnknown;
    r.payload = st.Blob(4);
    out.push_back(std::move(r));
  }
  if (rc != SQLITE_DONE) return SqlError(db_, "reading progress");
  return out;
}

absl::Status Store::PutCheckpoint(const std::string& robot_id, const CheckpointRecord& c) {
  absl::MutexLock lock(&mu_);
  Statement st(db_,
               "INSERT INTO checkpoints (robot_id, model_version, created_us, report, model) "
               "VALUES (?, ?, ?, ?, ?)");
  if (!st.ok()) return SqlError(db_, "preparing a checkpoint insert");
  st.BindText(1, robot_id);
  st.Bind(2, static_cast<int64_t>(c.model_version));
  st.Bind(3, Micros(c.created_at));
  st.BindBlob(4, c.report);
  st.BindBlob(5, c.model);
  const int rc = st.Step();
  if (rc == SQLITE_CONSTRAINT) {
    return absl::AlreadyExistsError(absl::StrFormat(
        "robot \"%s\" has a checkpoint of model version %d already (or is not registered)",
        robot_id, c.model_version));
  }
  if (rc != SQLITE_DONE) return SqlError(db_, "writing a checkpoint");
  return absl::OkStatus();
}

absl::StatusOr<std::vector<CheckpointRecord>> Store::ListCheckpoints(
    const std::string& robot_id) const {
  absl::MutexLock lock(&mu_);
  Statement st(db_,
               "SELECT model_version, created_us, report, LENGTH(model) FROM checkpoints "
               "WHERE robot_id = ? ORDER BY model_version DESC");
  if (!st.ok()) return SqlError(db_, "preparing the checkpoint list");
  st.BindText(1, robot_id);
  std::vector<CheckpointRecord> out;
  int rc;
  while ((rc = st.Step()) == SQLITE_ROW) {
    CheckpointRecord c;
    c.model_version = static_cast<uint64_t>(st.Int(0));
    c.created_at = absl::FromUnixMicros(st.Int(1));
    c.report = st.Blob(2);
    c.size_bytes = static_cast<uint64_t>(st.Int(3));
    out.push_back(std::move(c));
  }
  if (rc != SQLITE_DONE) return SqlError(db_, "listing checkpoints");
  return out;
}

absl::StatusOr<CheckpointRecord> Store::GetCheckpoint(const std::string& robot_id,
                                                      uint64_t model_version) const {
  absl::MutexLock lock(&mu_);
  Statement st(db_, model_version == 0
                        ? "SELECT model_version, created_us, report, model FROM checkpoints "
                          "WHERE robot_id = ? ORDER BY model_version DESC LIMIT 1"
                        : "SELECT model_version, created_us, report, model FROM checkpoints "
                          "WHERE robot_id = ? AND model_version = ?");
  if (!st.ok()) return SqlError(db_, "preparing a checkpoint read");
  st.BindText(1, robot_id);
  if (model_version != 0) st.Bind(2, static_cast<int64_t>(model_version));
  const int rc = st.Step();
  if (rc == SQLITE_DONE) {
    return absl::NotFoundError(model_version == 0
                                   ? absl::StrFormat("robot \"%s\" has no checkpoint", robot_id)
                                   : absl::StrFormat("robot \"%s\" has no checkpoint of model "
                                                     "version %d",
                                                     robot_id, model_version));
  }
  if (rc != SQLITE_ROW) return SqlError(db_, "reading a checkpoint");
  CheckpointRecord c;
  c.model_version = static_cast<uint64_t>(st.Int(0));
  c.created_at = absl::FromUnixMicros(st.Int(1));
  c.report = st.Blob(2);
  c.model = st.Blob(3);
  c.size_bytes = c.model.size();
  return c;
}

}  // namespace foray::store
