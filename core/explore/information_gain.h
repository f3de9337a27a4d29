// Information gain of a predicted observation about the model: the mutual information between
// the observation and the (uniformly drawn) ensemble member, for B diagonal Gaussians per row,
// each estimator vectorised over rows. Pure functions: safe from several threads.
//
//   GaussianSet<float> set{.members = B, .rows = n, .dim = d, .mean = m, .log_var = lv,
//                          .member_stride = n * stride, .row_stride = stride};
//   std::vector<float> gain(n);
//   PairwiseKlInformation(set, gain.data());
#ifndef FORAY_CORE_EXPLORE_INFORMATION_GAIN_H_
#define FORAY_CORE_EXPLORE_INFORMATION_GAIN_H_

#include <cstddef>
#include <cstdint>

#include "absl/status/status.h"
#include "absl/strings/string_view.h"

namespace foray::explore {

enum class Estimator {
  kPairwiseKl = 1,             // upper bound on the mutual information
  kPairwiseBhattacharyya = 2,  // lower bound
  kJensenRenyi2 = 3,           // Jensen-Renyi divergence of order 2
  kMonteCarlo = 4,             // sampled Shannon mutual information (slow; reference use)
};

absl::string_view EstimatorName(Estimator estimator);

// A borrowed view of B diagonal Gaussians at each of `rows` rows, `dim` dimensions each.
// Component (b, r) has mean mean[b * member_stride + r * row_stride + k] and log-variance
// log_var[...same index...], k = 0..dim-1 (contiguous within a row). The caller owns the
// memory; units are any, as long as every member uses the same ones (every estimator here is
// invariant to one affine change of units applied to all members).
template <typename Scalar>
struct GaussianSet {
  int members = 0;
  int rows = 0;
  int dim = 0;
  const Scalar* mean = nullptr;
  const Scalar* log_var = nullptr;
  std::ptrdiff_t member_stride = 0;
  std::ptrdiff_t row_stride = 0;

  // InvalidArgument naming the field when a size is not positive or a pointer is missing.
  absl::Status Validate() const;
};

// Differential entropy of each member at each row, nats:
//   H(N(mu, diag(var))) = 1/2 sum_k ln(2 pi e var_k).
// out: (members, rows), out[b * rows + r].
template <typename Scalar>
void GaussianEntropy(const GaussianSet<Scalar>& set, Scalar* out);

// Pairwise-distance estimators of Kolchinsky & Tracey 2017, "Estimating Mixture Entropy with
// Pairwise Distances", Entropy 19(7):361, with uniform weights 1/B:
//   I_D = -(1/B) sum_i ln( (1/B) sum_j exp(-D(p_i || p_j)) ),     0 <= I_D <= ln B.
// With D = KL divergence
//   KL(p_i || p_j) = 1/2 sum_k [ ln(var_jk / var_ik) + var_ik / var_jk
//                                + (mu_ik - mu_jk)^2 / var_jk - 1 ]
// it is an upper bound on the mutual information I; with the Bhattacharyya distance
//   BD(p_i, p_j) = sum_k [ (mu_ik - mu_jk)^2 / (4 (var_ik + var_jk))
//                          + 1/2 ln( (var_ik + var_jk) / (2 sqrt(var_ik var_jk)) ) ]
// a lower bound. out: (rows), nats.
template <typename Scalar>
void PairwiseKlInformation(const GaussianSet<Scalar>& set, Scalar* out);
template <typename Scalar>
void PairwiseBhattacharyyaInformation(const GaussianSet<Scalar>& set, Scalar* out);

// Jensen-Renyi divergence of order 2 (Shyam et al. 2019, "Model-Based Active Exploration",
// ICML), with the quadratic Renyi entropy H2(p) = -ln int p(x)^2 dx in closed form:
//   JR2 = H2( (1/B) sum_i p_i ) - (1/B) sum_i H2(p_i),
//   H2(mixture) = -ln( (1/B^2) sum_ij N(mu_i; mu_j, diag(var_i + var_j)) ),
//   H2(p_i) = d/2 ln(4 pi) + 1/2 sum_k ln var_ik.
// Zero when all members agree. out: (rows), nats.
template <typename Scalar>
void JensenRenyi2Information(const GaussianSet<Scalar>& set, Scalar* out);

// Monte Carlo estimate of the Shannon mutual information
//   I = (1/B) sum_b E_{x ~ p_b}[ ln p_b(x) - ln p_mix(x) ],
// with `samples` draws per row split evenly over the members (stratified by member), computed
// in double precision. Deterministic under `seed`. out: (rows), nats.
template <typename Scalar>
void MonteCarloInformation(const GaussianSet<Scalar>& set, int samples, uint64_t seed,
                           Scalar* out);

// Dispatch by estimator. `samples` and `seed` are used by kMonteCarlo only.
template <typename Scalar>
void Information(Estimator estimator, const GaussianSet<Scalar>& set, Scalar* out,
                 int samples = 1000, uint64_t seed = 1);

}  // namespace foray::explore

#endif  // FORAY_CORE_EXPLORE_INFORMATION_GAIN_H_
