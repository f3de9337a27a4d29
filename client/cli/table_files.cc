#include "client/cli/table_files.h"

#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstring>
#include <fstream>
#include "absl/strings/string_view.h"

#include "absl/strings/numbers.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_format.h"
#include "absl/strings/str_join.h"
#include "absl/strings/str_split.h"
#include "absl/strings/strip.h"

namespace foray::cli {
namespace {

namespace v1 = foray::v1;

std::vector<double> Row(const v1::Transition& t) {
  std::vector<double> row = {static_cast<double>(t.seq()), static_cast<double>(t.episode()),
                             static_cast<double>(t.step())};
  row.insert(row.end(), t.state().begin(), t.state().end());
  row.insert(row.end(), t.action().begin(), t.action().end());
  row.insert(row.end(), t.next_state().begin(), t.next_state().end());
  row.push_back(t.reward());
  row.push_back(t.terminal() ? 1.0 : 0.0);
  return row;
}

// Writes `bytes` to path.partial, then renames it over `path`.
absl::Status WriteWhole(const std::string& path, const std::string& bytes) {
  const std::string partial = path + ".partial";
  {
    std::ofstream out(partial, std::ios::binary | std::ios::trunc);
    if (!out) return absl::PermissionDeniedError(absl::StrCat("cannot write ", partial));
    out.write(bytes.data(), static_cast<std::streamsize>(bytes.size()));
    out.flush();
    if (!out) {
      std::remove(partial.c_str());
      return absl::DataLossError(absl::StrCat("writing ", partial, " failed (disk full?)"));
    }
  }
  if (std::rename(partial.c_str(), path.c_str()) != 0) {
    std::remove(partial.c_str());
    return absl::PermissionDeniedError(absl::StrCat("cannot rename ", partial, " to ", path));
  }
  return absl::OkStatus();
}

}  // namespace

std::vector<std::string> TransitionColumns(const v1::RobotSpec& spec) {
  std::vector<std::string> columns = {"seq", "episode", "step"};
  for (const auto& d : spec.state()) columns.push_back("state." + d.label());
  for (const auto& d : spec.action()) columns.push_back("action." + d.label());
  for (const auto& d : spec.state()) columns.push_back("next_state." + d.label());
  columns.push_back("reward");
  columns.push_back("terminal");
  return columns;
}

absl::Status WriteTransitionsCsv(const std::string& path, const v1::RobotSpec& spec,
                                 const std::vector<v1::Transition>& transitions) {
  std::string text = absl::StrCat(absl::StrJoin(TransitionColumns(spec), ","), "\n");
  for (const v1::Transition& t : transitions) {
    // %.17g: every double reads back bit-exact.
    absl::StrAppend(&text, absl::StrJoin(Row(t), ",", [](std::string* out, double v) {
                      absl::StrAppend(out, absl::StrFormat("%.17g", v));
                    }),
                    "\n");
  }
  return WriteWhole(path, text);
}

absl::Status WriteTransitionsNpy(const std::string& path, const v1::RobotSpec& spec,
                                 const std::vector<v1::Transition>& transitions) {
  const size_t columns = TransitionColumns(spec).size();
  // NPY 1.0: magic, version, little-endian uint16 header length, a Python dict literal padded
  // with spaces and ended by '\n' so that the data starts at a multiple of 64 bytes.
  std::string header = absl::StrFormat("{'descr': '<f8', 'fortran_order': False, 'shape': (%d, %d), }",
                                       transitions.size(), columns);
  const size_t unpadded = 10 + header.size() + 1;
  header.append((64 - unpadded % 64) % 64, ' ');
  header.push_back('\n');
  std::string bytes = "\x93NUMPY";
  bytes.push_back(1);
  bytes.push_back(0);
  bytes.push_back(static_cast<char>(header.size() & 0xff));
  bytes.push_back(static_cast<char>(header.size() >> 8));
  bytes += header;
  static_assert(sizeof(double) == 8);
  for (const v1::Transition& t : transitions) {
    const std::vector<double> row = Row(t);
    if (row.size() != columns) {
      return absl::InternalError(absl::StrFormat("transition seq %d has %d values, the spec %d columns",
                                                 t.seq(), row.size(), columns));
    }
    for (double v : row) {
      uint64_t raw;
      std::memcpy(&raw, &v, 8);
      for (int b = 0; b < 8; ++b) bytes.push_back(static_cast<char>((raw >> (8 * b)) & 0xff));
    }
  }
  return WriteWhole(path, bytes);
}

absl::StatusOr<std::vector<v1::Transition>> ReadTransitionsCsv(const std::string& path,
                                                               const v1::RobotSpec& spec) {
  std::ifstream in(path);
  if (!in) return absl::NotFoundError(absl::StrCat("cannot open ", path));
  const std::vector<std::string> columns = TransitionColumns(spec);
  std::string line;
  if (!std::getline(in, line)) return absl::InvalidArgumentError(absl::StrCat(path, " is empty"));
  const std::vector<std::string> header =
      absl::StrSplit(absl::StripTrailingAsciiWhitespace(line), ',');
  if (header != columns) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "%s: the header has %d columns (%s); robot \"%s\" needs %d: %s", path, header.size(),
        absl::StrJoin(header, ","), spec.name(), columns.size(), absl::StrJoin(columns, ",")));
  }
  const int sd = spec.state_size(), ad = spec.action_size();
  std::vector<v1::Transition> out;
  for (int number = 2; std::getline(in, line); ++number) {
    const absl::string_view text = absl::StripTrailingAsciiWhitespace(line);
    if (text.empty()) continue;
    const std::vector<absl::string_view> cells = absl::StrSplit(text, ',');
    if (cells.size() != columns.size()) {
      return absl::InvalidArgumentError(absl::StrFormat("%s line %d: %d values, the header has %d", path,
                                                        number, cells.size(), columns.size()));
    }
    std::vector<double> v(cells.size());
    for (size_t c = 0; c < cells.size(); ++c) {
      if (!absl::SimpleAtod(cells[c], &v[c]) || !std::isfinite(v[c])) {
        return absl::InvalidArgumentError(absl::StrFormat("%s line %d column %s: \"%s\" is not a finite number",
                                                          path, number, columns[c], cells[c]));
      }
    }
    for (int c : {0, 1, 2}) {
      const double top = c == 2 ? 4294967295.0 : 9007199254740992.0;  // uint32 step; 2^53
      if (v[c] < 0 || v[c] != std::floor(v[c]) || v[c] > top) {
        return absl::InvalidArgumentError(absl::StrFormat("%s line %d column %s: %g is not a whole number >= 0",
                                                          path, number, columns[c], v[c]));
      }
    }
    const double terminal = v.back();
    if (terminal != 0.0 && terminal != 1.0) {
      return absl::InvalidArgumentError(absl::StrFormat("%s line %d column terminal: %g is not 0 or 1", path,
                                                        number, terminal));
    }
    v1::Transition& t = out.emplace_back();
    t.set_seq(static_cast<uint64_t>(v[0]));
    t.set_episode(static_cast<uint64_t>(v[1]));
    t.set_step(static_cast<uint32_t>(v[2]));
    size_t k = 3;
    for (int i = 0; i < sd; ++i) t.add_state(v[k++]);
    for (int i = 0; i < ad; ++i) t.add_action(v[k++]);
    for (int i = 0; i < sd; ++i) t.add_next_state(v[k++]);
    t.set_reward(v[k++]);
    t.set_terminal(terminal == 1.0);
  }
  return out;
}

}  // namespace foray::cli
