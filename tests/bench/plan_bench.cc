// Planner benchmark, C++ side: the SGEMM peak (Eigen, one thread), then one plan (iCEM over
// particle rollouts through an ensemble, reward + pairwise-KL information gain) at the "small"
// and "arm" configurations, on one thread and split over two (the planner's ParallelFor on
// the server's helper pool, server/sched/helper_pool.h). Prints one JSON object per figure; run_plan_bench.sh runs it beside
// the PyTorch reference (plan_bench_torch.py) in the same run.
//
//   foray_plan_bench [repeats] [config name, default all]

#include <algorithm>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <string>
#include <thread>
#include <vector>

#include "Eigen/Core"
#include "core/model/ensemble.h"
#include "core/plan/planner.h"
#include "server/sched/helper_pool.h"
#include "tests/bench/bench_common.h"

namespace {

struct Config {
  const char* name;
  int state_dim, action_dim, members, width, layers;
  int population, elites, particles, horizon, iterations;
};

// The configurations of the planner issue.
constexpr Config kConfigs[] = {
    {"small", 4, 1, 5, 64, 3, 200, 20, 5, 20, 4},
    {"arm", 14, 4, 5, 200, 3, 400, 40, 5, 25, 5},
};

using foray::bench::MsSince;
using foray::bench::Random;
using foray::bench::Summarise;
using foray::bench::Timing;

}  // namespace

int main(int argc, char** argv) {
  const int repeats = argc > 1 ? std::atoi(argv[1]) : 10;
  {
    const int n = 1536;
    const Timing t = foray::bench::SgemmTiming(n, /*repeats=*/8, /*warmup=*/0);
    std::printf("{\"name\": \"sgemm_peak\", \"impl\": \"foray\", \"median_ms\": %.3f, "
                "\"min_ms\": %.3f, \"max_ms\": %.3f, \"gflops\": %.2f, \"n\": %d, \"threads\": 1}\n",
                t.median_ms, t.min_ms, t.max_ms, 2.0 * n * n * n / (t.median_ms * 1e6), n);
    std::fflush(stdout);
  }

  // The target first: the FMA peak is measured on the widest vectors the kernels may use.
  if (!foray::bench::ChooseSimdTarget()) return 2;
  for (int threads : {1, 2}) foray::bench::PrintFmaPeak(threads);

  const std::string only = argc > 2 ? argv[2] : "";
  for (const Config& c : kConfigs) {
    if (!only.empty() && only != c.name) continue;
    foray::model::EnsembleOptions eo;
    eo.ensemble_size = c.members;
    eo.hidden_widths.assign(c.layers, c.width);
    auto ensemble = foray::model::Ensemble::Create(c.state_dim, c.action_dim, eo, 3);
    if (!ensemble.ok()) return 1;
    const foray::plan::EnsembleRolloutModel model(*ensemble);
    foray::explore::ObjectiveOptions objective;  // learned reward + pairwise-KL information
    foray::plan::PlannerOptions options;
    options.set_horizon(c.horizon);
    options.cem.population = c.population;
    options.cem.elites = c.elites;
    options.cem.iterations = c.iterations;
    options.rollout.particles = c.particles;
    const foray::plan::SequenceLimits limits = foray::plan::SequenceLimits::Box(
        Eigen::VectorXf::Constant(c.action_dim, -1.0f), Eigen::VectorXf::Constant(c.action_dim, 1.0f));
    const Eigen::VectorXf state = Random(c.state_dim, 1, 9).col(0) * 0.1f;

    foray::sched::HelperPool pool(1);  // the server's helper threads (one per extra core)
    for (int threads : {1, 2}) {
    foray::plan::PlanContext context;
    if (threads > 1) {
      context.tasks = threads;
      context.parallel = pool.ParallelFor();
    }
    std::vector<double> ms, model_ms;
    double flops = 0;
    int evaluations = 0;
    for (int i = 0; i < repeats + 2; ++i) {
      options.cem.seed = 1 + i;
      const auto start = std::chrono::steady_clock::now();
      absl::StatusOr<foray::plan::PlanResult> plan =
          foray::plan::Plan(model, {.state = state,
                                    .limits = limits,
                                    .objective = objective,
                                    .options = options,
                                    .context = context});
      const double elapsed = MsSince(start);
      if (!plan.ok()) {
        std::fprintf(stderr, "plan failed: %s\n", std::string(plan.status().message()).c_str());
        return 1;
      }
      if (i < 2) continue;  // warm-up
      ms.push_back(elapsed);
      model_ms.push_back(plan->model_seconds * 1e3);
      flops = plan->model_flops;
      evaluations = plan->evaluations;
    }
    const Timing t = Summarise(ms), m = Summarise(model_ms);
    // The work of the scored candidates when every member is evaluated at every particle at
    // every step (the reference does that; Foray evaluates the first step once per candidate).
    const double every_particle = model.FlopsPerMemberRow() * c.members * c.particles *
                                  c.horizon * static_cast<double>(evaluations);
    // model_seconds counts thread-seconds: per-thread GFLOP/s.
    std::printf("{\"name\": \"plan_%s\", \"impl\": \"foray\", \"threads\": %d, \"median_ms\": %.3f, \"min_ms\": %.3f, "
                "\"max_ms\": %.3f, \"model_median_ms\": %.3f, \"model_gflops\": %.2f, "
                "\"flops\": %.4g, \"flops_every_particle\": %.4g, \"evaluations\": %d, "
                "\"config\": {\"state_dim\": %d, "
                "\"action_dim\": %d, \"members\": %d, \"hidden\": \"%dx%d\", \"population\": %d, "
                "\"elites\": %d, \"particles\": %d, \"horizon\": %d, \"iterations\": %d}}\n",
                c.name, threads, t.median_ms, t.min_ms, t.max_ms, m.median_ms, flops / (m.median_ms * 1e6),
                flops, every_particle, evaluations, c.state_dim, c.action_dim, c.members, c.layers, c.width,
                c.population, c.elites, c.particles, c.horizon, c.iterations);
    std::fflush(stdout);
    }
  }
  return 0;
}
