#include "core/plan/cem.h"

#include <algorithm>
#include <cmath>
#include <limits>
#include <numeric>

#include "absl/strings/str_format.h"
#include "core/util/random.h"

namespace foray::plan {
namespace {

constexpr double kPi = 3.14159265358979323846;

// Rows of `m` shifted up by `shift`, the last row repeated into the freed rows.
RowMatrixXf Shifted(const RowMatrixXf& m, int shift) {
  const int h = static_cast<int>(m.rows());
  RowMatrixXf out(m.rows(), m.cols());
  for (int t = 0; t < h; ++t) out.row(t) = m.row(std::min(h - 1, t + shift));
  return out;
}

// The first sampling distribution of a cold start: the middle of the bounds, and a standard
// deviation of initial_std_fraction of each range. mean, stddev: (horizon, dim).
void InitialDistribution(const CemOptions& options, const SequenceLimits& limits,
                         RowMatrixXf* mean, RowMatrixXf* stddev) {
  const Eigen::VectorXf range = limits.upper - limits.lower;
  mean->resize(options.horizon, limits.dim());
  stddev->resize(options.horizon, limits.dim());
  mean->rowwise() = (0.5f * (limits.upper + limits.lower)).transpose();
  stddev->rowwise() = (static_cast<float>(options.initial_std_fraction) * range).transpose();
}

// One sequence of N(mean, stddev^2) with coloured noise along the horizon, projected into the
// limits. out: horizon * dim floats.
void DrawSequence(const ColoredNoise& noise, const RowMatrixXf& mean, const RowMatrixXf& stddev,
                  const SequenceLimits& limits, Rng* rng, float* out) {
  const int h = static_cast<int>(mean.rows()), d = static_cast<int>(mean.cols());
  for (int j = 0; j < d; ++j) noise.Sample([rng] { return rng->Normal(); }, out + j, d);
  for (int t = 0; t < h; ++t) {
    for (int j = 0; j < d; ++j) out[t * d + j] = mean(t, j) + stddev(t, j) * out[t * d + j];
  }
  limits.Project(out, h);
}

}  // namespace

ColoredNoise::ColoredNoise(int horizon, double beta) : basis_(horizon, horizon) {
  const int h = horizon;
  // Columns: the zero frequency, then cosine and sine of each k / h with 0 < 2k < h, then the
  // cosine of the Nyquist frequency when h is even. The zero and Nyquist columns carry
  // 1/sqrt(2) so that beta = 0 gives exactly independent steps (each interior frequency
  // stands for the pair k and h - k of the full spectrum).
  auto scale = [&](int k) { return std::pow(static_cast<double>(std::max(k, 1)) / h, -beta / 2.0); };
  int col = 0;
  for (int t = 0; t < h; ++t) basis_(t, col) = static_cast<float>(scale(0) / std::sqrt(2.0));
  ++col;
  for (int k = 1; 2 * k < h; ++k) {
    for (int t = 0; t < h; ++t) {
      const double angle = 2.0 * kPi * k * t / h;
      basis_(t, col) = static_cast<float>(scale(k) * std::cos(angle));
      basis_(t, col + 1) = static_cast<float>(scale(k) * std::sin(angle));
    }
    col += 2;
  }
  if (h % 2 == 0 && h > 1) {
    for (int t = 0; t < h; ++t) {
      basis_(t, col) = static_cast<float>(scale(h / 2) * (t % 2 == 0 ? 1.0 : -1.0) / std::sqrt(2.0));
    }
    ++col;
  }
  for (int t = 0; t < h; ++t) basis_.row(t).normalize();
}

SequenceLimits SequenceLimits::Box(Eigen::VectorXf lower, Eigen::VectorXf upper) {
  SequenceLimits limits;
  limits.lower = std::move(lower);
  limits.upper = std::move(upper);
  return limits;
}

absl::Status SequenceLimits::Validate() const {
  const int d = dim();
  if (d < 1) return absl::InvalidArgumentError("limits: lower has no values");
  if (upper.size() != d) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "limits: lower has %d values, upper has %d", d, upper.size()));
  }
  for (int j = 0; j < d; ++j) {
    if (!std::isfinite(lower[j]) || !std::isfinite(upper[j]) || !(lower[j] < upper[j])) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "limits: action %d has min %g and max %g; both must be finite with min < max", j,
          lower[j], upper[j]));
    }
  }
  if (max_step.size() != 0) {
    if (max_step.size() != d) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "limits: max_step has %d values, the action has %d", max_step.size(), d));
    }
    for (int j = 0; j < d; ++j) {
      if (!std::isfinite(max_step[j]) || max_step[j] < 0) {
        return absl::InvalidArgumentError(absl::StrFormat(
            "limits: max_step of action %d is %g; must be finite and >= 0", j, max_step[j]));
      }
    }
  }
  if (previous.size() != 0) {
    if (previous.size() != d) {
      return absl::InvalidArgumentError(absl::StrFormat(
          "previous_action has %d values, the action has %d", previous.size(), d));
    }
    for (int j = 0; j < d; ++j) {
      if (!(previous[j] >= lower[j] && previous[j] <= upper[j])) {
        return absl::InvalidArgumentError(absl::StrFormat(
            "previous_action[%d] is %g, outside the action's limits [%g, %g]", j, previous[j],
            lower[j], upper[j]));
      }
    }
  }
  return absl::OkStatus();
}

void SequenceLimits::Project(float* sequence, int horizon) const {
  const int d = dim();
  const bool rate = max_step.size() == d;
  for (int t = 0; t < horizon; ++t) {
    float* a = sequence + static_cast<std::ptrdiff_t>(t) * d;
    for (int j = 0; j < d; ++j) {
      float lo = lower[j], hi = upper[j];
      if (rate && max_step[j] > 0) {
        const float* before = t == 0 ? (previous.size() == d ? previous.data() : nullptr)
                                     : a - d;
        if (before != nullptr) {
          // The step before is within [lower, upper], so the intersection is never empty.
          lo = std::max(lo, before[j] - max_step[j]);
          hi = std::min(hi, before[j] + max_step[j]);
        }
      }
      // NaN goes to the lower bound rather than through.
      a[j] = a[j] >= lo ? std::min(a[j], hi) : lo;
      if (rate && max_step[j] > 0) {
        const float* before = t == 0 ? (previous.size() == d ? previous.data() : nullptr)
                                     : a - d;
        // before +- max_step was rounded to float: step back toward `before` until the exact
        // difference is within the limit (at most a few ulps).
        while (before != nullptr &&
               std::abs(static_cast<double>(a[j]) - before[j]) > static_cast<double>(max_step[j])) {
          a[j] = std::nextafter(a[j], before[j]);
        }
      }
    }
  }
}

absl::Status CemOptions::Validate() const {
  if (horizon < 1 || horizon > kMaxHorizon) {
    return absl::InvalidArgumentError(
        absl::StrFormat("horizon is %d, must be in 1..%d", horizon, kMaxHorizon));
  }
  if (population < 1 || population > kMaxPopulation) {
    return absl::InvalidArgumentError(
        absl::StrFormat("population is %d, must be in 1..%d", population, kMaxPopulation));
  }
  if (elites < 1 || elites > population) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "elites is %d, must be in [1, population %d]", elites, population));
  }
  if (iterations < 1 || iterations > kMaxIterations) {
    return absl::InvalidArgumentError(
        absl::StrFormat("iterations is %d, must be in 1..%d", iterations, kMaxIterations));
  }
  if (!(noise_beta >= 0.0 && noise_beta <= 10.0)) {
    return absl::InvalidArgumentError(absl::StrFormat("noise_beta is %g, must be in [0, 10]", noise_beta));
  }
  if (!(keep_fraction >= 0.0 && keep_fraction <= 1.0)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("keep_fraction is %g, must be in [0, 1]", keep_fraction));
  }
  if (!(population_decay >= 1.0 && std::isfinite(population_decay))) {
    return absl::InvalidArgumentError(
        absl::StrFormat("population_decay is %g, must be >= 1", population_decay));
  }
  if (!(momentum >= 0.0 && momentum < 1.0)) {
    return absl::InvalidArgumentError(absl::StrFormat("momentum is %g, must be in [0, 1)", momentum));
  }
  if (!(initial_std_fraction > 0.0 && std::isfinite(initial_std_fraction))) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "initial_std_fraction is %g, must be > 0", initial_std_fraction));
  }
  if (!(min_std_fraction >= 0.0 && min_std_fraction <= initial_std_fraction)) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "min_std_fraction is %g, must be in [0, initial_std_fraction %g]", min_std_fraction,
        initial_std_fraction));
  }
  return absl::OkStatus();
}

absl::StatusOr<RowMatrixXf> SampleFromPrior(const CemOptions& options,
                                           const SequenceLimits& limits) {
  if (absl::Status s = options.Validate(); !s.ok()) return s;
  if (absl::Status s = limits.Validate(); !s.ok()) return s;
  RowMatrixXf mean, stddev;
  InitialDistribution(options, limits, &mean, &stddev);
  Rng rng(options.seed);
  RowMatrixXf out(options.horizon, limits.dim());
  DrawSequence(ColoredNoise(options.horizon, options.noise_beta), mean, stddev, limits, &rng,
               out.data());
  return out;
}

absl::StatusOr<CemResult> MaximizeCem(const CemOptions& options, const SequenceLimits& limits,
                                      const ScoreFunction& score, const CemRun& run) {
  const CemWarmStart* const warm_start = run.warm_start;
  const int shift = run.shift;
  const absl::Time deadline = run.deadline;
  if (absl::Status s = options.Validate(); !s.ok()) return s;
  if (absl::Status s = limits.Validate(); !s.ok()) return s;
  if (shift < 0) return absl::InvalidArgumentError(absl::StrFormat("shift is %d, must be >= 0", shift));
  auto now = [&] { return run.now ? run.now() : absl::Now(); };

  const int h = options.horizon, d = limits.dim(), width = h * d, k_elites = options.elites;
  const Eigen::RowVectorXf min_std =
      (static_cast<float>(options.min_std_fraction) * (limits.upper - limits.lower)).transpose();

  RowMatrixXf mean, stddev;
  InitialDistribution(options, limits, &mean, &stddev);
  std::vector<RowMatrixXf> kept;
  const int keep = static_cast<int>(std::lround(options.keep_fraction * k_elites));
  const bool warm = warm_start != nullptr && warm_start->mean.rows() == h &&
                    warm_start->mean.cols() == d;
  if (warm) {
    mean = Shifted(warm_start->mean, shift);  // the spread stays the initial one
    for (const RowMatrixXf& e : warm_start->elites) {
      if (static_cast<int>(kept.size()) >= keep) break;
      if (e.rows() == h && e.cols() == d) {
        // The limits may have changed since (the previous action always does): project.
        kept.push_back(Shifted(e, shift));
        limits.Project(kept.back().data(), h);
      }
    }
  }

  const ColoredNoise noise(h, options.noise_beta);
  Rng rng(options.seed);

  CemResult result;
  result.best = mean;
  limits.Project(result.best.data(), h);
  result.best_score = -std::numeric_limits<float>::infinity();
  bool scored_finite = false;

  RowMatrixXf population;
  std::vector<float> scores;
  std::vector<int> order;
  RowMatrixXf elite_block(k_elites, width);
  double last_seconds = 0.0;
  int last_count = 0;
  for (int it = 0; it < options.iterations; ++it) {
    const int fresh = std::min(
        options.population,
        std::max(static_cast<int>(std::lround(options.population /
                                              std::pow(options.population_decay, it))),
                 2 * k_elites));
    const bool last = it == options.iterations - 1;
    const int count = static_cast<int>(kept.size()) + fresh + (last ? 1 : 0);
    if (it > 0 && now() + absl::Seconds(last_seconds * count / last_count) > deadline) break;
    const absl::Time start = now();

    population.resize(count, width);
    int row = 0;
    for (const RowMatrixXf& e : kept) {
      population.row(row++) = Eigen::Map<const Eigen::RowVectorXf>(e.data(), width);
    }
    for (int n = 0; n < fresh; ++n, ++row) {
      DrawSequence(noise, mean, stddev, limits, &rng, population.row(row).data());
    }
    if (last) {
      population.row(row) = Eigen::Map<const Eigen::RowVectorXf>(mean.data(), width);
      limits.Project(population.row(row).data(), h);
      ++row;
    }

    scores.assign(count, 0.0f);
    score(population.data(), count, scores.data());
    result.evaluations += count;
    for (float& s : scores) {
      if (std::isfinite(s)) {
        scored_finite = true;
      } else {
        s = -std::numeric_limits<float>::infinity();
      }
    }
    order.resize(count);
    std::iota(order.begin(), order.end(), 0);
    const int k = std::min(k_elites, count);
    std::partial_sort(order.begin(), order.begin() + k, order.end(),
                      [&](int a, int b) { return scores[a] > scores[b]; });
    if (scores[order[0]] > result.best_score) {
      result.best_score = scores[order[0]];
      result.best = Eigen::Map<const RowMatrixXf>(population.row(order[0]).data(), h, d);
    }

    elite_block.resize(k, width);
    for (int e = 0; e < k; ++e) elite_block.row(e) = population.row(order[e]);
    const Eigen::RowVectorXf fit_mean = elite_block.colwise().mean();
    const Eigen::RowVectorXf fit_std =
        ((elite_block.rowwise() - fit_mean).array().square().colwise().sum() / k).sqrt().matrix();
    const float m = static_cast<float>(options.momentum);
    Eigen::Map<Eigen::RowVectorXf> mean_flat(mean.data(), width);
    Eigen::Map<Eigen::RowVectorXf> std_flat(stddev.data(), width);
    mean_flat = m * mean_flat + (1.0f - m) * fit_mean;
    std_flat = m * std_flat + (1.0f - m) * fit_std;
    for (int t = 0; t < h; ++t) stddev.row(t) = stddev.row(t).cwiseMax(min_std);

    kept.clear();
    for (int e = 0; e < std::min(keep, k); ++e) {
      kept.push_back(Eigen::Map<const RowMatrixXf>(population.row(order[e]).data(), h, d));
    }
    result.next.elites.clear();
    for (int e = 0; e < k; ++e) {
      result.next.elites.push_back(Eigen::Map<const RowMatrixXf>(population.row(order[e]).data(), h, d));
    }
    ++result.iterations;
    last_seconds = absl::ToDoubleSeconds(now() - start);
    last_count = count;
  }
  if (!scored_finite) {
    return absl::FailedPreconditionError(
        "every candidate scored NaN or infinity: the model's predictions are not finite");
  }
  result.next.mean = mean;
  return result;
}

}  // namespace foray::plan
