// The progress view's coverage grid, kept up to date as transitions arrive, against the
// definition computed from scratch over the whole dataset (what the runtime did on every read
// before): the same counts and ranges after every read, with configured ranges and with ranges
// from the data that grow as new extremes arrive.

#include "server/robot/coverage.h"

#include <algorithm>
#include <random>
#include <vector>

#include "gtest/gtest.h"

namespace foray::robot {
namespace {

// The definition: ranges from the settings or the data's min and max (an empty or flat range
// becomes [lo, lo + 1]), each state's cell by truncation, clamped to the grid.
CoverageGrid::View FromScratch(const CoverageGrid::Settings& s, const std::vector<float>& next,
                               int sd) {
  const size_t n = next.size() / sd;
  CoverageGrid::View v;
  v.lower = s.lower;
  v.upper = s.upper;
  if (v.lower.empty()) {
    v.lower = {0.0, 0.0};
    v.upper = {1.0, 1.0};
    for (int k = 0; k < 2 && n > 0; ++k) {
      float lo = next[s.indices[k]], hi = lo;
      for (size_t r = 1; r < n; ++r) {
        lo = std::min(lo, next[r * sd + s.indices[k]]);
        hi = std::max(hi, next[r * sd + s.indices[k]]);
      }
      v.lower[k] = lo;
      v.upper[k] = hi > lo ? hi : lo + 1.0;
    }
  }
  v.counts.assign(static_cast<size_t>(s.cells) * s.cells, 0);
  for (size_t r = 0; r < n; ++r) {
    int cell[2];
    for (int k = 0; k < 2; ++k) {
      const double u = (next[r * sd + s.indices[k]] - v.lower[k]) / (v.upper[k] - v.lower[k]);
      cell[k] = std::clamp(static_cast<int>(u * s.cells), 0, s.cells - 1);
    }
    ++v.counts[static_cast<size_t>(cell[0]) * s.cells + cell[1]];
  }
  return v;
}

void ExpectSameAsFromScratch(const CoverageGrid::Settings& settings) {
  constexpr int kStateDim = 3;
  std::mt19937 rng(7);
  std::normal_distribution<float> normal(0.0f, 1.0f);
  CoverageGrid grid;
  std::vector<float> next;
  for (int round = 0; round < 40; ++round) {
    // Rounds of growing spread: new extremes keep arriving, then fewer.
    const float spread = 1.0f + 0.1f * round;
    for (int i = 0; i < 25; ++i) {
      for (int k = 0; k < kStateDim; ++k) next.push_back(spread * normal(rng));
      grid.Add(&next[next.size() - kStateDim], kStateDim);
    }
    const CoverageGrid::View got = grid.Read(settings, next, kStateDim);
    const CoverageGrid::View want = FromScratch(settings, next, kStateDim);
    ASSERT_EQ(got.lower, want.lower) << "round " << round;
    ASSERT_EQ(got.upper, want.upper) << "round " << round;
    ASSERT_EQ(got.counts, want.counts) << "round " << round;
  }
}

TEST(CoverageGridTest, ConfiguredRangesGiveTheCountsOfTheWholeDataset) {
  ExpectSameAsFromScratch(
      {.indices = {0, 2}, .lower = {-2.0, -1.0}, .upper = {2.0, 3.0}, .cells = 20});
}

TEST(CoverageGridTest, RangesFromTheDataFollowNewExtremes) {
  ExpectSameAsFromScratch({.indices = {2, 1}, .lower = {}, .upper = {}, .cells = 13});
}

TEST(CoverageGridTest, ChangedSettingsAreBinnedAnew) {
  CoverageGrid grid;
  std::vector<float> next = {0.1f, 0.9f, 0.5f, 0.5f};
  grid.Add(&next[0], 2);
  grid.Add(&next[2], 2);
  CoverageGrid::Settings a{.indices = {0, 1}, .lower = {0.0, 0.0}, .upper = {1.0, 1.0}, .cells = 2};
  EXPECT_EQ(grid.Read(a, next, 2).counts, (std::vector<uint32_t>{0, 1, 0, 1}));
  CoverageGrid::Settings b = a;
  b.indices = {1, 0};
  EXPECT_EQ(grid.Read(b, next, 2).counts, (std::vector<uint32_t>{0, 0, 1, 1}));
}

}  // namespace
}  // namespace foray::robot
