#include "core/model/serialize.h"

#include <bit>
#include <cmath>
#include <cstdint>
#include <cstring>

#include "absl/strings/str_format.h"
#include "core/util/status_macros.h"

namespace foray::model {
namespace {

static_assert(std::endian::native == std::endian::little,
              "the ensemble byte format is written for little-endian machines");

constexpr char kMagic[8] = {'F', 'O', 'R', 'A', 'Y', 'E', 'N', 'S'};
// Format 2 adds a flag for the termination head after the hidden widths; format 1 (no head)
// is still read.
constexpr uint32_t kFormat = 2;

template <typename T>
void Put(std::string* out, T value) {
  char buf[sizeof(T)];
  std::memcpy(buf, &value, sizeof(T));
  out->append(buf, sizeof(T));
}

void PutFloats(std::string* out, const float* data, size_t count) {
  out->append(reinterpret_cast<const char*>(data), count * sizeof(float));
}

class Reader {
 public:
  explicit Reader(std::string_view bytes) : bytes_(bytes) {}

  template <typename T>
  absl::Status Get(const char* what, T* value) {
    if (bytes_.size() - pos_ < sizeof(T)) return Truncated(what);
    std::memcpy(value, bytes_.data() + pos_, sizeof(T));
    pos_ += sizeof(T);
    return absl::OkStatus();
  }

  absl::Status GetFloats(const char* what, float* data, size_t count) {
    if ((bytes_.size() - pos_) / sizeof(float) < count) return Truncated(what);
    std::memcpy(data, bytes_.data() + pos_, count * sizeof(float));
    pos_ += count * sizeof(float);
    return absl::OkStatus();
  }

  size_t remaining() const { return bytes_.size() - pos_; }

 private:
  absl::Status Truncated(const char* what) const {
    return absl::DataLossError(absl::StrFormat(
        "ensemble bytes end at offset %d while reading %s (%d bytes in all)", pos_, what,
        bytes_.size()));
  }

  std::string_view bytes_;
  size_t pos_ = 0;
};

}  // namespace

std::string SerializeEnsemble(const Ensemble& e) {
  std::string out(kMagic, sizeof(kMagic));
  Put<uint32_t>(&out, kFormat);
  Put<uint32_t>(&out, e.state_dim());
  Put<uint32_t>(&out, e.action_dim());
  Put<uint32_t>(&out, e.size());
  Put<uint32_t>(&out, static_cast<uint32_t>(e.activation()));
  Put<uint32_t>(&out, e.hidden_widths().size());
  for (int w : e.hidden_widths()) Put<uint32_t>(&out, w);
  Put<uint32_t>(&out, e.has_termination_head() ? 1 : 0);
  Put<uint64_t>(&out, e.version());
  PutFloats(&out, e.input_normalizer().mean().data(), e.input_dim());
  PutFloats(&out, e.input_normalizer().std().data(), e.input_dim());
  PutFloats(&out, e.output_normalizer().mean().data(), e.output_dim());
  PutFloats(&out, e.output_normalizer().std().data(), e.output_dim());
  PutFloats(&out, e.max_log_var().data(), e.output_dim());
  PutFloats(&out, e.min_log_var().data(), e.output_dim());
  PutFloats(&out, e.params().data(), e.params().size());
  return out;
}

absl::StatusOr<Ensemble> DeserializeEnsemble(std::string_view bytes) {
  if (bytes.size() < sizeof(kMagic) || std::memcmp(bytes.data(), kMagic, sizeof(kMagic)) != 0) {
    return absl::DataLossError("ensemble bytes do not start with the FORAYENS marker");
  }
  Reader r(bytes.substr(sizeof(kMagic)));
  uint32_t format = 0, state_dim = 0, action_dim = 0, members = 0, activation = 0, layers = 0;
  FORAY_RETURN_IF_ERROR(r.Get("format", &format));
  if (format != 1 && format != kFormat) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "ensemble format is %d, this build reads formats 1 and %d", format, kFormat));
  }
  FORAY_RETURN_IF_ERROR(r.Get("state_dim", &state_dim));
  FORAY_RETURN_IF_ERROR(r.Get("action_dim", &action_dim));
  FORAY_RETURN_IF_ERROR(r.Get("members", &members));
  FORAY_RETURN_IF_ERROR(r.Get("activation", &activation));
  FORAY_RETURN_IF_ERROR(r.Get("hidden layer count", &layers));
  if (layers > 8) {
    return absl::InvalidArgumentError(
        absl::StrFormat("ensemble has %d hidden layers, expected at most 8", layers));
  }
  EnsembleOptions options;
  options.ensemble_size = static_cast<int>(std::min<uint32_t>(members, 1u << 20));
  options.activation = static_cast<Activation>(activation);
  options.hidden_widths.resize(layers);
  for (uint32_t l = 0; l < layers; ++l) {
    uint32_t width = 0;
    FORAY_RETURN_IF_ERROR(r.Get("hidden width", &width));
    options.hidden_widths[l] = static_cast<int>(std::min<uint32_t>(width, 1u << 20));
  }
  options.termination_head = false;
  if (format >= 2) {
    uint32_t head = 0;
    FORAY_RETURN_IF_ERROR(r.Get("termination head flag", &head));
    if (head > 1) {
      return absl::InvalidArgumentError(
          absl::StrFormat("termination head flag is %d, expected 0 or 1", head));
    }
    options.termination_head = head == 1;
  }
  uint64_t version = 0;
  FORAY_RETURN_IF_ERROR(r.Get("version", &version));
  FORAY_ASSIGN_OR_RETURN(
      Ensemble e, Ensemble::Create(static_cast<int>(std::min<uint32_t>(state_dim, 1u << 20)),
                                   static_cast<int>(std::min<uint32_t>(action_dim, 1u << 20)),
                                   options, /*seed=*/0));
  e.set_version(version);
  FORAY_RETURN_IF_ERROR(
      r.GetFloats("input mean", e.mutable_input_normalizer().mutable_mean().data(), e.input_dim()));
  FORAY_RETURN_IF_ERROR(
      r.GetFloats("input std", e.mutable_input_normalizer().mutable_std().data(), e.input_dim()));
  FORAY_RETURN_IF_ERROR(r.GetFloats(
      "output mean", e.mutable_output_normalizer().mutable_mean().data(), e.output_dim()));
  FORAY_RETURN_IF_ERROR(r.GetFloats(
      "output std", e.mutable_output_normalizer().mutable_std().data(), e.output_dim()));
  FORAY_RETURN_IF_ERROR(
      r.GetFloats("max log-variance", e.mutable_max_log_var().data(), e.output_dim()));
  FORAY_RETURN_IF_ERROR(
      r.GetFloats("min log-variance", e.mutable_min_log_var().data(), e.output_dim()));
  FORAY_RETURN_IF_ERROR(
      r.GetFloats("parameters", e.mutable_params().data(), e.mutable_params().size()));
  if (r.remaining() != 0) {
    return absl::InvalidArgumentError(
        absl::StrFormat("ensemble bytes have %d bytes after the parameters", r.remaining()));
  }
  for (int k = 0; k < e.input_dim(); ++k) {
    const float s = e.input_normalizer().std()(k);
    if (!(s > 0) || !std::isfinite(s)) {
      return absl::InvalidArgumentError(
          absl::StrFormat("input std[%d] is %g, expected a positive finite number", k, s));
    }
  }
  for (int k = 0; k < e.output_dim(); ++k) {
    const float s = e.output_normalizer().std()(k);
    if (!(s > 0) || !std::isfinite(s)) {
      return absl::InvalidArgumentError(
          absl::StrFormat("output std[%d] is %g, expected a positive finite number", k, s));
    }
  }
  return e;
}

}  // namespace foray::model
