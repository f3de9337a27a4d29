// Model benchmark, C++ side: the machine's SGEMM peak (Eigen), the batched ensemble forward
// (B=5, 3x64, 1,000 rows) and one training epoch (5,000 transitions, minibatch 256), each on one
// thread and split over two.
// Prints one JSON object per figure; run_model_bench.sh runs it beside the PyTorch reference.

#include <algorithm>
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <string>
#include <vector>

#include "Eigen/Core"
#include "core/model/ensemble.h"
#include "core/model/inference.h"
#include "core/model/trainer.h"
#include "server/sched/helper_pool.h"
#include "tests/bench/bench_common.h"

namespace {

using foray::bench::Random;
using foray::bench::Time;
using foray::bench::Timing;

void Print(const std::string& name, const Timing& t, double flops, const std::string& extra = "") {
  std::printf(
      "{\"name\": \"%s\", \"impl\": \"foray\", \"median_ms\": %.4f, \"min_ms\": %.4f, "
      "\"max_ms\": %.4f, \"gflops\": %.2f%s}\n",
      name.c_str(), t.median_ms, t.min_ms, t.max_ms, flops / (t.median_ms * 1e6), extra.c_str());
  std::fflush(stdout);
}

}  // namespace

int main(int argc, char** argv) {
  const int repeats = argc > 1 ? std::atoi(argv[1]) : 30;
  using foray::model::Ensemble;

  // SGEMM peak: large square products, single thread (the core library runs on the caller's
  // thread; Eigen is built without OpenMP).
  {
    const int n = 1536;
    const Timing t = foray::bench::SgemmTiming(n, std::max(5, repeats / 3), /*warmup=*/3);
    Print("sgemm_peak", t, 2.0 * n * n * n, ", \"n\": 1536, \"threads\": 1");
  }
  // The target first: the FMA peak is measured on the widest vectors the kernels may use.
  if (!foray::bench::ChooseSimdTarget()) return 2;
  foray::bench::PrintFmaPeak(1);  // the cores' limit, one thread

  const int state_dim = 4, action_dim = 1;
  const foray::model::EnsembleOptions eopt;
  auto ensemble = Ensemble::Create(state_dim, action_dim, eopt, 3);
  // FLOPs of one member on one row: 2 * sum of fan_in * fan_out over the layers.
  double member_row_flops = 0;
  for (int l = 0; l < ensemble->num_layers(); ++l) {
    member_row_flops += 2.0 * ensemble->layer_fan_in(l) * ensemble->layer_fan_out(l);
  }

  {
    const int rows = 1000;
    const foray::model::PackedEnsemble fast(*ensemble);
    foray::model::PackedEnsemble::Workspace ws;
    const foray::model::PackedEnsemble::RowMatrix x = Random(rows, state_dim + action_dim, 4);
    std::vector<float> mean(rows * ensemble->output_dim()), log_var(mean.size());
    std::vector<float> all_mean(mean.size() * fast.size()), all_log_var(all_mean.size());
    const Timing t = Time(
        [&] {
          for (int b = 0; b < fast.size(); ++b) {
            fast.ForwardMember(b, x.data(), rows, mean.data(), log_var.data(), &ws);
          }
        },
        repeats * 10);
    Print("ensemble_forward", t, member_row_flops * rows * ensemble->size(), ", \"threads\": 1");
    // Split over two threads as the trainer's evaluation does it (ForwardAll: one task per
    // member and block of rows, on the helper pool forayd lends idle cores from).
    foray::sched::HelperPool pool(1);
    const foray::ParallelFor parallel = pool.ParallelFor();
    const Timing t2 = Time([&] {
      fast.ForwardAll(x.data(), rows, all_mean.data(), all_log_var.data(), parallel);
    }, repeats * 10);
    Print("ensemble_forward", t2, member_row_flops * rows * ensemble->size(), ", \"threads\": 2");
  }

  {
    const int n = 5000;
    foray::model::TransitionData data;
    data.states = Random(n, state_dim, 5);
    data.actions = Random(n, action_dim, 6);
    data.next_states = data.states + 0.1f * Random(n, state_dim, 7);
    data.rewards = Random(n, 1, 8).col(0);
    foray::model::TrainingOptions options;
    // No holdout: every row trains, and the end-of-epoch evaluation (early stopping) runs over
    // all 5,000 rows, as in the reference.
    options.holdout_fraction = 0;
    options.max_epochs = 10000;
    options.patience = 10000;
    auto trainer = foray::model::EnsembleTrainer::Create(*ensemble, data, options);
    if (!trainer.ok()) {
      std::fprintf(stderr, "%s\n", std::string(trainer.status().message()).c_str());
      return 1;
    }
    // Forward + backward is about 3x the forward FLOPs (backward has two products per layer),
    // plus one forward for the evaluation.
    const double flops = 4.0 * member_row_flops * n * ensemble->size();
    const Timing t = Time([&] { (*trainer)->RunEpoch(); }, std::max(5, repeats / 3), 2);
    Print("train_epoch", t, flops, ", \"threads\": 1");
    // The members of each step split over two threads, as forayd's trainer does while no plan
    // computes (the same model bit for bit).
    foray::sched::HelperPool pool(1);
    const foray::ParallelFor parallel = pool.ParallelFor();
    const Timing t2 = Time([&] { (*trainer)->RunEpoch(parallel); }, std::max(5, repeats / 3), 2);
    Print("train_epoch", t2, flops, ", \"threads\": 2");
  }
  return 0;
}
