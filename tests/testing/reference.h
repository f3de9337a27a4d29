// Test helpers for checks against outside references computed by Debian's Python (numpy,
// scipy, torch): run a reference script into a fresh folder and load the arrays it wrote.
// Not thread-safe (tests call them from the test's own thread).
#ifndef FORAY_TESTS_TESTING_REFERENCE_H_
#define FORAY_TESTS_TESTING_REFERENCE_H_

#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <map>
#include <sstream>
#include <string>

#include <unistd.h>

#include "Eigen/Core"

namespace foray::testing {

// A fresh, empty folder under the system temp folder for one test.
inline std::filesystem::path FreshDir(const std::string& name) {
  const std::filesystem::path dir =
      std::filesystem::temp_directory_path() / ("foray-ref-" + name + "-" +
                                                std::to_string(::getpid()));
  std::filesystem::remove_all(dir);
  std::filesystem::create_directories(dir);
  return dir;
}

// Runs `FORAY_PYTHON FORAY_SOURCE_DIR/<script> <args>`; returns the exit status (0 is success)
// and the combined output in *output.
inline int RunPython(const std::string& script, const std::string& args, std::string* output) {
  const std::string command = std::string(FORAY_PYTHON) + " " + FORAY_SOURCE_DIR + "/" + script +
                              " " + args + " 2>&1";
  FILE* pipe = ::popen(command.c_str(), "r");
  if (pipe == nullptr) return -1;
  char buf[4096];
  output->clear();
  size_t n;
  while ((n = std::fread(buf, 1, sizeof(buf), pipe)) > 0) output->append(buf, n);
  return ::pclose(pipe);
}

// Loads every array listed in dir/manifest.txt ("NAME ROWS COLS" lines, row-major float64
// little-endian NAME.bin files). Aborts the test binary on a malformed folder.
inline std::map<std::string, Eigen::MatrixXd> LoadArrays(const std::filesystem::path& dir) {
  std::map<std::string, Eigen::MatrixXd> arrays;
  std::ifstream manifest(dir / "manifest.txt");
  std::string name;
  long rows, cols;
  while (manifest >> name >> rows >> cols) {
    Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor> m(rows, cols);
    std::ifstream in(dir / (name + ".bin"), std::ios::binary);
    in.read(reinterpret_cast<char*>(m.data()), static_cast<std::streamsize>(sizeof(double) * rows * cols));
    if (!in) {
      std::fprintf(stderr, "reference array %s is truncated\n", name.c_str());
      std::abort();
    }
    arrays[name] = m;
  }
  return arrays;
}

// Largest |a - b| relative to the largest |b| of the block (floor `floor`): the comparison
// used for float32 results against a float64 reference.
inline double RelativeError(const Eigen::MatrixXd& a, const Eigen::MatrixXd& b,
                            double floor = 1e-3) {
  if (a.rows() != b.rows() || a.cols() != b.cols()) return INFINITY;
  return (a - b).cwiseAbs().maxCoeff() / std::max(floor, b.cwiseAbs().maxCoeff());
}

}  // namespace foray::testing

#endif  // FORAY_TESTS_TESTING_REFERENCE_H_
