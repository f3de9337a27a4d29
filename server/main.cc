// forayd: the Foray planning server.
//
// Serves the foray.v1 gRPC services, standard gRPC health checking and server reflection,
// and stops cleanly on SIGINT or SIGTERM.

#include <csignal>
#include <cstdio>
#include <filesystem>
#include <memory>
#include <string>
#include <system_error>

#include "absl/flags/flag.h"
#include "absl/flags/parse.h"
#include "absl/flags/usage.h"
#include "absl/strings/str_cat.h"
#include "absl/time/clock.h"
#include "absl/time/time.h"
#include "foray/v1/models.grpc.pb.h"
#include "foray/v1/monitoring.grpc.pb.h"
#include "foray/v1/registry.grpc.pb.h"
#include "foray/v1/session.grpc.pb.h"
#include "grpcpp/ext/proto_server_reflection_plugin.h"
#include "grpcpp/health_check_service_interface.h"
#include "grpcpp/server.h"
#include "grpcpp/server_builder.h"
#include "grpcpp/security/server_credentials.h"

ABSL_FLAG(std::string, listen, "127.0.0.1:50151",
          "gRPC listen address, host:port. Use 0.0.0.0:PORT to accept robots on the lab network.");
ABSL_FLAG(std::string, data_dir, "./foray-data",
          "Directory for the SQLite database and checkpoints; created if missing.");
ABSL_FLAG(int, http_port, 0,
          "Port of the HTTP dashboard and /metrics (0: no HTTP server).");
ABSL_FLAG(double, shutdown_grace_s, 5.0,
          "Seconds in-flight calls get to finish after SIGINT/SIGTERM before they are cancelled.");

namespace {

constexpr char kCaution[] =
    "Foray plans robot motions but is not a safety system: keep emergency stops and\n"
    "safety-rated limits in place and follow your lab's risk assessment and local rules.";

// The foray.v1 services as generated: every rpc answers UNIMPLEMENTED until the service layer
// provides it. Registering them keeps the contract visible through reflection.
struct ContractServices {
  foray::v1::RobotRegistry::Service registry;
  foray::v1::RobotSession::Service session;
  foray::v1::Models::Service models;
  foray::v1::Monitoring::Service monitoring;
};

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

  const std::filesystem::path data_dir = absl::GetFlag(FLAGS_data_dir);
  std::error_code ec;
  std::filesystem::create_directories(data_dir, ec);
  if (ec) {
    std::fprintf(stderr, "forayd: cannot create data directory \"%s\": %s\n",
                 data_dir.c_str(), ec.message().c_str());
    return 2;
  }

  grpc::EnableDefaultHealthCheckService(true);
  grpc::reflection::InitProtoReflectionServerBuilderPlugin();

  ContractServices services;
  grpc::ServerBuilder builder;
  int bound_port = 0;
  const std::string listen = absl::GetFlag(FLAGS_listen);
  builder.AddListeningPort(listen, grpc::InsecureServerCredentials(), &bound_port);
  builder.RegisterService(&services.registry);
  builder.RegisterService(&services.session);
  builder.RegisterService(&services.models);
  builder.RegisterService(&services.monitoring);
  std::unique_ptr<grpc::Server> server = builder.BuildAndStart();
  if (server == nullptr || bound_port == 0) {
    std::fprintf(stderr, "forayd: cannot listen on \"%s\" (address in use or malformed)\n",
                 listen.c_str());
    return 2;
  }
  server->GetHealthCheckService()->SetServingStatus(true);

  std::fprintf(stderr, "%s\n", kCaution);
  std::fprintf(stderr, "forayd: serving gRPC on %s (port %d), data in %s\n", listen.c_str(),
               bound_port, data_dir.c_str());
  std::fflush(stderr);

  int signal_number = 0;
  sigwait(&stop_signals, &signal_number);
  std::fprintf(stderr, "forayd: %s received, shutting down\n",
               signal_number == SIGINT ? "SIGINT" : "SIGTERM");
  server->GetHealthCheckService()->SetServingStatus(false);
  const absl::Duration grace = absl::Seconds(absl::GetFlag(FLAGS_shutdown_grace_s));
  server->Shutdown(absl::ToChronoTime(absl::Now() + grace));
  server->Wait();
  std::fprintf(stderr, "forayd: stopped\n");
  return 0;
}
