// The cross-entropy method over action sequences, with the improvements of Pinneri et al. 2020,
// "Sample-efficient Cross-Entropy Method for Real-time Planning", CoRL (iCEM): coloured noise
// along the horizon, elites kept between iterations, shift-initialisation from the previous
// plan, population decay, the best sequence seen returned, bounds by clipping, an optional
// per-step rate limit, and a deadline checked between iterations. Plain CEM is the special
// case noise_beta 0, keep_fraction 0, population_decay 1, momentum 0.
//
// A sequence is (horizon, dim) stored row-major as horizon * dim floats. The optimiser
// maximises. Not thread-safe per call (the score function is called from the caller's thread).
//
//   CemOptions options;                       // iCEM defaults
//   SequenceLimits limits = SequenceLimits::Box(lower, upper);
//   auto result = MaximizeCem(options, limits, score, {.deadline = absl::Now() + absl::Milliseconds(50)});
//   auto next = MaximizeCem(options, limits, score, {.warm_start = &result->next, .shift = 1});
#ifndef FORAY_CORE_PLAN_CEM_H_
#define FORAY_CORE_PLAN_CEM_H_

#include <cstdint>
#include <functional>
#include <optional>
#include <vector>

#include "Eigen/Core"
#include "absl/status/statusor.h"
#include "absl/time/time.h"
#include "core/util/matrix.h"

namespace foray::plan {

using foray::RowMatrixXf;

// Sampler of Gaussian noise with power spectrum 1/f^beta along the horizon, unit variance at
// every step (beta 0 is white noise). Built once per (horizon, beta): a (horizon, horizon)
// matrix M mapping white normal coefficients z to a sequence M z of cosines and sines of the
// horizon's frequencies k / horizon, each scaled by f^(-beta/2) (the zero frequency takes the
// lowest non-zero frequency's scale). Copyable; const methods are thread-safe.
class ColoredNoise {
 public:
  ColoredNoise(int horizon, double beta);
  int horizon() const { return static_cast<int>(basis_.rows()); }
  // Fills out[t * stride] for t < horizon with one sequence drawn from `normal`.
  template <typename NormalDraw>
  void Sample(NormalDraw&& normal, float* out, int stride) const {
    const int h = horizon();
    z_.resize(h);
    for (int i = 0; i < h; ++i) z_[i] = static_cast<float>(normal());
    for (int t = 0; t < h; ++t) out[t * stride] = basis_.row(t).dot(z_);
  }

 private:
  RowMatrixXf basis_;            // (horizon, horizon), rows of unit norm
  mutable Eigen::VectorXf z_;    // scratch (Sample is const but not reentrant per object)
};

// Bounds and rate limit of every element of a sequence, and the action before the sequence.
struct SequenceLimits {
  Eigen::VectorXf lower, upper;  // (dim), lower < upper, finite
  // (dim) largest |a_t - a_{t-1}| per dim; 0 means none. Empty means no rate limit at all.
  Eigen::VectorXf max_step;
  // (dim) action applied before step 0, for the rate limit of step 0. Empty means none.
  Eigen::VectorXf previous;

  static SequenceLimits Box(Eigen::VectorXf lower, Eigen::VectorXf upper);
  int dim() const { return static_cast<int>(lower.size()); }
  // InvalidArgument naming the field and values on any inconsistency, including a previous
  // action outside the bounds.
  absl::Status Validate() const;
  // Projects one sequence (horizon * dim, row-major) into the limits in place: clip step 0
  // to the bounds and to previous +- max_step, then each later step to the bounds and to the
  // (projected) step before it +- max_step. The result always satisfies every limit.
  void Project(float* sequence, int horizon) const;
};

// The optimiser's settings. Validate() refuses a value outside the range given beside it,
// naming the field and the value.
struct CemOptions {
  int horizon = 20;             // steps of a sequence; 1..500
  int population = 200;         // candidates in the first iteration; 1..100000
  int elites = 20;              // K, the candidates the distribution is refitted to; 1..population
  int iterations = 4;           // at most (fewer when the deadline comes first); 1..1000
  double noise_beta = 2.0;      // coloured-noise exponent along the horizon (0 = white); [0, 10]
  double keep_fraction = 0.3;   // fraction of the K elites carried into the next iteration; [0, 1]
  double population_decay = 1.25;  // N_i = max(N * decay^-i, 2 K); >= 1, finite
  double momentum = 0.1;        // mean/std <- momentum * old + (1 - momentum) * elite fit; [0, 1)
  double initial_std_fraction = 0.5;  // initial std per dim, fraction of (upper - lower); > 0
  double min_std_fraction = 1e-4;     // floor of the std, same unit; [0, initial_std_fraction]
  uint64_t seed = 1;            // the draws' seed; any value

  // Largest horizon, population and iterations: a plan beyond them would take minutes or
  // gigabytes, not a request a robot can wait for.
  static constexpr int kMaxHorizon = 500;
  static constexpr int kMaxPopulation = 100000;
  static constexpr int kMaxIterations = 1000;
  absl::Status Validate() const;
};

// Distribution state carried from one plan of a robot to the next (shift-initialisation).
struct CemWarmStart {
  RowMatrixXf mean;                 // (horizon, dim)
  std::vector<RowMatrixXf> elites;  // each (horizon, dim), best first
};

struct CemResult {
  RowMatrixXf best;         // (horizon, dim), within the limits
  float best_score = 0.0f;
  int iterations = 0;
  int evaluations = 0;      // candidates scored
  CemWarmStart next;        // mean and elites of the last iteration, unshifted
};

// Scores candidates: sequences (n, horizon * dim) row-major; writes n scores, higher better.
// A non-finite score ranks last.
using ScoreFunction = std::function<void(const float* sequences, int n, float* scores)>;

// One sequence drawn from the optimiser's cold-start distribution (the middle of the bounds,
// initial_std_fraction of each range, coloured noise along the horizon), within the limits:
// what a planner without a model can offer. (horizon, dim); deterministic under options.seed.
absl::StatusOr<RowMatrixXf> SampleFromPrior(const CemOptions& options, const SequenceLimits& limits);

// What one run of the optimiser starts from and when it must end.
struct CemRun {
  // The previous run's `next`, or null for a cold start. It is shifted by `shift` steps (the
  // steps executed since it was computed): its mean and elites lose their first `shift` rows
  // and repeat the last row. shift >= 0.
  const CemWarmStart* warm_start = nullptr;
  int shift = 1;
  // The first iteration always runs; before each later one the optimiser predicts its duration
  // from the last iteration (scaled by population) and stops if it would end after `deadline`.
  absl::Time deadline = absl::InfiniteFuture();
  std::function<absl::Time()> now;  // the clock; absl::Now when empty
};

// Runs CEM/iCEM on `score` within `limits`.
absl::StatusOr<CemResult> MaximizeCem(const CemOptions& options, const SequenceLimits& limits,
                                      const ScoreFunction& score, const CemRun& run = {});

}  // namespace foray::plan

#endif  // FORAY_CORE_PLAN_CEM_H_
