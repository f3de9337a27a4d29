// foray-sim: simulated robots of our own that connect to forayd as ordinary clients. Each robot
// registers once (its token is kept under --state_dir), then runs episodes: at every control
// step it asks for a plan from its current state, applies the plan's first action to its
// physics, and records the transition; the C++ client library streams it to the server. A line per episode shows how learning goes.

#include <atomic>
#include <chrono>
#include <cmath>
#include <csignal>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <memory>
#include <mutex>
#include <random>
#include <string>
#include <thread>
#include <vector>

#include "absl/flags/flag.h"
#include "absl/flags/parse.h"
#include "absl/flags/usage.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_format.h"
#include "absl/strings/str_split.h"
#include "absl/strings/strip.h"
#include "client/cpp/session.h"
#include "client/sim/scenario.h"
#include "foray/v1/models.grpc.pb.h"
#include "grpcpp/grpcpp.h"

ABSL_FLAG(std::string, address, "127.0.0.1:50151", "forayd's gRPC address, host:port.");
ABSL_FLAG(std::string, admin_token_file, "./foray-data/admin-token",
          "File with the admin token, used once per robot to register it.");
ABSL_FLAG(std::string, state_dir, "./foray-data/sim",
          "Where each simulated robot keeps its id and token between runs.");
ABSL_FLAG(std::string, robots, "gantry,arm",
          "Comma-separated scenarios, one robot each: gantry, arm, bench, table.");
ABSL_FLAG(std::string, name_prefix, "sim", "Robots are named PREFIX-SCENARIO-N.");
ABSL_FLAG(int, episodes, 20, "Episodes per robot; 0 runs until Ctrl-C.");
ABSL_FLAG(int, steps, 0, "Control steps per episode; 0: the scenario's own length.");
ABSL_FLAG(uint64_t, seed, 1,
          "Seed of the run: each robot's initial states, its plans and its training (the robot "
          "spec's seed) derive from it.");
ABSL_FLAG(bool, realtime, false, "Pace each step to the control period instead of running flat out.");
ABSL_FLAG(double, deadline_ms, 100.0, "Planning time per step, milliseconds.");
ABSL_FLAG(double, nll_beta, -1.0,
          "beta of the models' beta-NLL training loss; 0: the plain NLL; negative: the server's "
          "default (0.5).");
ABSL_FLAG(double, reward_nll_beta, -1.0,
          "beta of the reward's output in that loss; negative: the server's default.");
ABSL_FLAG(int, horizon, 0,
          "Planning horizon in control steps (at registration); 0: the scenario's own (15 for "
          "gantry and arm, 30 for bench, whose strike takes 1.5 s to play out).");
ABSL_FLAG(double, reward_weight, 1.0, "Objective weight of the expected reward (at registration).");
ABSL_FLAG(double, information_weight, 1.0, "Objective weight of the information gain (at registration).");
ABSL_FLAG(double, terminal_value, 0.0,
          "Objective value of ending an episode in a terminal state, e.g. -5 for \"losing the object "
          "costs five steps at the goal\" (at registration).");
ABSL_FLAG(double, value_weight, 0.0,
          "Objective weight of the value of the states a plan ends in (what the robot's episodes "
          "earned after them); 0: plans see reward only within their horizon (at registration).");
ABSL_FLAG(std::string, value_estimate, "average",
          "average: the value of a state is the average return seen after states near it; best: "
          "the best one seen (at registration).");
ABSL_FLAG(std::string, reward_estimate, "model",
          "model: a plan's expected reward is the ensemble's reward output; nearby: the rewards "
          "received on arriving near each predicted state (at registration).");
ABSL_FLAG(double, evaluation_value_weight, 0.0,
          "Objective weight of the value in evaluation plans only (a per-request override); 0: "
          "the robot's value_weight.");
ABSL_FLAG(std::string, evaluation_reward_estimate, "",
          "model or nearby: where evaluation plans only take their expected reward from (a "
          "per-request override); empty: the robot's reward_estimate.");
ABSL_FLAG(std::string, strategy, "explore",
          "explore: plans with reward + information gain; reward: information weight 0; "
          "noise: no model, the nominal controller's action plus Gaussian noise; random: no "
          "model, random actions over the whole range, correlated over about 10 control periods.");
ABSL_FLAG(double, noise_fraction, 0.3,
          "noise strategy: standard deviation of the noise, fraction of each action's half range.");
ABSL_FLAG(bool, train_each_episode, false,
          "After each episode, wait for a training round on everything sent so far, and train at "
          "no other time (benchmarks: a run is repeatable for its seed; --min_transitions and "
          "--train_every are then not used).");
ABSL_FLAG(bool, state_limits, true,
          "Tell the server the robot's travel stops (spec.state_limits), so plans hold predicted "
          "states inside them.");
ABSL_FLAG(int, max_epochs, 20, "Upper bound on epochs per training round (at registration).");
ABSL_FLAG(int, min_epoch_steps, 0,
          "Fewest minibatch steps in a training epoch (at registration); 0: the server's default.");
ABSL_FLAG(int, patience, 0,
          "Epochs without holdout improvement before a round stops; 0: the server's default.");
ABSL_FLAG(std::string, tls_ca, "",
          "forayd's certificate (PEM): connect over TLS (forayd --tls_cert). Empty: plaintext.");
ABSL_FLAG(std::string, tls_server_name, "",
          "With --tls_ca: the name forayd's certificate is checked against, when it is not the "
          "address's host (e.g. a certificate for the planner's DNS name reached by IP).");
ABSL_FLAG(std::string, report, "", "Append one JSON line per episode to this file.");
ABSL_FLAG(int, min_transitions, 200, "Transitions before the first model (at registration).");
ABSL_FLAG(int, train_every, 500, "Retrain after this many new transitions (at registration).");
ABSL_FLAG(int, evaluate_every, 0,
          "After every N exploration episodes, --evaluation_episodes evaluation episodes: "
          "reward-only plans on the current model, reported separately (0: none; needs a model, "
          "so it waits for the first).");
ABSL_FLAG(int, evaluation_episodes, 1, "Evaluation episodes in each evaluation round.");
ABSL_FLAG(int, evaluation_horizon, 0,
          "Planning horizon of evaluation plans in control steps (a per-request override); 0: "
          "the robot's horizon.");

namespace {

using foray::sim::Scenario;
using foray::sim::StateRange;
namespace v1 = foray::v1;

constexpr char kCaution[] =
    "foray-sim drives simulated robots only. Foray is not a safety system: on real robots keep\n"
    "emergency stops and safety-rated limits in place and follow your lab's risk assessment.";

std::atomic<bool> g_stop{false};

void OnSignal(int) { g_stop = true; }

std::mutex g_print_mu;
void Say(const std::string& line) {
  std::lock_guard<std::mutex> lock(g_print_mu);
  std::printf("%s\n", line.c_str());
  std::fflush(stdout);
}

// CEM iterations of every plan (fewer when the deadline comes first; the report counts those).
constexpr int kPlanIterations = 3;
// A transition count no robot reaches: training by count off.
constexpr uint32_t kNeverByCount = 1000000000;
// How every channel connects: plaintext, or TLS checked against --tls_ca (set once in main,
// before the robots' threads start).
std::shared_ptr<grpc::ChannelCredentials> g_credentials = grpc::InsecureChannelCredentials();
// --tls_server_name (empty: the address's host).
std::string g_tls_server_name;

// `seed`: the robot's own random streams (its plans and training).
v1::RobotSpec SpecFor(const Scenario& s, const std::string& name, uint64_t seed) {
  v1::RobotSpec spec;
  spec.set_seed(seed);
  spec.set_name(name);
  for (const auto& d : s.state_dims()) {
    auto* dim = spec.add_state();
    dim->set_label(d.label);
    dim->set_unit(d.unit);
  }
  for (const auto& d : s.action_dims()) {
    auto* dim = spec.add_action();
    dim->set_label(d.label);
    dim->set_unit(d.unit);
  }
  for (const auto& r : s.action_ranges()) {
    auto* limit = spec.add_action_limits();
    limit->set_min(r.min);
    limit->set_max(r.max);
    limit->set_max_step(r.max_step);
  }
  if (absl::GetFlag(FLAGS_state_limits)) {
    for (const StateRange& r : s.state_ranges()) {
      v1::StateLimit* limit = spec.add_state_limits();
      limit->set_index(r.index);
      if (std::isfinite(r.min)) limit->set_min(r.min);
      if (std::isfinite(r.max)) limit->set_max(r.max);
    }
  }
  spec.set_control_period_s(s.control_period_s());
  spec.mutable_model()->add_hidden_widths(64);
  spec.mutable_model()->add_hidden_widths(64);
  if (absl::GetFlag(FLAGS_train_each_episode)) {
    // Only the rounds asked for after each episode: the server's own rounds (the first model
    // once min_transitions arrived, at an episode's end, every n transitions) would start
    // while the next episode plans, and which model a plan saw would depend on timing. So a
    // run is repeatable for its seed.
    spec.mutable_training()->set_min_transitions(kNeverByCount);
    spec.mutable_training()->set_every_n_transitions(kNeverByCount);
    spec.mutable_training()->set_no_train_at_episode_end(true);
  } else {
    spec.mutable_training()->set_min_transitions(absl::GetFlag(FLAGS_min_transitions));
    spec.mutable_training()->set_every_n_transitions(absl::GetFlag(FLAGS_train_every));
  }
  spec.mutable_training()->set_max_epochs(absl::GetFlag(FLAGS_max_epochs));
  if (absl::GetFlag(FLAGS_min_epoch_steps) > 0)
    spec.mutable_training()->set_min_epoch_steps(absl::GetFlag(FLAGS_min_epoch_steps));
  if (absl::GetFlag(FLAGS_patience) > 0)
    spec.mutable_training()->set_patience(absl::GetFlag(FLAGS_patience));
  if (absl::GetFlag(FLAGS_nll_beta) >= 0.0) {
    spec.mutable_training()->set_nll_beta(absl::GetFlag(FLAGS_nll_beta));
  }
  if (absl::GetFlag(FLAGS_reward_nll_beta) >= 0.0) {
    spec.mutable_training()->set_reward_nll_beta(absl::GetFlag(FLAGS_reward_nll_beta));
  }
  spec.mutable_planner()->set_horizon(absl::GetFlag(FLAGS_horizon) > 0 ? absl::GetFlag(FLAGS_horizon)
                                                                       : s.plan_horizon());
  spec.mutable_planner()->set_population(150);
  spec.mutable_planner()->set_elites(15);
  spec.mutable_planner()->set_iterations(kPlanIterations);
  spec.mutable_objective()->set_reward_weight(absl::GetFlag(FLAGS_reward_weight));
  spec.mutable_objective()->set_information_weight(
      absl::GetFlag(FLAGS_strategy) == "reward" ? 0.0 : absl::GetFlag(FLAGS_information_weight));
  if (absl::GetFlag(FLAGS_terminal_value) != 0.0) {
    spec.mutable_objective()->set_terminal_value(absl::GetFlag(FLAGS_terminal_value));
  }
  if (absl::GetFlag(FLAGS_value_weight) != 0.0) {
    spec.mutable_objective()->set_value_weight(absl::GetFlag(FLAGS_value_weight));
  }
  if (absl::GetFlag(FLAGS_value_estimate) == "best") {
    spec.mutable_objective()->set_value_estimate(v1::VALUE_ESTIMATE_BEST);
  }
  if (absl::GetFlag(FLAGS_reward_estimate) == "nearby") {
    spec.mutable_objective()->set_reward_estimate(v1::REWARD_ESTIMATE_NEARBY);
  }
  for (int i : s.coverage_indices()) spec.add_coverage_indices(i);
  for (double v : s.coverage_lower()) spec.add_coverage_lower(v);
  for (double v : s.coverage_upper()) spec.add_coverage_upper(v);
  return spec;
}

// Runs the episodes of one robot; returns false on an error that stops it.
bool RunRobot(const std::string& kind, int index) {
  // One seed per robot and run, for its simulation and (in its spec) its plans and training.
  const uint64_t seed = absl::GetFlag(FLAGS_seed) * 1000 + index;
  auto scenario = foray::sim::MakeScenario(kind, seed);
  if (!scenario.ok()) {
    Say(std::string(scenario.status().message()));
    return false;
  }
  Scenario& sim = **scenario;
  const std::string name = absl::StrFormat("%s-%s-%d", absl::GetFlag(FLAGS_name_prefix), kind, index);
  const std::filesystem::path state_dir = absl::GetFlag(FLAGS_state_dir);
  std::error_code ignored;
  std::filesystem::create_directories(state_dir, ignored);
  bool registered = false;
  absl::StatusOr<foray::client::Identity> id = foray::client::RobotSession::LoadOrRegister(
      (state_dir / (name + ".token")).string(), absl::GetFlag(FLAGS_address), g_credentials,
      absl::GetFlag(FLAGS_admin_token_file), SpecFor(sim, name, seed), &registered,
      g_tls_server_name);
  if (!id.ok()) {
    Say(absl::StrFormat("%s: %s", name, id.status().message()));
    return false;
  }
  if (registered) {
    Say(absl::StrFormat("%s: registered as %s; hidden zone: %s", name, id->robot_id,
                        sim.ZoneDescription()));
  }
  foray::client::SessionOptions options;
  options.address = absl::GetFlag(FLAGS_address);
  options.identity = *id;
  options.safe_action.kind = foray::client::SafeAction::Kind::kLastAction;
  options.client_name = "foray-sim/0.1";
  options.credentials = g_credentials;
  options.tls_server_name = g_tls_server_name;
  foray::client::RobotSession session(options);
  if (absl::Status s = session.WaitConnected(absl::Seconds(30)); !s.ok()) {
    Say(absl::StrFormat("%s: %s (delete %s to register anew)", name, s.message(),
                        (state_dir / (name + ".token")).string()));
    return false;
  }
  uint64_t seq = session.Stats().next_seq - 1;
  const int steps = absl::GetFlag(FLAGS_steps) > 0 ? absl::GetFlag(FLAGS_steps) : sim.episode_steps();
  const int episodes = absl::GetFlag(FLAGS_episodes);
  // Episodes that end early (a lost object) make seq / steps undercount them: the next episode
  // id is kept beside the token as well, and the larger of the two is used.
  const std::filesystem::path episode_file = state_dir / (name + ".episode");
  uint64_t episode_id = seq / steps + 1;
  if (std::ifstream in(episode_file); in) {
    uint64_t kept = 0;
    if (in >> kept) episode_id = std::max(episode_id, kept);
  }
  const int action_dim = static_cast<int>(sim.action_dims().size());
  const bool random_baseline = absl::GetFlag(FLAGS_strategy) == "random";
  const bool no_model = random_baseline || absl::GetFlag(FLAGS_strategy) == "noise";
  const bool realtime = absl::GetFlag(FLAGS_realtime);
  const absl::Duration deadline = absl::Milliseconds(absl::GetFlag(FLAGS_deadline_ms));
  // In real time the watchdog holds the last action once a control period is over; flat out,
  // the simulation waits for the plan (the clock is ours).
  const absl::Duration wait =
      realtime ? std::max(deadline, absl::Seconds(sim.control_period_s())) : deadline + absl::Seconds(10);
  std::mt19937_64 rng(absl::GetFlag(FLAGS_seed) * 7919 + index);
  grpc::ChannelArguments channel_args;
  if (!g_tls_server_name.empty()) channel_args.SetSslTargetNameOverride(g_tls_server_name);
  auto models = v1::Models::NewStub(
      grpc::CreateCustomChannel(absl::GetFlag(FLAGS_address), g_credentials, channel_args));

  const int evaluate_every = absl::GetFlag(FLAGS_evaluate_every);
  const int round_size = std::max(1, absl::GetFlag(FLAGS_evaluation_episodes));
  const int evaluation_horizon = absl::GetFlag(FLAGS_evaluation_horizon);
  const double evaluation_value_weight = absl::GetFlag(FLAGS_evaluation_value_weight);
  const std::string evaluation_reward_estimate = absl::GetFlag(FLAGS_evaluation_reward_estimate);
  int explored_since_evaluation = 0, evaluated_in_round = 0;
  uint64_t known_model = 0;  // the newest model version a plan came from
  for (int e = 0; (episodes == 0 || e < episodes) && !g_stop; ++e, ++episode_id) {
    // An evaluation episode once every evaluate_every exploration episodes, from the first
    // model on (the server refuses to evaluate before it).
    const bool evaluation = !no_model && evaluate_every > 0 &&
                            explored_since_evaluation >= evaluate_every && known_model > 0;
    if (evaluation) {
      if (++evaluated_in_round == round_size) explored_since_evaluation = evaluated_in_round = 0;
    } else {
      ++explored_since_evaluation;
    }
    foray::client::PlanChoices choices;
    choices.evaluate = evaluation;
    choices.episode = episode_id;
    if (evaluation && evaluation_horizon > 0)
      choices.planner.emplace().set_horizon(evaluation_horizon);
    if (evaluation && evaluation_value_weight != 0.0) {
      if (!choices.objective) choices.objective.emplace();
      choices.objective->set_value_weight(evaluation_value_weight);
    }
    if (evaluation && !evaluation_reward_estimate.empty()) {
      if (!choices.objective) choices.objective.emplace();
      choices.objective->set_reward_estimate(evaluation_reward_estimate == "nearby"
                                                 ? v1::REWARD_ESTIMATE_NEARBY
                                                 : v1::REWARD_ESTIMATE_MODEL);
    }
    bool lost = false;
    Eigen::VectorXd state = sim.Reset();
    std::vector<double> previous(action_dim, 0.0);
    double episode_return = 0.0, plan_ms = 0.0, gain = 0.0;
    // Plans from a model, and those of them whose deadline came before their iterations were
    // done (the plan's work then depends on the machine's speed).
    int first_reward = -1, from_prior = 0, plans = 0, held = 0, model_plans = 0, cut_short = 0;
    const auto episode_start = std::chrono::steady_clock::now();
    uint64_t model_version = 0;
    for (int t = 0; t < steps && !g_stop; ++t) {
      const auto step_start = std::chrono::steady_clock::now();
      const std::vector<double> now(state.data(), state.data() + state.size());
      std::vector<double> action;
      if (no_model) {
        action = foray::sim::BaselineAction(sim, state, previous,
                                            random_baseline ? foray::sim::Baseline::kRandom
                                                            : foray::sim::Baseline::kNoise,
                                            absl::GetFlag(FLAGS_noise_fraction), rng);
      } else {
        foray::client::Decision decision = session.Act(now, previous, deadline, wait, choices);
        ++plans;
        action = std::move(decision.action);
        if (decision.planned) {
          plan_ms += decision.plan.compute_ms();
          gain += decision.plan.steps(0).information_gain();
          from_prior += decision.plan.from_prior() ? 1 : 0;
          if (!decision.plan.from_prior()) {
            ++model_plans;
            cut_short += decision.plan.iterations() < kPlanIterations ? 1 : 0;
          }
          model_version = decision.plan.model_version();
          known_model = std::max(known_model, model_version);
        } else if (held++ == 0) {
          Say(absl::StrFormat("%s: no plan (%s); holding the last action", name, decision.why.message()));
        }
      }
      const Eigen::VectorXd next = sim.Step(Eigen::Map<const Eigen::VectorXd>(action.data(), action_dim));
      const double reward = sim.Reward(next);
      if (reward > 0 && first_reward < 0) first_reward = t;
      episode_return += reward;
      foray::client::StepRecord record;
      record.episode = episode_id;
      record.step = static_cast<uint32_t>(t);
      record.state = now;
      record.action = action;
      record.next_state.assign(next.data(), next.data() + next.size());
      record.reward = reward;
      // Only an irrecoverable state is terminal; the time limit is not (the next episode id
      // says where the episode was cut).
      lost = sim.Terminal(next);
      record.terminal = lost;
      if (absl::Status s = session.Record(record); !s.ok()) {
        Say(absl::StrFormat("%s: recording a transition failed: %s", name, s.message()));
        return false;
      }
      ++seq;
      state = next;
      previous = action;
      if (realtime) {
        std::this_thread::sleep_until(step_start + std::chrono::duration<double>(sim.control_period_s()));
      }
      if (lost) break;
    }
    const char* outcome = lost ? "lost" : first_reward >= 0 ? "goal reached" : "time up";
    const double episode_s =
        std::chrono::duration<double>(std::chrono::steady_clock::now() - episode_start).count();
    if (std::ofstream out(episode_file, std::ios::trunc); out) out << episode_id + 1 << "\n";
    if (!absl::GetFlag(FLAGS_report).empty()) {
      std::lock_guard<std::mutex> lock(g_print_mu);
      std::ofstream report(absl::GetFlag(FLAGS_report), std::ios::app);
      report << absl::StrFormat(
          "{\"robot\": \"%s\", \"robot_id\": \"%s\", \"scenario\": \"%s\", \"strategy\": \"%s\", "
          "\"episode\": %d, \"evaluation\": %s, \"outcome\": \"%s\", \"return\": %g, "
          "\"first_reward_step\": %d, \"model_version\": %d, "
          "\"plans\": %d, \"plan_ms\": %g, \"information_gain\": %g, \"seconds\": %g, "
          "\"model_plans\": %d, \"plans_cut_short\": %d}\n",
          name, id->robot_id, kind, absl::GetFlag(FLAGS_strategy), episode_id,
          evaluation ? "true" : "false", outcome, episode_return,
          first_reward, model_version, plans, plans > 0 ? plan_ms / plans : 0.0,
          plans > 0 ? gain / plans : 0.0, episode_s, model_plans, cut_short);
    }
    if (absl::GetFlag(FLAGS_train_each_episode) && !no_model && !g_stop) {
      if (absl::Status s = session.Flush(absl::Minutes(1)); !s.ok()) {
        Say(absl::StrFormat("%s: %s", name, s.message()));
        return false;
      }
      grpc::ClientContext context;
      context.AddMetadata("authorization", "Bearer " + id->token);
      context.AddMetadata(foray::client::kRobotHeader, id->robot_id);
      context.set_deadline(std::chrono::system_clock::now() + std::chrono::minutes(10));
      v1::TrainNowRequest request;
      request.set_robot_id(id->robot_id);
      request.set_wait(true);
      v1::TrainNowResponse response;
      const grpc::Status status = models->TrainNow(&context, request, &response);
      if (!status.ok()) Say(absl::StrFormat("%s: training failed: %s", name, status.error_message()));
    }
    Say(absl::StrFormat(
        "%s %s episode %d: %s, return %.0f (%s), %d transitions recorded, model v%d, plan %.1f ms, "
        "information gain %.3f nats/step%s%s",
        name, evaluation ? "evaluation" : "exploration", episode_id, outcome, episode_return,
        first_reward >= 0 ? absl::StrFormat("zone reached at step %d", first_reward) : "zone not reached",
        seq, model_version, plan_ms / steps, gain / steps,
        from_prior > 0 ? absl::StrFormat(", %d random steps (no model yet)", from_prior) : "",
        held > 0 ? absl::StrFormat(", %d steps held the last action", held) : ""));
  }
  if (absl::Status s = session.Flush(absl::Seconds(30)); !s.ok()) {
    Say(absl::StrFormat("%s: %s", name, s.message()));
    return false;
  }
  return true;
}

}  // namespace

int main(int argc, char** argv) {
  absl::SetProgramUsageMessage(absl::StrCat(
      "Simulated robots (an overhead gantry, a two-link arm; on MuJoCo a paddle striking a puck along\n"
      "a bench and a rod on a two-axis stage pushing a puck over a table) that learn through\n"
      "forayd.\n\n",
      kCaution, "\n\nUsage: foray-sim [flags]"));
  absl::ParseCommandLine(argc, argv);
  std::signal(SIGINT, OnSignal);
  std::signal(SIGTERM, OnSignal);
  std::fprintf(stderr, "%s\n", kCaution);

  const std::vector<std::string> kinds = absl::StrSplit(absl::GetFlag(FLAGS_robots), ',', absl::SkipEmpty());
  if (kinds.empty()) {
    std::fprintf(stderr, "foray-sim: --robots is empty; name gantry, arm, bench and/or table\n");
    return 2;
  }
  const std::string strategy = absl::GetFlag(FLAGS_strategy);
  if (const std::string e = absl::GetFlag(FLAGS_value_estimate); e != "average" && e != "best") {
    std::fprintf(stderr, "foray-sim: --value_estimate is \"%s\"; use average or best\n", e.c_str());
    return 2;
  }
  if (const std::string e = absl::GetFlag(FLAGS_reward_estimate); e != "model" && e != "nearby") {
    std::fprintf(stderr, "foray-sim: --reward_estimate is \"%s\"; use model or nearby\n",
                 e.c_str());
    return 2;
  }
  if (const std::string e = absl::GetFlag(FLAGS_evaluation_reward_estimate);
      !e.empty() && e != "model" && e != "nearby") {
    std::fprintf(stderr,
                 "foray-sim: --evaluation_reward_estimate is \"%s\"; use model, nearby or leave it "
                 "empty\n",
                 e.c_str());
    return 2;
  }
  if (strategy != "explore" && strategy != "reward" && strategy != "noise" && strategy != "random") {
    std::fprintf(stderr, "foray-sim: --strategy is \"%s\"; use explore, reward, noise or random\n",
                 strategy.c_str());
    return 2;
  }
  if (const std::string ca_path = absl::GetFlag(FLAGS_tls_ca); !ca_path.empty()) {
    std::ifstream in(ca_path, std::ios::binary);
    std::string pem((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
    if (pem.find("-----BEGIN CERTIFICATE-----") == std::string::npos) {
      std::fprintf(stderr, "foray-sim: --tls_ca \"%s\" %s\n", ca_path.c_str(),
                   pem.empty() ? "cannot be read" : "holds no PEM certificate");
      return 2;
    }
    grpc::SslCredentialsOptions tls;
    tls.pem_root_certs = std::move(pem);
    g_credentials = grpc::SslCredentials(tls);
    g_tls_server_name = absl::GetFlag(FLAGS_tls_server_name);
  } else if (!absl::GetFlag(FLAGS_tls_server_name).empty()) {
    std::fprintf(stderr, "foray-sim: --tls_server_name needs --tls_ca\n");
    return 2;
  }
  for (const std::string& kind : kinds) {
    absl::StatusOr<std::unique_ptr<Scenario>> scenario = foray::sim::MakeScenario(kind, 0);
    if (!scenario.ok()) {
      // An unknown name, or a model file that is missing or malformed (named with its line).
      std::fprintf(stderr, "foray-sim: --robots: %s\n", std::string(scenario.status().message()).c_str());
      return 2;
    }
  }
  std::vector<std::thread> threads;
  std::atomic<int> failed{0};
  for (size_t i = 0; i < kinds.size(); ++i) {
    threads.emplace_back([&, i] {
      if (!RunRobot(kinds[i], static_cast<int>(i + 1))) ++failed;
    });
  }
  for (std::thread& t : threads) t.join();
  // Released before gRPC's own teardown at exit, which otherwise leaves the TLS context's
  // allocations behind (seen by the leak checker).
  g_credentials.reset();
  return failed > 0 ? 1 : 0;
}
