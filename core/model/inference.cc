#include "core/model/inference.h"

#include <algorithm>
#include <atomic>
#include <cmath>

#include "core/model/simd_kernels.h"
#include "core/util/status_macros.h"

namespace foray::model {
namespace {

constexpr int kLanes = simd::kPadFloats;  // every padded row is a multiple of it

int PadTo(int n, int multiple) { return (n + multiple - 1) / multiple * multiple; }

uint64_t NextId() {
  static std::atomic<uint64_t> next{1};
  return next.fetch_add(1, std::memory_order_relaxed);
}

simd::Act ActOf(Activation a) {
  switch (a) {
    case Activation::kSilu: return simd::Act::kSilu;
    case Activation::kRelu: return simd::Act::kRelu;
    case Activation::kTanh: return simd::Act::kTanh;
  }
  return simd::Act::kSilu;
}

}  // namespace

PackedEnsemble::PackedEnsemble(const Ensemble& e)
    : id_(NextId()),
      members_(e.size()),
      input_dim_(e.input_dim()),
      output_dim_(e.output_dim()),
      termination_head_(e.has_termination_head()),
      activation_(e.activation()) {
  layers_.resize(members_);
  for (int b = 0; b < members_; ++b) {
    const float* p = e.params().col(b).data();
    for (int l = 0; l < e.num_layers(); ++l) {
      Layer layer;
      layer.fan_in = e.layer_fan_in(l);
      layer.fan_in_pad = l == 0 ? input_dim_ : PadTo(layer.fan_in, kLanes);
      layer.fan_out = e.layer_fan_out(l);
      layer.fan_out_pad = PadTo(layer.fan_out, kLanes);
      layer.weights = RowMatrix::Zero(layer.fan_in, layer.fan_out_pad);
      layer.weights.leftCols(layer.fan_out) =
          Eigen::Map<const Eigen::MatrixXf>(p + e.weight_offset(l), layer.fan_in, layer.fan_out);
      layer.bias = Eigen::VectorXf::Zero(layer.fan_out_pad);
      layer.bias.head(layer.fan_out) =
          Eigen::Map<const Eigen::VectorXf>(p + e.bias_offset(l), layer.fan_out);
      widest_pad_ = std::max(widest_pad_, layer.fan_out_pad);
      layers_[b].push_back(std::move(layer));
    }
  }
  max_log_var_ = e.max_log_var();
  min_log_var_ = e.min_log_var();
  // The one-step form needs the bounds well inside the range where it clamps v (see
  // simd::BoundLogVarFromExp); learned bounds are a few units in normalised outputs.
  constexpr float kExpBoundLimit = 60.0f;
  bounds_exp_ = max_log_var_.size() > 0 && max_log_var_.cwiseAbs().maxCoeff() <= kExpBoundLimit &&
                min_log_var_.cwiseAbs().maxCoeff() <= kExpBoundLimit;
}

void PackedEnsemble::ForwardMember(int member, const float* x, int rows, float* mean,
                                      float* log_var, Workspace* ws, float* term_logit) const {
  FORAY_CHECK(member >= 0 && member < members_, "member index out of range");
  const std::vector<Layer>& layers = layers_[member];
  const Eigen::Index need = static_cast<Eigen::Index>(rows) * widest_pad_;
  if (ws->a.size() < need) ws->a.resize(need);
  if (ws->b.size() < need) ws->b.resize(need);

  const float* in = x;
  int ld_in = input_dim_;
  float* out = ws->a.data();
  for (size_t l = 0; l < layers.size(); ++l) {
    const Layer& layer = layers[l];
    const simd::Act act = l + 1 < layers.size() ? ActOf(activation_) : simd::Act::kNone;
    simd::Dense(in, ld_in, rows, layer.fan_in, layer.weights.data(), layer.fan_out_pad,
                layer.bias.data(), out, layer.fan_out_pad, act);
    in = out;
    ld_in = layer.fan_out_pad;
    out = (out == ws->a.data()) ? ws->b.data() : ws->a.data();
  }
  const int d = output_dim_;
  for (int r = 0; r < rows; ++r) {
    const float* row = in + static_cast<size_t>(r) * ld_in;
    std::copy(row, row + d, mean + static_cast<size_t>(r) * d);
    std::copy(row + d, row + 2 * d, log_var + static_cast<size_t>(r) * d);
  }
  if (termination_head_ && term_logit != nullptr) {
    for (int r = 0; r < rows; ++r) term_logit[r] = in[static_cast<size_t>(r) * ld_in + 2 * d];
  }
  // Chua et al. 2018 bounds, over the contiguous (rows, d) block rather than per padded row
  // (every SIMD lane does useful work): lv = max - softplus(max - raw);
  // lv = min + softplus(lv - min), softplus(x) = max(x, 0) + ln(1 + e^-|x|); in one step from
  // e^-max and e^min where the bounds allow it (simd::BoundLogVarFromExp).
  const size_t n = static_cast<size_t>(rows) * d;
  if (ws->bounds_of != id_ || ws->bound_max.size() != static_cast<Eigen::Index>(n)) {
    if (bounds_exp_) {
      ws->bound_max = (-max_log_var_.array()).exp().replicate(rows, 1);
      ws->bound_min = min_log_var_.array().exp().replicate(rows, 1);
    } else {
      ws->bound_max = max_log_var_.replicate(rows, 1).array();
      ws->bound_min = min_log_var_.replicate(rows, 1).array();
    }
    ws->bounds_of = id_;
  }
  if (bounds_exp_) {
    simd::BoundLogVarFromExp(log_var, ws->bound_max.data(), ws->bound_min.data(), n);
  } else {
    simd::BoundLogVar(log_var, ws->bound_max.data(), ws->bound_min.data(), n);
  }
}

void PackedEnsemble::ForwardAll(const float* x, int rows, float* mean, float* log_var,
                                   const ParallelFor& parallel, float* term_logit) const {
  const int blocks = (rows + kBlockRows - 1) / kBlockRows;
  RunTasks(parallel, members_ * blocks, [&](int task) {
    const int b = task / blocks;
    const int r0 = (task % blocks) * kBlockRows;
    const size_t at = (static_cast<size_t>(b) * rows + r0) * output_dim_;
    // One workspace per thread, kept: a fresh one per task would allocate (and, at 128 kB and
    // more, map and fault in) its layer buffers for every block.
    thread_local Workspace ws;
    ForwardMember(b, x + static_cast<size_t>(r0) * input_dim_, std::min(kBlockRows, rows - r0),
                  mean + at, log_var + at, &ws,
                  term_logit == nullptr ? nullptr
                                        : term_logit + static_cast<size_t>(b) * rows + r0);
  });
}

}  // namespace foray::model
