#include "core/plan/value.h"

#include <algorithm>
#include <cmath>

#include "absl/strings/str_format.h"
#include "core/plan/value_kernels.h"

namespace foray::plan {
namespace {

// Rows of `group` kept at an even stride: `keep` of them (all when keep >= size), each
// weighted by size / keep.
void KeepEvenly(const std::vector<int>& group, int keep, std::vector<int>* rows,
                std::vector<float>* weights) {
  const int n = static_cast<int>(group.size());
  keep = std::min(keep, n);
  if (keep <= 0) return;
  const float weight = static_cast<float>(n) / static_cast<float>(keep);
  for (int k = 0; k < keep; ++k) {
    rows->push_back(group[static_cast<size_t>((static_cast<int64_t>(k) * n) / keep)]);
    weights->push_back(weight);
  }
}

}  // namespace

absl::Status ValueOptions::Validate() const {
  if (!(discount > 0.0 && discount < 1.0)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("value discount is %g, must be in (0, 1)", discount));
  }
  if (!std::isfinite(terminal_value)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("value terminal_value is %g, must be finite", terminal_value));
  }
  if (!(prior_weight > 0.0 && std::isfinite(prior_weight))) {
    return absl::InvalidArgumentError(
        absl::StrFormat("value prior_weight is %g, must be finite and > 0", prior_weight));
  }
  if (estimate != ValueEstimate::kAverage && estimate != ValueEstimate::kBest) {
    return absl::InvalidArgumentError("value estimate is neither average nor best");
  }
  if (max_points < 1 || max_points > 1000000) {
    return absl::InvalidArgumentError(
        absl::StrFormat("value max_points is %d, must be in 1..1000000", max_points));
  }
  return absl::OkStatus();
}

absl::StatusOr<std::vector<double>> ReturnsAfter(const std::vector<float>& rewards,
                                                 const std::vector<uint64_t>& episodes,
                                                 const std::vector<float>& terminals,
                                                 double discount, double terminal_value) {
  const size_t n = rewards.size();
  if (episodes.size() != n || (!terminals.empty() && terminals.size() != n)) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "returns: %d rewards, %d episode ids and %d terminal flags; each needs one per row", n,
        episodes.size(), terminals.size()));
  }
  std::vector<double> g(n, 0.0);
  // From the last row back: G_i = 0 at an episode's last row (an end, or its time limit),
  // else r_{i+1} + [i+1 ended it] V_term + gamma G_{i+1}.
  for (size_t i = n; i-- > 0;) {
    const bool last = i + 1 == n || episodes[i + 1] != episodes[i] ||
                      (!terminals.empty() && terminals[i] != 0.0f);
    if (last) continue;
    const bool next_ends = !terminals.empty() && terminals[i + 1] != 0.0f;
    g[i] = rewards[i + 1] + (next_ends ? terminal_value : 0.0) + discount * g[i + 1];
  }
  return g;
}

absl::StatusOr<StateValue> StateValue::Fit(const float* next_states, int rows, int state_dim,
                                           const std::vector<double>& returns,
                                           const ValueOptions& options) {
  if (absl::Status s = options.Validate(); !s.ok()) return s;
  if (rows < 1 || state_dim < 1) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "a state value needs at least one row and one state dimension; got %d rows of %d", rows,
        state_dim));
  }
  if (returns.size() != static_cast<size_t>(rows)) {
    return absl::InvalidArgumentError(
        absl::StrFormat("a state value got %d returns for %d rows", returns.size(), rows));
  }
  Eigen::Map<const RowMatrixXf> x(next_states, rows, state_dim);
  for (int i = 0; i < rows; ++i) {
    if (!x.row(i).allFinite() || !std::isfinite(returns[i])) {
      return absl::InvalidArgumentError(
          absl::StrFormat("a state value's row %d has a non-finite state or return", i));
    }
  }
  StateValue v;
  // Two passes in double, a row at a time (no copy of the rows: this runs under the robot's lock).
  Eigen::VectorXd mean = Eigen::VectorXd::Zero(state_dim), var = Eigen::VectorXd::Zero(state_dim);
  for (int i = 0; i < rows; ++i) mean += x.row(i).transpose().cast<double>();
  mean /= rows;
  for (int i = 0; i < rows; ++i) {
    var += (x.row(i).transpose().cast<double>() - mean).array().square().matrix();
  }
  var /= rows;
  v.mean_ = mean.cast<float>();
  v.inv_std_.resize(state_dim);
  // A dimension that never changed carries no distance (any state matches it).
  for (int k = 0; k < state_dim; ++k) {
    v.inv_std_[k] = var[k] > 1e-12 ? static_cast<float>(1.0 / std::sqrt(var[k])) : 0.0f;
  }
  std::vector<int> kept;
  std::vector<float> weights;
  if (options.estimate == ValueEstimate::kBest) {
    // Only a positive return can be the best; the largest first.
    for (int i = 0; i < rows; ++i) {
      if (returns[i] > 0.0) kept.push_back(i);
    }
    std::stable_sort(kept.begin(), kept.end(),
                     [&](int a, int b) { return returns[a] > returns[b]; });
    if (static_cast<int>(kept.size()) > options.max_points) kept.resize(options.max_points);
    weights.assign(kept.size(), 1.0f);
  } else {
    std::vector<int> moving, still;
    for (int i = 0; i < rows; ++i) (returns[i] != 0.0 ? moving : still).push_back(i);
    const int half = options.max_points / 2;
    const int moving_keep = std::max(half, options.max_points - static_cast<int>(still.size()));
    KeepEvenly(moving, moving_keep, &kept, &weights);
    KeepEvenly(still, options.max_points - static_cast<int>(kept.size()), &kept, &weights);
  }
  const int m = static_cast<int>(kept.size());
  // Padded to whole vectors of the kernel (value_kernels.h) with points of weight and value 0.
  const int padded = (m + kPadPoints - 1) / kPadPoints * kPadPoints;
  v.count_ = m;
  v.points_ = Eigen::MatrixXf::Zero(padded, state_dim);
  v.weight_ = Eigen::VectorXf::Zero(padded);
  v.value_ = Eigen::VectorXf::Zero(padded);
  for (int j = 0; j < m; ++j) {
    v.points_.row(j) = (x.row(kept[j]) - v.mean_.transpose()).cwiseProduct(v.inv_std_.transpose());
    v.weight_[j] = weights[j];
    v.value_[j] = static_cast<float>(returns[kept[j]]);
  }
  v.all_zero_ = (v.value_.array() == 0.0f).all();
  v.bandwidth_ = std::pow(static_cast<double>(rows), -1.0 / (state_dim + 4));
  v.inv_two_h2_ = static_cast<float>(1.0 / (2.0 * v.bandwidth_ * v.bandwidth_));
  v.prior_ = static_cast<float>(options.prior_weight);
  v.estimate_ = options.estimate;
  return v;
}

void StateValue::Evaluate(const float* states, int stride, int rows, float* out) const {
  if (all_zero_) {
    std::fill(out, out + rows, 0.0f);
    return;
  }
  const int d = state_dim();
  Eigen::VectorXf z(d);
  const int padded = static_cast<int>(points_.rows());
  for (int r = 0; r < rows; ++r) {
    const float* s = states + static_cast<std::ptrdiff_t>(r) * stride;
    for (int j = 0; j < d; ++j) z[j] = (s[j] - mean_[j]) * inv_std_[j];
    float weighted = 0.0f, total = 0.0f, best = 0.0f;
    simd::KernelSums(points_.data(), static_cast<size_t>(padded), padded, d, z.data(), inv_two_h2_,
                     weight_.data(), value_.data(), &weighted, &total, &best);
    out[r] = estimate_ == ValueEstimate::kBest ? best : weighted / (prior_ + total);
  }
}

}  // namespace foray::plan
