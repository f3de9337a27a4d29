// forayd: the Foray planning server.
//
// Serves the foray.v1 gRPC services (registry, robot sessions, models, monitoring), standard gRPC health checking and server
// reflection, trains each robot's ensemble in the background, and stops cleanly on SIGINT or
// SIGTERM: no new calls, in-flight calls finish within the grace period, the trainer finishes
// its round, the database closes.

#include <sys/stat.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <csignal>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <memory>
#include <sstream>
#include <string>
#include <system_error>
#include <thread>

#include "absl/flags/flag.h"
#include "absl/flags/parse.h"
#include "absl/flags/usage.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/strip.h"
#include "absl/time/clock.h"
#include "absl/time/time.h"
#include "core/model/simd_kernels.h"
#include "foray/v1/models.grpc.pb.h"
#include "foray/v1/monitoring.grpc.pb.h"
#include "foray/v1/registry.grpc.pb.h"
#include "foray/v1/session.grpc.pb.h"
#include "grpcpp/ext/proto_server_reflection_plugin.h"
#include "grpcpp/health_check_service_interface.h"
#include "grpcpp/server.h"
#include "grpcpp/server_builder.h"
#include "grpcpp/security/server_credentials.h"
#include "server/api/auth.h"
#include "server/api/directory.h"
#include "server/api/services.h"
#include "server/sched/helper_pool.h"
#include "server/sched/training_loop.h"
#include "server/web/web_server.h"
#include "server/store/store.h"

ABSL_FLAG(std::string, listen, "127.0.0.1:50151",
          "gRPC listen address, host:port. Use 0.0.0.0:PORT to accept robots on the lab network.");
ABSL_FLAG(std::string, data_dir, "./foray-data",
          "Directory for the SQLite database and checkpoints; created if missing.");
ABSL_FLAG(int, http_port, 0,
          "Port of the HTTP side (/metrics and /api/robots); 0: no HTTP server.");
ABSL_FLAG(std::string, http_host, "127.0.0.1",
          "Address the HTTP side listens on; 0.0.0.0 to reach it from other machines.");
ABSL_FLAG(std::string, viewer_token_file, "",
          "File with a viewer token that every HTTP request must carry; empty: none needed.");
ABSL_FLAG(std::string, admin_token_file, "",
          "File holding the admin token (first line). Empty: DATA_DIR/admin-token, created with "
          "a fresh random token (mode 0600) when missing.");
ABSL_FLAG(std::string, tls_cert, "",
          "PEM certificate chain of the server; with --tls_key, gRPC is served over TLS only.");
ABSL_FLAG(std::string, tls_key, "", "PEM private key matching --tls_cert.");
ABSL_FLAG(int, plan_threads, 0,
          "Plans computed at once (each on its own core, idle cores are lent to running plans); "
          "0: one per core of this machine.");
ABSL_FLAG(int, plan_queue, 0,
          "Plan requests that may wait for a free core beyond those; more are refused with "
          "RESOURCE_EXHAUSTED. 0: 4 per plan thread.");
ABSL_FLAG(int64_t, max_db_mb, 0,
          "Largest size of the database, MiB; beyond it writes are refused (RESOURCE_EXHAUSTED) as on "
          "a full disk, and reads go on. 0: no limit but the disk's.");
ABSL_FLAG(double, robot_plans_per_s, 0,
          "Plans per second one robot may ask for on average (bursts of two seconds' worth); more "
          "are refused with RESOURCE_EXHAUSTED. 0: no limit.");
ABSL_FLAG(double, robot_transitions_per_s, 0,
          "Transitions per second one robot may send on average (bursts of two seconds' worth); a "
          "batch beyond it is refused whole with RESOURCE_EXHAUSTED. 0: no limit.");
ABSL_FLAG(int, max_message_mb, 16,
          "Largest gRPC message accepted, MiB (10,000 transitions of a 14-D robot are about 3 MiB).");
ABSL_FLAG(double, stalled_write_timeout_s, 120.0,
          "End a session, progress watch or export whose client has not read what the server "
          "sends for this many seconds (flow control holds the write); it frees the handler "
          "thread. 0: never.");
ABSL_FLAG(std::string, simd_target, "best",
          "Highest SIMD target the model's kernels may use: best (the widest this CPU has) or one "
          "of AVX3 (AVX-512), AVX2, SSE4, SSSE3, SCALAR (x86-64), NEON (ARM64).");
ABSL_FLAG(double, shutdown_grace_s, 5.0,
          "Seconds in-flight calls get to finish after SIGINT/SIGTERM before they are cancelled.");

namespace {

constexpr char kCaution[] =
    "Foray plans robot motions but is not a safety system: keep emergency stops and\n"
    "safety-rated limits in place and follow your lab's risk assessment and local rules.";

bool ReadFile(const std::string& path, std::string* contents) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return false;
  std::ostringstream buffer;
  buffer << in.rdbuf();
  *contents = buffer.str();
  return true;
}

// TLS when a certificate and key are configured, plaintext otherwise; nullptr on a bad setup.
std::shared_ptr<grpc::ServerCredentials> Credentials(bool* tls) {
  const std::string cert_path = absl::GetFlag(FLAGS_tls_cert);
  const std::string key_path = absl::GetFlag(FLAGS_tls_key);
  *tls = false;
  if (cert_path.empty() && key_path.empty()) return grpc::InsecureServerCredentials();
  if (cert_path.empty() || key_path.empty()) {
    std::fprintf(stderr, "forayd: TLS needs both --tls_cert and --tls_key\n");
    return nullptr;
  }
  grpc::SslServerCredentialsOptions::PemKeyCertPair pair;
  if (!ReadFile(cert_path, &pair.cert_chain) || !ReadFile(key_path, &pair.private_key)) {
    std::fprintf(stderr, "forayd: cannot read \"%s\" or \"%s\"\n", cert_path.c_str(),
                 key_path.c_str());
    return nullptr;
  }
  grpc::SslServerCredentialsOptions options;
  options.pem_key_cert_pairs.push_back(std::move(pair));
  *tls = true;
  return grpc::SslServerCredentials(options);
}

// Reads a token (`what`: "admin" or "viewer") from the first line of `path`, or (with create)
// makes the file with a fresh token when it is missing.
bool LoadTokenFile(const char* what, const std::filesystem::path& path, bool create, std::string* token) {
  std::ifstream in(path);
  if (in) {
    std::getline(in, *token);
    *token = std::string(absl::StripAsciiWhitespace(*token));
    if (token->empty()) {
      std::fprintf(stderr, "forayd: the %s token file \"%s\" is empty\n", what, path.c_str());
      return false;
    }
    return true;
  }
  if (!create) {
    std::fprintf(stderr, "forayd: cannot read the %s token file \"%s\"\n", what, path.c_str());
    return false;
  }
  *token = foray::api::NewToken();
  const mode_t old_mask = ::umask(077);
  std::ofstream out(path);
  out << *token << "\n";
  out.close();
  ::umask(old_mask);
  if (!out) {
    std::fprintf(stderr, "forayd: cannot write the %s token file \"%s\"\n", what, path.c_str());
    return false;
  }
  std::fprintf(stderr, "forayd: created a new admin token in %s\n", path.c_str());
  return true;
}

}  // namespace

int main(int argc, char** argv) {
  absl::SetProgramUsageMessage(
      absl::StrCat("Foray planning server.\n\n", kCaution, "\n\nUsage: forayd [flags]"));
  absl::ParseCommandLine(argc, argv);

  // Block the stop signals in every thread; one thread below waits for them synchronously.
  sigset_t stop_signals;
  sigemptyset(&stop_signals);
  sigaddset(&stop_signals, SIGINT);
  sigaddset(&stop_signals, SIGTERM);
  pthread_sigmask(SIG_BLOCK, &stop_signals, nullptr);

  if (absl::Status s = foray::model::simd::LimitTarget(absl::GetFlag(FLAGS_simd_target)); !s.ok()) {
    std::fprintf(stderr, "forayd: --simd_target: %s\n", std::string(s.message()).c_str());
    return 2;
  }
  std::fprintf(stderr, "forayd: model kernels run on the %s SIMD target\n",
               foray::model::simd::TargetName());

  const std::filesystem::path data_dir = absl::GetFlag(FLAGS_data_dir);
  std::error_code ec;
  std::filesystem::create_directories(data_dir, ec);
  if (ec) {
    std::fprintf(stderr, "forayd: cannot create data directory \"%s\": %s\n",
                 data_dir.c_str(), ec.message().c_str());
    return 2;
  }
  // The database, its journal and the checkpoints are written here; say so plainly when that
  // cannot be (a read-only mount, wrong owner) instead of SQLite's "unable to open database file".
  if (::access(data_dir.c_str(), W_OK | X_OK) != 0) {
    std::fprintf(stderr, "forayd: the data directory \"%s\" is not writable (%s); forayd stores its "
                 "database there: give it a writable directory (--data_dir)\n",
                 data_dir.c_str(), std::strerror(errno));
    return 2;
  }

  std::string admin_token;
  const std::string token_flag = absl::GetFlag(FLAGS_admin_token_file);
  if (!LoadTokenFile("admin", token_flag.empty() ? data_dir / "admin-token" : std::filesystem::path(token_flag),
                     token_flag.empty(), &admin_token)) {
    return 2;
  }

  std::string viewer_hash;
  if (const std::string viewer_file = absl::GetFlag(FLAGS_viewer_token_file); !viewer_file.empty()) {
    std::string viewer;
    if (!LoadTokenFile("viewer", viewer_file, /*create=*/false, &viewer)) return 2;
    viewer_hash = foray::api::HashToken(viewer);
  }

  absl::StatusOr<std::unique_ptr<foray::store::Store>> store =
      foray::store::Store::Open((data_dir / "foray.db").string(), absl::GetFlag(FLAGS_max_db_mb) * 1024 * 1024);
  if (!store.ok()) {
    std::fprintf(stderr, "forayd: %s\n", std::string(store.status().message()).c_str());
    return 2;
  }
  foray::api::RobotDirectory directory(store->get(), foray::api::HashToken(admin_token), viewer_hash);
  if (absl::Status s = directory.LoadAll(); !s.ok()) {
    std::fprintf(stderr, "forayd: loading the robots failed: %s\n", std::string(s.message()).c_str());
    return 2;
  }
  // One plan per core computes at a time; a few more may wait for a core.
  const int plan_threads = absl::GetFlag(FLAGS_plan_threads), plan_queue = absl::GetFlag(FLAGS_plan_queue);
  const int max_message_mb = absl::GetFlag(FLAGS_max_message_mb);
  if (plan_threads < 0 || plan_threads > 1024 || plan_queue < 0 || max_message_mb < 1 || max_message_mb > 1024) {
    std::fprintf(stderr,
                 "forayd: --plan_threads=%d (0..1024), --plan_queue=%d (>= 0), --max_message_mb=%d (1..1024): "
                 "out of range\n", plan_threads, plan_queue, max_message_mb);
    return 2;
  }
  const int cores = plan_threads > 0 ? plan_threads
                                     : static_cast<int>(std::max(1u, std::thread::hardware_concurrency()));
  foray::sched::PlanGate gate(cores, /*max_waiting=*/plan_queue > 0 ? plan_queue : 4 * cores);
  // Threads that join a plan on the cores the gate lends it (one per core beyond the first),
  // and a training step while no plan computes.
  foray::sched::HelperPool helpers(gate.slots() - 1);
  foray::sched::TrainingLoop trainer([&directory] {
    std::vector<std::shared_ptr<foray::robot::RobotRuntime>> runtimes;
    for (const auto& entry : directory.List(/*include_archived=*/false)) {
      runtimes.push_back(entry->runtime);
    }
    return runtimes;
  }, &gate, &helpers);

  grpc::EnableDefaultHealthCheckService(true);
  grpc::reflection::InitProtoReflectionServerBuilderPlugin();

  foray::api::RegistryService registry(&directory);
  const double plans_per_s = absl::GetFlag(FLAGS_robot_plans_per_s);
  const double transitions_per_s = absl::GetFlag(FLAGS_robot_transitions_per_s);
  if (!(plans_per_s >= 0) || !(transitions_per_s >= 0)) {
    std::fprintf(stderr, "forayd: --robot_plans_per_s=%g and --robot_transitions_per_s=%g must be >= 0\n",
                 plans_per_s, transitions_per_s);
    return 2;
  }
  const double stalled_write_s = absl::GetFlag(FLAGS_stalled_write_timeout_s);
  if (!(stalled_write_s >= 0)) {
    std::fprintf(stderr, "forayd: --stalled_write_timeout_s=%g must be >= 0\n", stalled_write_s);
    return 2;
  }
  foray::api::WriteWatch write_watch(absl::Seconds(stalled_write_s));
  foray::sched::PlanScheduler scheduler(&gate, &helpers, plans_per_s);
  foray::api::SessionService session(&directory, &scheduler, transitions_per_s, &write_watch);
  foray::api::ModelsService models(&directory);
  foray::api::MonitoringService monitoring(&directory, absl::Milliseconds(200), &write_watch);
  grpc::ServerBuilder builder;
  int bound_port = 0;
  const std::string listen = absl::GetFlag(FLAGS_listen);
  bool tls = false;
  std::shared_ptr<grpc::ServerCredentials> credentials = Credentials(&tls);
  if (credentials == nullptr) return 2;
  builder.AddListeningPort(listen, credentials, &bound_port);
  builder.SetMaxReceiveMessageSize(max_message_mb * 1024 * 1024);
  // Keepalive: the server pings an idle connection every 60 s and drops it after 20 s without an
  // answer (a robot PC that lost power); clients may ping every 10 s or more (the Foray clients
  // ping every 20 s), also between calls.
  builder.AddChannelArgument(GRPC_ARG_KEEPALIVE_TIME_MS, 60000);
  builder.AddChannelArgument(GRPC_ARG_KEEPALIVE_TIMEOUT_MS, 20000);
  builder.AddChannelArgument(GRPC_ARG_KEEPALIVE_PERMIT_WITHOUT_CALLS, 1);
  builder.AddChannelArgument(GRPC_ARG_HTTP2_MIN_RECV_PING_INTERVAL_WITHOUT_DATA_MS, 10000);
  builder.RegisterService(&registry);
  builder.RegisterService(&session);
  builder.RegisterService(&models);
  builder.RegisterService(&monitoring);
  std::unique_ptr<grpc::Server> server = builder.BuildAndStart();
  if (server == nullptr || bound_port == 0) {
    std::fprintf(stderr, "forayd: cannot listen on \"%s\" (address in use or malformed)\n",
                 listen.c_str());
    return 2;
  }
  server->GetHealthCheckService()->SetServingStatus(true);
  trainer.Start();

  foray::web::WebServer web(&directory, &gate, viewer_hash);
  if (const int http_port = absl::GetFlag(FLAGS_http_port); http_port != 0) {
    if (absl::Status s = web.Start(absl::GetFlag(FLAGS_http_host), http_port); !s.ok()) {
      std::fprintf(stderr, "forayd: %s\n", std::string(s.message()).c_str());
      return 2;
    }
    std::fprintf(stderr, "forayd: serving HTTP on %s:%d (/metrics, /api/robots)\n",
                 absl::GetFlag(FLAGS_http_host).c_str(), http_port);
  }

  std::fprintf(stderr, "%s\n", kCaution);
  std::fprintf(stderr, "forayd: serving gRPC%s on %s (port %d), data in %s, %zu robots\n",
               tls ? " over TLS" : "", listen.c_str(), bound_port, data_dir.c_str(),
               directory.List(true).size());
  std::fflush(stderr);

  int signal_number = 0;
  sigwait(&stop_signals, &signal_number);
  std::fprintf(stderr, "forayd: %s received, shutting down\n",
               signal_number == SIGINT ? "SIGINT" : "SIGTERM");
  server->GetHealthCheckService()->SetServingStatus(false);
  const absl::Duration grace = absl::Seconds(absl::GetFlag(FLAGS_shutdown_grace_s));
  server->Shutdown(absl::ToChronoTime(absl::Now() + grace));
  server->Wait();
  web.Stop();
  trainer.Stop();
  std::fprintf(stderr, "forayd: stopped\n");
  return 0;
}
