// One MuJoCo model (MJCF of our own) and one simulation state (mjData), for the simulated
// robots on a real physics engine. MuJoCo's errors become absl::Status: a model that is missing
// or malformed is reported with its file and MuJoCo's message (element and line), and an error
// inside a step (MuJoCo 2.2 would otherwise print, wait for Enter and exit the process) ends
// only that step. A diverging simulation (bad positions, velocities or accelerations), which
// MuJoCo answers by silently resetting the state, is reported too. Deterministic: the same model, start and controls give the same
// trajectory bit for bit. A world is one robot: not thread-safe (several worlds may step on
// several threads at once).
//
//   auto world = MujocoWorld::Load(FindModelFile("bench.xml").value());
//   (*world)->data()->ctrl[0] = 0.3;
//   absl::Status s = (*world)->Step(25);   // 25 physics steps of the model's timestep
#ifndef FORAY_CLIENT_SIM_MUJOCO_WORLD_H_
#define FORAY_CLIENT_SIM_MUJOCO_WORLD_H_

#include <memory>
#include <string>

#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "mujoco/mujoco.h"

namespace foray::sim {

// Where the MJCF files of the simulated robots are: $FORAY_SIM_MODELS when set, else the
// installed share/foray/sim/models beside the executable's bin/, else the source tree's
// client/sim/models. NotFound names every place looked at.
absl::StatusOr<std::string> FindModelFile(const std::string& name);

class MujocoWorld {
 public:
  // Not copyable or movable (owns the model and data).
  MujocoWorld(const MujocoWorld&) = delete;
  MujocoWorld& operator=(const MujocoWorld&) = delete;
  ~MujocoWorld();

  // Parses and compiles `path`. NotFound when the file cannot be read; InvalidArgument with
  // the file and MuJoCo's message (element, line) when it is malformed.
  static absl::StatusOr<std::unique_ptr<MujocoWorld>> Load(const std::string& path);
  // The same from MJCF text (tests); `name` stands for the file in messages.
  static absl::StatusOr<std::unique_ptr<MujocoWorld>> FromText(const std::string& mjcf,
                                                              const std::string& name);

  const mjModel* model() const { return model_; }
  mjData* data() { return data_; }
  const mjData* data() const { return data_; }

  // Back to the model's initial state (qpos0, zero velocities, time 0).
  void Reset();
  // `steps` physics steps with the controls in data()->ctrl. Internal when MuJoCo raised an
  // error; FailedPrecondition when accelerations diverged (the state was reset by MuJoCo) or a
  // value is not finite. The state is unusable after an error: Reset() before the next step.
  absl::Status Step(int steps);
  // Recomputes positions and contacts from qpos/qvel (after setting them by hand).
  absl::Status Forward();

  // Address in qpos / qvel of a named joint; aborts when the model has no such joint (a bug in
  // the scenario, not an input).
  int QposOf(const char* joint) const;
  int QvelOf(const char* joint) const;

 private:
  MujocoWorld(mjModel* model, std::string name);
  int JointId(const char* joint) const;  // aborts when there is none
  const std::string name_;
  mjModel* const model_;
  mjData* const data_;
};

// FindModelFile(name), then MujocoWorld::Load on it: a simulated robot's world.
absl::StatusOr<std::unique_ptr<MujocoWorld>> LoadModelFile(const std::string& name);

// For a scenario whose step failed: a simulation error there is a bug in its model or code,
// never a robot's input. Prints "<robot> simulation: <message>" and aborts.
[[noreturn]] void AbortSimulation(const std::string& robot, const absl::Status& error);

}  // namespace foray::sim

#endif  // FORAY_CLIENT_SIM_MUJOCO_WORLD_H_
