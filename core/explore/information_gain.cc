#include "core/explore/information_gain.h"

#include <algorithm>
#include <cmath>
#include <type_traits>
#include <vector>

#include "Eigen/Core"
#include "absl/strings/str_format.h"
#include "core/explore/information_kernels.h"
#include "core/util/random.h"

namespace foray::explore {
namespace {

constexpr double kLog2Pi = 1.8378770664093454836;  // ln(2 pi)
constexpr double kLog4Pi = 2.5310242469692907930;  // ln(4 pi)

// The float estimators run on the SIMD kernels of information_kernels.h; what follows is the
// double path (the tests' reference for them). Rows are processed in blocks of kBlock, gathered
// member by member and dimension by dimension into contiguous arrays ("structure of arrays"), so
// that every formula below runs over a block of rows at once in SIMD (Eigen's vectorised exp
// and log).
constexpr int kBlock = 256;

template <typename Scalar>
using Array = Eigen::Array<Scalar, Eigen::Dynamic, 1>;

template <typename Scalar>
struct BlockGather {
  explicit BlockGather(const GaussianSet<Scalar>& set)
      : set(set), slots(static_cast<size_t>(set.members) * set.dim) {
    for (Slot& s : slots) {
      s.mu.resize(kBlock);
      s.lv.resize(kBlock);
      s.var.resize(kBlock);
      s.ivar.resize(kBlock);
    }
  }

  // Loads rows [first, first + n), n <= kBlock.
  void Load(int first, int n) {
    rows = n;
    for (int b = 0; b < set.members; ++b) {
      const Scalar* m = set.mean + b * set.member_stride + first * set.row_stride;
      const Scalar* l = set.log_var + b * set.member_stride + first * set.row_stride;
      for (int k = 0; k < set.dim; ++k) {
        Slot& s = at(b, k);
        for (int r = 0; r < n; ++r) {
          s.mu[r] = m[r * set.row_stride + k];
          s.lv[r] = l[r * set.row_stride + k];
        }
        s.var.head(n) = s.lv.head(n).exp();
        s.ivar.head(n) = (-s.lv.head(n)).exp();
      }
    }
  }

  struct Slot {
    Array<Scalar> mu, lv, var, ivar;  // (kBlock)
  };
  Slot& at(int b, int k) { return slots[static_cast<size_t>(b) * set.dim + k]; }

  const GaussianSet<Scalar>& set;
  std::vector<Slot> slots;
  int rows = 0;
};

// I_D over a block from the pairwise distances: ln B - (1/B) sum_i ln sum_j exp(-D_ij), with
// D_ii = 0 keeping every inner sum in [1, B] (no rescaling needed). `distance(i, j, out)` writes
// D_ij for the block's rows into out (i != j).
template <typename Scalar, typename Distance>
void PairwiseBlock(int members, int rows, Distance&& distance, Scalar* out) {
  Array<Scalar> d(rows), inner(rows), total = Array<Scalar>::Zero(rows);
  for (int i = 0; i < members; ++i) {
    inner.setOnes();
    for (int j = 0; j < members; ++j) {
      if (j == i) continue;
      distance(i, j, &d);
      inner += (-d).exp();
    }
    total += inner.log();
  }
  const Scalar log_b = static_cast<Scalar>(std::log(static_cast<double>(members)));
  Eigen::Map<Array<Scalar>>(out, rows) = (log_b - total / Scalar(members)).max(Scalar(0));
}

// I_D for every row: `distance(gather, n, i, j, out)` writes D_ij for the gathered block of n
// rows.
template <typename Scalar, typename Distance>
void PairwiseInformation(const GaussianSet<Scalar>& set, Scalar* out, Distance&& distance) {
  if (set.members == 1) {
    std::fill(out, out + set.rows, Scalar(0));
    return;
  }
  BlockGather<Scalar> g(set);
  for (int first = 0; first < set.rows; first += kBlock) {
    const int n = std::min(kBlock, set.rows - first);
    g.Load(first, n);
    PairwiseBlock<Scalar>(
        set.members, n, [&](int i, int j, Array<Scalar>* dist) { distance(g, n, i, j, dist); },
        out + first);
  }
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
  if constexpr (std::is_same_v<Scalar, float>) {
    simd::PairwiseKl(set, out);
    return;
  }
  Array<Scalar> diff(kBlock);
  auto distance = [&](BlockGather<Scalar>& g, int n, int i, int j, Array<Scalar>* dist) {
    dist->setZero();
    for (int k = 0; k < set.dim; ++k) {
      auto& si = g.at(i, k);
      auto& sj = g.at(j, k);
      diff.head(n) = si.mu.head(n) - sj.mu.head(n);
      *dist += sj.lv.head(n) - si.lv.head(n) +
               (si.var.head(n) + diff.head(n).square()) * sj.ivar.head(n) - Scalar(1);
    }
    *dist *= Scalar(0.5);
  };
  PairwiseInformation(set, out, distance);
}

template <typename Scalar>
void PairwiseBhattacharyyaInformation(const GaussianSet<Scalar>& set, Scalar* out) {
  if constexpr (std::is_same_v<Scalar, float>) {
    simd::PairwiseBhattacharyya(set, out);
    return;
  }
  Array<Scalar> diff(kBlock), sum(kBlock);
  // Symmetric: BD(i, j) = BD(j, i); computed both ways, which costs little at small B.
  auto distance = [&](BlockGather<Scalar>& g, int n, int i, int j, Array<Scalar>* dist) {
    dist->setZero();
    for (int k = 0; k < set.dim; ++k) {
      auto& si = g.at(i, k);
      auto& sj = g.at(j, k);
      diff.head(n) = si.mu.head(n) - sj.mu.head(n);
      sum.head(n) = si.var.head(n) + sj.var.head(n);
      // 1/2 ln(s / (2 sqrt(v_i v_j))) = 1/2 ln(s/2) - 1/4 (lv_i + lv_j)
      *dist += diff.head(n).square() / (Scalar(4) * sum.head(n)) +
               Scalar(0.5) * (Scalar(0.5) * sum.head(n)).log() -
               Scalar(0.25) * (si.lv.head(n) + sj.lv.head(n));
    }
  };
  PairwiseInformation(set, out, distance);
}

template <typename Scalar>
void JensenRenyi2Information(const GaussianSet<Scalar>& set, Scalar* out) {
  if constexpr (std::is_same_v<Scalar, float>) {
    simd::JensenRenyi2(set, out);
    return;
  }
  const int nb = set.members, d = set.dim;
  if (nb == 1) {
    std::fill(out, out + set.rows, Scalar(0));
    return;
  }
  BlockGather<Scalar> g(set);
  // ln N(mu_i; mu_j, diag(var_i + var_j)) for each unordered pair i <= j, (pairs, kBlock).
  const int pairs = nb * (nb + 1) / 2;
  std::vector<Array<Scalar>> log_overlap(pairs, Array<Scalar>(kBlock));
  Array<Scalar> sum(kBlock), quad(kBlock), log_det(kBlock), top(kBlock), acc(kBlock),
      component(kBlock);
  for (int first = 0; first < set.rows; first += kBlock) {
    const int n = std::min(kBlock, set.rows - first);
    g.Load(first, n);
    component.head(n).setZero();
    int pair = 0;
    for (int i = 0; i < nb; ++i) {
      for (int k = 0; k < d; ++k) component.head(n) += g.at(i, k).lv.head(n);
      for (int j = i; j < nb; ++j, ++pair) {
        quad.head(n).setZero();
        log_det.head(n).setZero();
        for (int k = 0; k < d; ++k) {
          auto& si = g.at(i, k);
          auto& sj = g.at(j, k);
          sum.head(n) = si.var.head(n) + sj.var.head(n);
          quad.head(n) += (si.mu.head(n) - sj.mu.head(n)).square() / sum.head(n);
          log_det.head(n) += sum.head(n).log();
        }
        log_overlap[pair].head(n) =
            Scalar(-0.5) * (Scalar(d * kLog2Pi) + log_det.head(n) + quad.head(n));
      }
    }
    // mean over members of H2(p_i) = d/2 ln(4 pi) + 1/2 sum_k ln var_ik
    component.head(n) = Scalar(0.5 * d * kLog4Pi) + Scalar(0.5) * component.head(n) / Scalar(nb);
    // ln sum over ordered pairs (i, j) of the overlaps: off-diagonal pairs count twice.
    top.head(n) = log_overlap[0].head(n);
    for (int p = 1; p < pairs; ++p) top.head(n) = top.head(n).max(log_overlap[p].head(n));
    acc.head(n).setZero();
    pair = 0;
    for (int i = 0; i < nb; ++i) {
      for (int j = i; j < nb; ++j, ++pair) {
        acc.head(n) += Scalar(i == j ? 1 : 2) * (log_overlap[pair].head(n) - top.head(n)).exp();
      }
    }
    const Scalar two_log_b = static_cast<Scalar>(2.0 * std::log(static_cast<double>(nb)));
    Eigen::Map<Array<Scalar>>(out + first, n) =
        (two_log_b - (top.head(n) + acc.head(n).log()) - component.head(n)).max(Scalar(0));
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
