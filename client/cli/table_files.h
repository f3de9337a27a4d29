// Transition tables of the foray CLI: CSV (a header row of column names, then one row per
// transition) and .npy (NumPy's array file, format version 1.0: a float64 array of shape
// (transitions, columns), C order). Both have the columns of TransitionColumns(). Files are
// written to FILE.partial and renamed, so a failed export leaves no half-written FILE.
// Stateless functions, safe from any thread.

#ifndef FORAY_CLIENT_CLI_TABLE_FILES_H_
#define FORAY_CLIENT_CLI_TABLE_FILES_H_

#include <string>
#include <vector>

#include "absl/status/status.h"
#include "absl/status/statusor.h"
#include "foray/v1/types.pb.h"

namespace foray::cli {

// seq, episode, step, state.<label>..., action.<label>..., next_state.<label>..., reward,
// terminal (0 or 1).
std::vector<std::string> TransitionColumns(const foray::v1::RobotSpec& spec);

absl::Status WriteTransitionsCsv(const std::string& path, const foray::v1::RobotSpec& spec,
                                 const std::vector<foray::v1::Transition>& transitions);
absl::Status WriteTransitionsNpy(const std::string& path, const foray::v1::RobotSpec& spec,
                                 const std::vector<foray::v1::Transition>& transitions);

// Reads a CSV in the export format. The header must name exactly the robot's columns;
// InvalidArgument names the line and column of the first value that does not parse.
absl::StatusOr<std::vector<foray::v1::Transition>> ReadTransitionsCsv(const std::string& path,
                                                                      const foray::v1::RobotSpec& spec);

}  // namespace foray::cli

#endif  // FORAY_CLIENT_CLI_TABLE_FILES_H_
