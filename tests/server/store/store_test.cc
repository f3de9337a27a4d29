// The SQLite store: schema migration, robots, transitions written once and kept across a
// reopen, duplicates counted and left unchanged, failed batches leave nothing, checkpoints.
#include "server/store/store.h"

#include <sqlite3.h>

#include <filesystem>
#include <string>

#include "gtest/gtest.h"

namespace foray::store {
namespace {

class StoreTest : public ::testing::Test {
 protected:
  void SetUp() override {
    dir_ = std::filesystem::temp_directory_path() /
           ("foray-store-" + std::to_string(::testing::UnitTest::GetInstance()->random_seed()) +
            "-" + ::testing::UnitTest::GetInstance()->current_test_info()->name());
    std::filesystem::remove_all(dir_);
    std::filesystem::create_directories(dir_);
    path_ = (dir_ / "foray.db").string();
  }
  void TearDown() override { std::filesystem::remove_all(dir_); }

  std::unique_ptr<Store> OpenOrDie() {
    absl::StatusOr<std::unique_ptr<Store>> store = Store::Open(path_);
    EXPECT_TRUE(store.ok()) << store.status();
    return std::move(*store);
  }

  static RobotRecord Robot(const std::string& id) {
    RobotRecord r;
    r.robot_id = id;
    r.spec = std::string("spec\0bytes", 10);
    r.token_hash = "ab12";
    r.created_at = absl::FromUnixSeconds(1700000000);
    return r;
  }

  static TransitionRecord Transition(uint64_t seq, double x) {
    TransitionRecord t;
    t.seq = seq;
    t.episode = 1 + seq / 10;
    t.step = static_cast<uint32_t>(seq % 10);
    t.state = {x, -x};
    t.action = {0.5 * x};
    t.next_state = {x + 0.1, -x - 0.1};
    t.reward = x * x;
    t.terminal = seq % 10 == 9;
    t.measured_at = absl::FromUnixMicros(1700000000000000 + seq);
    return t;
  }

  std::filesystem::path dir_;
  std::string path_;
};

TEST_F(StoreTest, NewDatabaseIsMigratedToTheCurrentSchemaInWalMode) {
  auto store = OpenOrDie();
  EXPECT_EQ(store->schema_version(), kSchemaVersion);
  store.reset();
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open(path_.c_str(), &db), SQLITE_OK);
  sqlite3_stmt* st = nullptr;
  ASSERT_EQ(sqlite3_prepare_v2(db, "PRAGMA journal_mode", -1, &st, nullptr), SQLITE_OK);
  ASSERT_EQ(sqlite3_step(st), SQLITE_ROW);
  EXPECT_STREQ(reinterpret_cast<const char*>(sqlite3_column_text(st, 0)), "wal");
  sqlite3_finalize(st);
  sqlite3_close(db);
}

TEST_F(StoreTest, NewerSchemaIsRefusedWithAClearMessage) {
  OpenOrDie().reset();
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open(path_.c_str(), &db), SQLITE_OK);
  ASSERT_EQ(sqlite3_exec(db, "PRAGMA user_version = 99", nullptr, nullptr, nullptr), SQLITE_OK);
  sqlite3_close(db);
  absl::StatusOr<std::unique_ptr<Store>> store = Store::Open(path_);
  EXPECT_EQ(store.status().code(), absl::StatusCode::kFailedPrecondition);
  EXPECT_NE(store.status().message().find("schema version 99"), std::string::npos);
}

TEST_F(StoreTest, TransitionsSurviveAReopenBitForBit) {
  {
    auto store = OpenOrDie();
    ASSERT_TRUE(store->InsertRobot(Robot("r-1")).ok());
    std::vector<TransitionRecord> batch;
    for (uint64_t s = 1; s <= 25; ++s) batch.push_back(Transition(s, 0.1 * s + 1e-12));
    absl::StatusOr<AppendResult> r = store->AppendTransitions("r-1", batch);
    ASSERT_TRUE(r.ok()) << r.status();
    EXPECT_EQ(r->accepted, 25u);
    EXPECT_EQ(r->duplicates, 0u);
    EXPECT_EQ(r->durable_seq, 25u);
  }
  auto store = OpenOrDie();
  absl::StatusOr<std::vector<TransitionRecord>> loaded = store->LoadTransitions("r-1");
  ASSERT_TRUE(loaded.ok());
  ASSERT_EQ(loaded->size(), 25u);
  for (uint64_t s = 1; s <= 25; ++s) {
    const TransitionRecord want = Transition(s, 0.1 * s + 1e-12);
    const TransitionRecord& got = (*loaded)[s - 1];
    EXPECT_EQ(got.seq, s);
    EXPECT_EQ(got.episode, want.episode);
    EXPECT_EQ(got.step, want.step);
    EXPECT_EQ(got.state, want.state);
    EXPECT_EQ(got.action, want.action);
    EXPECT_EQ(got.next_state, want.next_state);
    EXPECT_EQ(got.reward, want.reward);
    EXPECT_EQ(got.terminal, want.terminal);
    EXPECT_EQ(got.measured_at, want.measured_at);
  }
  auto summary = store->TransitionSummary("r-1");
  ASSERT_TRUE(summary.ok());
  EXPECT_EQ(summary->first, 25u);
  EXPECT_EQ(summary->second, 25u);
  EXPECT_EQ(store->LoadTransitions("r-1", 20)->size(), 5u);
}

TEST_F(StoreTest, ResentTransitionsAreCountedAsDuplicatesAndLeftUnchanged) {
  auto store = OpenOrDie();
  ASSERT_TRUE(store->InsertRobot(Robot("r-1")).ok());
  ASSERT_TRUE(store->AppendTransitions("r-1", {Transition(1, 1.0), Transition(2, 2.0)}).ok());
  absl::StatusOr<AppendResult> r =
      store->AppendTransitions("r-1", {Transition(2, 99.0), Transition(3, 3.0)});
  ASSERT_TRUE(r.ok());
  EXPECT_EQ(r->accepted, 1u);
  EXPECT_EQ(r->duplicates, 1u);
  EXPECT_EQ(r->durable_seq, 3u);
  auto loaded = store->LoadTransitions("r-1");
  ASSERT_EQ(loaded->size(), 3u);
  EXPECT_EQ((*loaded)[1].state[0], 2.0);  // the first write wins
}

TEST_F(StoreTest, BatchForAnUnknownRobotStoresNothing) {
  auto store = OpenOrDie();
  ASSERT_TRUE(store->InsertRobot(Robot("r-1")).ok());
  absl::StatusOr<AppendResult> r = store->AppendTransitions("r-404", {Transition(1, 1.0)});
  EXPECT_EQ(r.status().code(), absl::StatusCode::kNotFound);
  EXPECT_TRUE(store->LoadTransitions("r-404")->empty());
}

TEST_F(StoreTest, RobotsListUpdateAndArchive) {
  auto store = OpenOrDie();
  ASSERT_TRUE(store->InsertRobot(Robot("r-1")).ok());
  ASSERT_TRUE(store->InsertRobot(Robot("r-2")).ok());
  EXPECT_EQ(store->InsertRobot(Robot("r-1")).code(), absl::StatusCode::kAlreadyExists);
  ASSERT_TRUE(store->UpdateRobotSpec("r-2", "new spec").ok());
  ASSERT_TRUE(store->SetArchived("r-1", true).ok());
  EXPECT_EQ(store->SetArchived("r-9", true).code(), absl::StatusCode::kNotFound);
  auto robots = store->ListRobots();
  ASSERT_TRUE(robots.ok());
  ASSERT_EQ(robots->size(), 2u);
  EXPECT_EQ((*robots)[0].robot_id, "r-1");
  EXPECT_TRUE((*robots)[0].archived);
  EXPECT_EQ((*robots)[0].spec, std::string("spec\0bytes", 10));
  EXPECT_EQ((*robots)[1].spec, "new spec");
  EXPECT_EQ((*robots)[1].created_at, absl::FromUnixSeconds(1700000000));
}

TEST_F(StoreTest, CheckpointsNewestFirstAndByVersion) {
  auto store = OpenOrDie();
  ASSERT_TRUE(store->InsertRobot(Robot("r-1")).ok());
  for (uint64_t v = 1; v <= 3; ++v) {
    CheckpointRecord c;
    c.model_version = v;
    c.created_at = absl::FromUnixSeconds(1700000000 + v);
    c.report = "report " + std::to_string(v);
    c.model = std::string(100 * v, static_cast<char>(v));
    ASSERT_TRUE(store->PutCheckpoint("r-1", c).ok());
  }
  CheckpointRecord again;
  again.model_version = 2;
  EXPECT_EQ(store->PutCheckpoint("r-1", again).code(), absl::StatusCode::kAlreadyExists);
  auto list = store->ListCheckpoints("r-1");
  ASSERT_TRUE(list.ok());
  ASSERT_EQ(list->size(), 3u);
  EXPECT_EQ((*list)[0].model_version, 3u);
  EXPECT_EQ((*list)[0].size_bytes, 300u);
  EXPECT_TRUE((*list)[0].model.empty());
  auto newest = store->GetCheckpoint("r-1", 0);
  ASSERT_TRUE(newest.ok());
  EXPECT_EQ(newest->model_version, 3u);
  EXPECT_EQ(newest->model, std::string(300, '\3'));
  EXPECT_EQ(store->GetCheckpoint("r-1", 2)->report, "report 2");
  EXPECT_EQ(store->GetCheckpoint("r-1", 7).status().code(), absl::StatusCode::kNotFound);
}

TEST_F(StoreTest, ProgressRecordsKeepTheirKindAndAnUnknownKindReadsAsUnknown) {
  {
    auto store = OpenOrDie();
    ASSERT_TRUE(store->InsertRobot(Robot("r-1")).ok());
    ProgressRecord training{.robot_id = "r-1",
                            .at = absl::FromUnixSeconds(1700000001),
                            .kind = ProgressKind::kTraining,
                            .payload = "report"};
    ProgressRecord episode = training;
    episode.kind = ProgressKind::kEpisode;
    episode.payload = "summary";
    ASSERT_TRUE(store->AppendProgress(training).ok());
    ASSERT_TRUE(store->AppendProgress(episode).ok());
    ProgressRecord none = training;
    none.kind = ProgressKind::kUnknown;
    EXPECT_EQ(store->AppendProgress(none).code(), absl::StatusCode::kInvalidArgument);
  }
  // A record of a kind a newer version might write.
  sqlite3* db = nullptr;
  ASSERT_EQ(sqlite3_open(path_.c_str(), &db), SQLITE_OK);
  ASSERT_EQ(sqlite3_exec(db,
                         "INSERT INTO progress (robot_id, at_us, kind, payload) "
                         "VALUES ('r-1', 1700000002000000, 'calibration', x'00')",
                         nullptr, nullptr, nullptr),
            SQLITE_OK);
  sqlite3_close(db);
  auto store = OpenOrDie();
  auto records = store->ReadProgress(0, absl::InfinitePast(), "r-1");
  ASSERT_TRUE(records.ok()) << records.status();
  ASSERT_EQ(records->size(), 3u);
  EXPECT_EQ((*records)[0].kind, ProgressKind::kTraining);
  EXPECT_EQ((*records)[0].payload, "report");
  EXPECT_EQ((*records)[1].kind, ProgressKind::kEpisode);
  EXPECT_EQ((*records)[1].payload, "summary");
  EXPECT_EQ((*records)[2].kind, ProgressKind::kUnknown);
}

}  // namespace
}  // namespace foray::store
