#include "client/sim/mujoco_world.h"

#include <unistd.h>

#include <cmath>
#include <csetjmp>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <mutex>
#include <vector>

#include "absl/strings/str_cat.h"
#include "absl/strings/str_format.h"
#include "absl/strings/str_join.h"

namespace foray::sim {
namespace {

// MuJoCo's error hook must not return (the library cannot go on after an error). A guarded call
// sets a jump target on its own thread; the hook keeps the message and jumps back to it, across
// MuJoCo's C frames only. Outside a guarded call an error still ends the process, as MuJoCo
// would, but with the message on stderr instead of a prompt.
thread_local std::jmp_buf* t_on_error = nullptr;
thread_local char t_error[1024];
thread_local std::string* t_warnings = nullptr;

void OnError(const char* message) {
  std::snprintf(t_error, sizeof(t_error), "%s", message);
  if (t_on_error != nullptr) std::longjmp(*t_on_error, 1);
  std::fprintf(stderr, "MuJoCo error outside a guarded call: %s\n", message);
  std::abort();
}

void OnWarning(const char* message) {
  if (t_warnings != nullptr) absl::StrAppend(t_warnings, t_warnings->empty() ? "" : "; ", message);
}

void InstallHandlers() {
  static std::once_flag once;
  std::call_once(once, [] {
    mju_user_error = &OnError;
    mju_user_warning = &OnWarning;
  });
}

// Runs `call` with MuJoCo errors turned into a Status naming `what`.
template <typename Call>
absl::Status Guarded(const std::string& what, Call call) {
  InstallHandlers();
  std::jmp_buf target;
  std::jmp_buf* outer = t_on_error;
  t_on_error = &target;
  if (setjmp(target) != 0) {
    t_on_error = outer;
    return absl::InternalError(absl::StrCat(what, ": MuJoCo error: ", t_error));
  }
  call();
  t_on_error = outer;
  return absl::OkStatus();
}

}  // namespace

absl::StatusOr<std::string> FindModelFile(const std::string& name) {
  std::vector<std::filesystem::path> places;
  if (const char* env = std::getenv("FORAY_SIM_MODELS"); env != nullptr && *env != '\0') {
    places.emplace_back(env);
  }
  std::error_code error;
  const std::filesystem::path exe = std::filesystem::read_symlink("/proc/self/exe", error);
  if (!error) places.push_back(exe.parent_path().parent_path() / "share" / "foray" / "sim" / "models");
#ifdef FORAY_SIM_SOURCE_MODELS
  places.emplace_back(FORAY_SIM_SOURCE_MODELS);
#endif
  std::vector<std::string> looked;
  for (const std::filesystem::path& dir : places) {
    const std::filesystem::path candidate = dir / name;
    if (std::filesystem::is_regular_file(candidate, error)) return candidate.string();
    looked.push_back(candidate.string());
  }
  return absl::NotFoundError(absl::StrFormat("the simulation model %s is not in %s (set FORAY_SIM_MODELS)",
                                             name, absl::StrJoin(looked, ", ")));
}

absl::StatusOr<std::unique_ptr<MujocoWorld>> LoadModelFile(const std::string& name) {
  absl::StatusOr<std::string> path = FindModelFile(name);
  if (!path.ok()) return path.status();
  return MujocoWorld::Load(*path);
}

void AbortSimulation(const std::string& robot, const absl::Status& error) {
  std::fprintf(stderr, "%s simulation: %s\n", robot.c_str(), std::string(error.message()).c_str());
  std::abort();
}

MujocoWorld::MujocoWorld(mjModel* model, std::string name)
    : name_(std::move(name)), model_(model), data_(mj_makeData(model)) {}

MujocoWorld::~MujocoWorld() {
  mj_deleteData(data_);
  mj_deleteModel(model_);
}

absl::StatusOr<std::unique_ptr<MujocoWorld>> MujocoWorld::Load(const std::string& path) {
  std::ifstream in(path);
  if (!in) return absl::NotFoundError(absl::StrFormat("cannot read the simulation model %s", path));
  InstallHandlers();
  char message[1024] = "";
  mjModel* model = nullptr;
  absl::Status s = Guarded(path, [&] { model = mj_loadXML(path.c_str(), nullptr, message, sizeof(message)); });
  if (!s.ok()) return s;
  if (model == nullptr) {
    return absl::InvalidArgumentError(absl::StrFormat("simulation model %s: %s", path, message));
  }
  return std::unique_ptr<MujocoWorld>(new MujocoWorld(model, path));
}

absl::StatusOr<std::unique_ptr<MujocoWorld>> MujocoWorld::FromText(const std::string& mjcf,
                                                                    const std::string& name) {
  // MuJoCo 2.2 reads MJCF from files (or a virtual file system); a private temporary file is
  // the simplest faithful route.
  char path[] = "/tmp/foray-mjcf-XXXXXX";
  const int fd = ::mkstemp(path);
  if (fd < 0) return absl::InternalError("cannot create a temporary file for the model");
  const bool written = ::write(fd, mjcf.data(), mjcf.size()) == static_cast<ssize_t>(mjcf.size());
  ::close(fd);
  absl::StatusOr<std::unique_ptr<MujocoWorld>> world =
      written ? Load(path) : absl::InternalError("cannot write the temporary model file");
  std::remove(path);
  if (!world.ok()) {
    std::string text(world.status().message());
    const size_t at = text.find(path);
    if (at != std::string::npos) text.replace(at, std::string(path).size(), name);
    return absl::Status(world.status().code(), text);
  }
  return world;
}

void MujocoWorld::Reset() { mj_resetData(model_, data_); }

absl::Status MujocoWorld::Step(int steps) {
  std::string warnings;
  t_warnings = &warnings;
  const int before = data_->warning[mjWARN_BADQPOS].number + data_->warning[mjWARN_BADQVEL].number +
                     data_->warning[mjWARN_BADQACC].number;
  absl::Status s = Guarded(name_, [&] {
    for (int i = 0; i < steps; ++i) mj_step(model_, data_);
  });
  t_warnings = nullptr;
  if (!s.ok()) return s;
  if (data_->warning[mjWARN_BADQPOS].number + data_->warning[mjWARN_BADQVEL].number +
          data_->warning[mjWARN_BADQACC].number != before) {
    return absl::FailedPreconditionError(absl::StrFormat(
        "%s: the simulation diverged at t = %.4f s (bad positions, velocities or "
        "accelerations; MuJoCo reset the state)%s",
        name_, data_->time, warnings.empty() ? "" : absl::StrCat(": ", warnings)));
  }
  for (int i = 0; i < model_->nq; ++i) {
    if (!std::isfinite(data_->qpos[i])) {
      return absl::FailedPreconditionError(absl::StrFormat("%s: qpos[%d] is %g", name_, i, data_->qpos[i]));
    }
  }
  return absl::OkStatus();
}

absl::Status MujocoWorld::Forward() {
  return Guarded(name_, [&] { mj_forward(model_, data_); });
}

int MujocoWorld::JointId(const char* joint) const {
  const int id = mj_name2id(model_, mjOBJ_JOINT, joint);
  if (id < 0) {
    std::fprintf(stderr, "%s has no joint \"%s\"\n", name_.c_str(), joint);
    std::abort();
  }
  return id;
}

int MujocoWorld::QposOf(const char* joint) const { return model_->jnt_qposadr[JointId(joint)]; }

int MujocoWorld::QvelOf(const char* joint) const { return model_->jnt_dofadr[JointId(joint)]; }

}  // namespace foray::sim
