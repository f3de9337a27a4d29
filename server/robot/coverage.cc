#include "server/robot/coverage.h"

#include <algorithm>

namespace foray::robot {

void CoverageGrid::Add(const float* next_state, int state_dim) {
  if (min_.empty()) {
    min_.assign(next_state, next_state + state_dim);
    max_ = min_;
    return;
  }
  for (int k = 0; k < state_dim; ++k) {
    min_[k] = std::min(min_[k], next_state[k]);
    max_[k] = std::max(max_[k], next_state[k]);
  }
}

CoverageGrid::View CoverageGrid::Read(const Settings& settings,
                                      const std::vector<float>& next_states, int state_dim) {
  const size_t rows = state_dim > 0 ? next_states.size() / state_dim : 0;
  const int cells = settings.cells;
  View v;
  v.lower = settings.lower;
  v.upper = settings.upper;
  if (v.lower.empty()) {
    v.lower = {0.0, 0.0};
    v.upper = {1.0, 1.0};
    for (int k = 0; k < 2 && !min_.empty(); ++k) {
      const float lo = min_[settings.indices[k]], hi = max_[settings.indices[k]];
      v.lower[k] = lo;
      v.upper[k] = hi > lo ? hi : lo + 1.0;
    }
  }
  if (!(settings == binned_settings_) || v.lower != binned_lower_ || v.upper != binned_upper_ ||
      rows < binned_rows_) {
    binned_settings_ = settings;
    binned_lower_ = v.lower;
    binned_upper_ = v.upper;
    counts_.assign(static_cast<size_t>(cells) * cells, 0);
    binned_rows_ = 0;
  }
  for (size_t r = binned_rows_; r < rows; ++r) {
    int cell[2];
    for (int k = 0; k < 2; ++k) {
      const double x = next_states[r * state_dim + settings.indices[k]];
      const double u = (x - v.lower[k]) / (v.upper[k] - v.lower[k]);
      cell[k] = std::clamp(static_cast<int>(u * cells), 0, cells - 1);
    }
    ++counts_[static_cast<size_t>(cell[0]) * cells + cell[1]];
  }
  binned_rows_ = rows;
  v.counts = counts_;
  return v;
}

}  // namespace foray::robot
