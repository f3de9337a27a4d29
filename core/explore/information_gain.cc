#include "core/explore/information_gain.h"

#include <algorithm>
#include <cmath>
#include <vector>

#include "absl/strings/str_format.h"
#include "core/util/random.h"

namespace foray::explore {
namespace {

constexpr double kLog2Pi = 1.8378770664093454836;  // ln(2 pi)
constexpr double kLog4Pi = 2.5310242469692907930;  // ln(4 pi)

// Gathers row r of every member into contiguous (B, dim) blocks: mean, log-variance, variance
// and inverse variance.
template <typename Scalar>
struct RowGather {
  explicit RowGather(const GaussianSet<Scalar>& set)
      : set(set),
        mu(static_cast<size_t>(set.members) * set.dim),
        lv(mu.size()),
        var(mu.size()),
        ivar(mu.size()) {}

  void Load(int r) {
    const int d = set.dim;
    for (int b = 0; b < set.members; ++b) {
      const Scalar* m = set.mean + b * set.member_stride + r * set.row_stride;
      const Scalar* l = set.log_var + b * set.member_stride + r * set.row_stride;
      for (int k = 0; k < d; ++k) {
        mu[b * d + k] = m[k];
        lv[b * d + k] = l[k];
        var[b * d + k] = std::exp(l[k]);
        ivar[b * d + k] = std::exp(-l[k]);
      }
    }
  }

  const GaussianSet<Scalar>& set;
  std::vector<Scalar> mu, lv, var, ivar;
};

// I_D from the matrix of pairwise distances (B, B), row-major: ln B - (1/B) sum_i ln sum_j
// exp(-D_ij). D_ii = 0 keeps every inner sum in [1, B], so no rescaling is needed.
template <typename Scalar>
Scalar PairwiseEstimate(const std::vector<Scalar>& distance, int members) {
  double total = 0.0;
  for (int i = 0; i < members; ++i) {
    double inner = 0.0;
    for (int j = 0; j < members; ++j) inner += std::exp(-static_cast<double>(distance[i * members + j]));
    total += std::log(inner);
  }
  const double estimate = std::log(static_cast<double>(members)) - total / members;
  return static_cast<Scalar>(std::max(0.0, estimate));
}

}  // namespace

absl::string_view EstimatorName(Estimator estimator) {
  switch (estimator) {
    case Estimator::kPairwiseKl: return "pairwise_kl";
    case Estimator::kPairwiseBhattacharyya: return "pairwise_bhattacharyya";
    case Estimator::kJensenRenyi2: return "jensen_renyi_2";
    case Estimator::kMonteCarlo: return "monte_carlo";
  }
  return "unknown";
}

template <typename Scalar>
absl::Status GaussianSet<Scalar>::Validate() const {
  if (members < 1) return absl::InvalidArgumentError(absl::StrFormat("members is %d, must be >= 1", members));
  if (rows < 0) return absl::InvalidArgumentError(absl::StrFormat("rows is %d, must be >= 0", rows));
  if (dim < 1) return absl::InvalidArgumentError(absl::StrFormat("dim is %d, must be >= 1", dim));
  if (mean == nullptr || log_var == nullptr) {
    return absl::InvalidArgumentError("mean and log_var must both be set");
  }
  if (row_stride < dim) {
    return absl::InvalidArgumentError(
        absl::StrFormat("row_stride is %d, smaller than dim %d", row_stride, dim));
  }
  return absl::OkStatus();
}

template <typename Scalar>
void GaussianEntropy(const GaussianSet<Scalar>& set, Scalar* out) {
  for (int b = 0; b < set.members; ++b) {
    for (int r = 0; r < set.rows; ++r) {
      const Scalar* l = set.log_var + b * set.member_stride + r * set.row_stride;
      double sum = 0.0;
      for (int k = 0; k < set.dim; ++k) sum += l[k];
      out[b * set.rows + r] = static_cast<Scalar>(0.5 * (set.dim * (kLog2Pi + 1.0) + sum));
    }
  }
}

template <typename Scalar>
void PairwiseKlInformation(const GaussianSet<Scalar>& set, Scalar* out) {
  const int nb = set.members, d = set.dim;
  if (nb == 1) {
    std::fill(out, out + set.rows, Scalar(0));
    return;
  }
  RowGather<Scalar> g(set);
  std::vector<Scalar> distance(static_cast<size_t>(nb) * nb, Scalar(0));
  for (int r = 0; r < set.rows; ++r) {
    g.Load(r);
    for (int i = 0; i < nb; ++i) {
      const Scalar* mi = &g.mu[i * d];
      const Scalar* li = &g.lv[i * d];
      const Scalar* vi = &g.var[i * d];
      for (int j = 0; j < nb; ++j) {
        if (i == j) continue;
        const Scalar* mj = &g.mu[j * d];
        const Scalar* lj = &g.lv[j * d];
        const Scalar* ivj = &g.ivar[j * d];
        Scalar sum = 0;
        for (int k = 0; k < d; ++k) {
          const Scalar diff = mi[k] - mj[k];
          sum += lj[k] - li[k] + (vi[k] + diff * diff) * ivj[k] - Scalar(1);
        }
        distance[i * nb + j] = Scalar(0.5) * sum;
      }
    }
    out[r] = PairwiseEstimate(distance, nb);
  }
}

template <typename Scalar>
void PairwiseBhattacharyyaInformation(const GaussianSet<Scalar>& set, Scalar* out) {
  const int nb = set.members, d = set.dim;
  if (nb == 1) {
    std::fill(out, out + set.rows, Scalar(0));
    return;
  }
  RowGather<Scalar> g(set);
  std::vector<Scalar> distance(static_cast<size_t>(nb) * nb, Scalar(0));
  for (int r = 0; r < set.rows; ++r) {
    g.Load(r);
    for (int i = 0; i < nb; ++i) {
      for (int j = i + 1; j < nb; ++j) {
        Scalar sum = 0;
        for (int k = 0; k < d; ++k) {
          const Scalar diff = g.mu[i * d + k] - g.mu[j * d + k];
          const Scalar s = g.var[i * d + k] + g.var[j * d + k];
          // 1/2 ln(s / (2 sqrt(v_i v_j))) = 1/2 ln(s/2) - 1/4 (lv_i + lv_j)
          sum += diff * diff / (Scalar(4) * s) + Scalar(0.5) * std::log(Scalar(0.5) * s) -
                 Scalar(0.25) * (g.lv[i * d + k] + g.lv[j * d + k]);
        }
        distance[i * nb + j] = distance[j * nb + i] = sum;
      }
    }
    out[r] = PairwiseEstimate(distance, nb);
  }
}

template <typename Scalar>
void JensenRenyi2Information(const GaussianSet<Scalar>& set, Scalar* out) {
  const int nb = set.members, d = set.dim;
  if (nb == 1) {
    std::fill(out, out + set.rows, Scalar(0));
    return;
  }
  RowGather<Scalar> g(set);
  std::vector<double> log_overlap(static_cast<size_t>(nb) * nb);
  for (int r = 0; r < set.rows; ++r) {
    g.Load(r);
    // ln N(mu_i; mu_j, diag(var_i + var_j)), symmetric in i and j.
    double mean_component_h2 = 0.0;
    for (int i = 0; i < nb; ++i) {
      double sum_lv = 0.0;
      for (int k = 0; k < d; ++k) sum_lv += g.lv[i * d + k];
      mean_component_h2 += 0.5 * (d * kLog4Pi + sum_lv);
      for (int j = i; j < nb; ++j) {
        double quad = 0.0, log_det = 0.0;
        for (int k = 0; k < d; ++k) {
          const double diff = static_cast<double>(g.mu[i * d + k]) - g.mu[j * d + k];
          const double s = static_cast<double>(g.var[i * d + k]) + g.var[j * d + k];
          quad += diff * diff / s;
          log_det += std::log(s);
        }
        log_overlap[i * nb + j] = log_overlap[j * nb + i] = -0.5 * (d * kLog2Pi + log_det + quad);
      }
    }
    mean_component_h2 /= nb;
    const double top = *std::max_element(log_overlap.begin(), log_overlap.end());
    double sum = 0.0;
    for (double v : log_overlap) sum += std::exp(v - top);
    const double mixture_h2 = 2.0 * std::log(static_cast<double>(nb)) - (top + std::log(sum));
    out[r] = static_cast<Scalar>(std::max(0.0, mixture_h2 - mean_component_h2));
  }
}

template <typename Scalar>
void MonteCarloInformation(const GaussianSet<Scalar>& set, int samples, uint64_t seed,
                           Scalar* out) {
  const int nb = set.members, d = set.dim;
  if (nb == 1) {
    std::fill(out, out + set.rows, Scalar(0));
    return;
  }
  Rng rng(seed);
  const int per_member = std::max(1, samples / nb);
  std::vector<double> mu(static_cast<size_t>(nb) * d), sd(mu.size()), isd(mu.size());
  std::vector<double> log_norm(nb), log_density(nb), x(d);
  for (int r = 0; r < set.rows; ++r) {
    for (int b = 0; b < nb; ++b) {
      const Scalar* m = set.mean + b * set.member_stride + r * set.row_stride;
      const Scalar* l = set.log_var + b * set.member_stride + r * set.row_stride;
      double sum_lv = 0.0;
      for (int k = 0; k < d; ++k) {
        mu[b * d + k] = m[k];
        sd[b * d + k] = std::exp(0.5 * static_cast<double>(l[k]));
        isd[b * d + k] = 1.0 / sd[b * d + k];
        sum_lv += l[k];
      }
      log_norm[b] = -0.5 * (d * kLog2Pi + sum_lv);
    }
    double total = 0.0;
    for (int b = 0; b < nb; ++b) {
      for (int s = 0; s < per_member; ++s) {
        for (int k = 0; k < d; ++k) x[k] = mu[b * d + k] + sd[b * d + k] * rng.Normal();
        for (int j = 0; j < nb; ++j) {
          double q = 0.0;
          for (int k = 0; k < d; ++k) {
            const double z = (x[k] - mu[j * d + k]) * isd[j * d + k];
            q += z * z;
          }
          log_density[j] = log_norm[j] - 0.5 * q;
        }
        const double top = *std::max_element(log_density.begin(), log_density.end());
        double sum = 0.0;
        for (double v : log_density) sum += std::exp(v - top);
        const double log_mixture = top + std::log(sum) - std::log(static_cast<double>(nb));
        total += log_density[b] - log_mixture;
      }
    }
    out[r] = static_cast<Scalar>(total / (static_cast<double>(per_member) * nb));
  }
}

template <typename Scalar>
void Information(Estimator estimator, const GaussianSet<Scalar>& set, Scalar* out, int samples,
                 uint64_t seed) {
  switch (estimator) {
    case Estimator::kPairwiseKl: return PairwiseKlInformation(set, out);
    case Estimator::kPairwiseBhattacharyya: return PairwiseBhattacharyyaInformation(set, out);
    case Estimator::kJensenRenyi2: return JensenRenyi2Information(set, out);
    case Estimator::kMonteCarlo: return MonteCarloInformation(set, samples, seed, out);
  }
}

#define FORAY_INSTANTIATE(Scalar)                                                              \
  template struct GaussianSet<Scalar>;                                                         \
  template void GaussianEntropy(const GaussianSet<Scalar>&, Scalar*);                          \
  template void PairwiseKlInformation(const GaussianSet<Scalar>&, Scalar*);                    \
  template void PairwiseBhattacharyyaInformation(const GaussianSet<Scalar>&, Scalar*);         \
  template void JensenRenyi2Information(const GaussianSet<Scalar>&, Scalar*);                  \
  template void MonteCarloInformation(const GaussianSet<Scalar>&, int, uint64_t, Scalar*);     \
  template void Information(Estimator, const GaussianSet<Scalar>&, Scalar*, int, uint64_t);
FORAY_INSTANTIATE(float)
FORAY_INSTANTIATE(double)
#undef FORAY_INSTANTIATE

}  // namespace foray::explore
