// libFuzzer target over the foray CLI's spec-file reader: any bytes give a RobotSpec or an
// InvalidArgument naming what is wrong, never a crash.

#include <cstddef>
#include <cstdint>
#include <string>

#include "client/cli/spec_file.h"

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  const std::string text(reinterpret_cast<const char*>(data), size);
  absl::StatusOr<foray::v1::RobotSpec> spec = foray::cli::ParseSpecJson(text);
  if (!spec.ok() && spec.status().code() != absl::StatusCode::kInvalidArgument) __builtin_trap();
  return 0;
}
