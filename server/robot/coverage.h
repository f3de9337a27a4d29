// Visit counts of a robot's next states on a cells x cells grid over two state dimensions, for
// the progress view, kept up to date instead of recomputed over the whole dataset on every
// read. With configured ranges each state is binned once, when it is read the first time; with
// ranges from the data (none configured) the running minimum and maximum are kept as states
// arrive, and the counts are binned again only when the range has grown since the last read
// (often early, rarely once the robot has covered its space). Not thread-safe: the robot
// runtime's mutex guards it.
//
//   CoverageGrid grid;
//   grid.Add(next_state.data());                  // as each transition arrives
//   CoverageGrid::View v = grid.Read(config, next_states, state_dim);
#ifndef FORAY_SERVER_ROBOT_COVERAGE_H_
#define FORAY_SERVER_ROBOT_COVERAGE_H_

#include <cstddef>
#include <cstdint>
#include <vector>

namespace foray::robot {

class CoverageGrid {
 public:
  struct Settings {
    std::vector<int> indices;          // two state indices
    std::vector<double> lower, upper;  // two values each, or empty: from the data
    int cells = 20;
    bool operator==(const Settings&) const = default;
  };
  struct View {
    std::vector<double> lower, upper;  // the ranges the counts use
    std::vector<uint32_t> counts;      // cells x cells, row (first index) major
  };

  // Records one next state (state_dim values) for the running ranges. Call for every state
  // appended to the dataset, in order.
  void Add(const float* next_state, int state_dim);
  // The counts over the first `rows` states of `next_states` (rows x state_dim, the same states
  // given to Add, in order): the dataset is the runtime's own mirror, not copied here.
  View Read(const Settings& settings, const std::vector<float>& next_states, int state_dim);

 private:
  // Running minimum and maximum of every state dimension seen by Add.
  std::vector<float> min_, max_;
  // What the counts were binned with, and how many rows they hold.
  Settings binned_settings_;
  std::vector<double> binned_lower_, binned_upper_;
  std::vector<uint32_t> counts_;
  size_t binned_rows_ = 0;
};

}  // namespace foray::robot

#endif  // FORAY_SERVER_ROBOT_COVERAGE_H_
