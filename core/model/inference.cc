#include "core/model/inference.h"

#include <algorithm>
#include <cmath>

#include "core/util/status_macros.h"

#if defined(__AVX512F__)
#include <immintrin.h>
#endif

namespace foray::model {
namespace {

constexpr int kLanes = 16;   // floats per 512-bit vector
constexpr int kTileRows = 6; // rows per register tile: 6 x 4 accumulators + 4 weight vectors

int PadTo(int n, int multiple) { return (n + multiple - 1) / multiple * multiple; }

// What a dense layer does after x W + b.
struct Epilogue {
  Activation activation = Activation::kSilu;
  bool activate = true;  // hidden layers; false for the output layer (bounded afterwards)
};

#if defined(__AVX512F__)
using Packet = __m512;

inline Packet Activate(Activation activation, Packet z) {
  switch (activation) {
    case Activation::kSilu: {
      // z * sigmoid(z), with 1 / (1 + e^-z) from the 14-bit reciprocal and one Newton step
      // (relative error about 1e-7, below float rounding of the products around it). The
      // exponent is clamped so that the reciprocal of a huge denominator stays finite.
      const Packet one = _mm512_set1_ps(1.0f);
      const Packet two = _mm512_set1_ps(2.0f);
      const Packet neg = _mm512_min_ps(_mm512_sub_ps(_mm512_setzero_ps(), z), _mm512_set1_ps(80.0f));
      const Packet d = _mm512_add_ps(one, Eigen::internal::pexp(neg));
      Packet r = _mm512_rcp14_ps(d);
      r = _mm512_mul_ps(r, _mm512_fnmadd_ps(d, r, two));
      return _mm512_mul_ps(z, r);
    }
    case Activation::kRelu:
      return _mm512_max_ps(z, _mm512_setzero_ps());
    case Activation::kTanh:
      return Eigen::internal::ptanh(z);
  }
  return z;
}

// y[r][c] for R rows and V vectors of 16 columns: act(sum_k x[r][k] w[k][c] + b[c]).
template <int R, int V>
void DenseTile(const float* x, int ldx, int k_count, const float* w, int ldw, const float* bias,
               float* y, int ldy, const Epilogue& ep) {
  Packet acc[R][V];
  for (int v = 0; v < V; ++v) {
    const Packet b = _mm512_loadu_ps(bias + v * kLanes);
    for (int r = 0; r < R; ++r) acc[r][v] = b;
  }
  for (int k = 0; k < k_count; ++k) {
    Packet wv[V];
    for (int v = 0; v < V; ++v) wv[v] = _mm512_loadu_ps(w + k * ldw + v * kLanes);
    for (int r = 0; r < R; ++r) {
      const Packet xb = _mm512_set1_ps(x[r * ldx + k]);
      for (int v = 0; v < V; ++v) acc[r][v] = _mm512_fmadd_ps(xb, wv[v], acc[r][v]);
    }
  }
  for (int v = 0; v < V; ++v) {
    if (ep.activate) {
      for (int r = 0; r < R; ++r) acc[r][v] = Activate(ep.activation, acc[r][v]);
    }
    for (int r = 0; r < R; ++r) _mm512_storeu_ps(y + r * ldy + v * kLanes, acc[r][v]);
  }
}

template <int R>
void DenseTileColumns(int vectors, const float* x, int ldx, int k_count, const float* w, int ldw,
                      const float* bias, float* y, int ldy, const Epilogue& ep) {
  switch (vectors) {
    case 1: return DenseTile<R, 1>(x, ldx, k_count, w, ldw, bias, y, ldy, ep);
    case 2: return DenseTile<R, 2>(x, ldx, k_count, w, ldw, bias, y, ldy, ep);
    case 3: return DenseTile<R, 3>(x, ldx, k_count, w, ldw, bias, y, ldy, ep);
    default: return DenseTile<R, 4>(x, ldx, k_count, w, ldw, bias, y, ldy, ep);
  }
}

// y (rows, ldy) = epilogue(x (rows, ldx) * w (k_count, ldw) + bias), ldw a multiple of 16.
void Dense(const float* x, int ldx, int rows, int k_count, const float* w, int ldw,
           const float* bias, float* y, int ldy, const Epilogue& ep) {
  // Column blocks outside, rows inside: a block of weights stays in L1 across all rows.
  for (int c0 = 0; c0 < ldw; c0 += 4 * kLanes) {
    const int vectors = std::min(4, (ldw - c0) / kLanes);
    int r0 = 0;
    for (; r0 + kTileRows <= rows; r0 += kTileRows) {
      DenseTileColumns<kTileRows>(vectors, x + r0 * ldx, ldx, k_count, w + c0, ldw, bias + c0,
                                  y + r0 * ldy + c0, ldy, ep);
    }
    const float* xr = x + r0 * ldx;
    float* yr = y + r0 * ldy + c0;
    switch (rows - r0) {
      case 1: DenseTileColumns<1>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy, ep); break;
      case 2: DenseTileColumns<2>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy, ep); break;
      case 3: DenseTileColumns<3>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy, ep); break;
      case 4: DenseTileColumns<4>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy, ep); break;
      case 5: DenseTileColumns<5>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy, ep); break;
      default: break;
    }
  }
}

#else  // portable path: Eigen products on row-major maps

void Dense(const float* x, int ldx, int rows, int k_count, const float* w, int ldw,
           const float* bias, float* y, int ldy, const Epilogue& ep) {
  using RowMatrix = InferenceEnsemble::RowMatrix;
  using Stride = Eigen::OuterStride<>;
  const Eigen::Map<const RowMatrix, 0, Stride> xm(x, rows, k_count, Stride(ldx));
  const Eigen::Map<const RowMatrix> wm(w, k_count, ldw);
  Eigen::Map<RowMatrix, 0, Stride> ym(y, rows, ldw, Stride(ldy));
  ym.noalias() = xm * wm;
  ym.rowwise() += Eigen::Map<const Eigen::RowVectorXf>(bias, ldw);
  auto a = ym.array();
  if (ep.activate) {
    switch (ep.activation) {
      case Activation::kSilu: a = a / (1.0f + (-a).exp()); break;
      case Activation::kRelu: a = a.max(0.0f); break;
      case Activation::kTanh: a = a.tanh(); break;
    }
  }
}

#endif

}  // namespace

InferenceEnsemble::InferenceEnsemble(const Ensemble& e)
    : members_(e.size()),
      input_dim_(e.input_dim()),
      output_dim_(e.output_dim()),
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
}

void InferenceEnsemble::ForwardMember(int member, const float* x, int rows, float* mean,
                                      float* log_var, Workspace* ws) const {
  FORAY_CHECK(member >= 0 && member < members_, "member index out of range");
  const std::vector<Layer>& layers = layers_[member];
  const size_t need = static_cast<size_t>(rows) * widest_pad_;
  if (ws->a.size() < need) ws->a.resize(need);
  if (ws->b.size() < need) ws->b.resize(need);

  const float* in = x;
  int ld_in = input_dim_;
  float* out = ws->a.data();
  for (size_t l = 0; l < layers.size(); ++l) {
    const Layer& layer = layers[l];
    Epilogue ep;
    ep.activation = activation_;
    ep.activate = l + 1 < layers.size();
    Dense(in, ld_in, rows, layer.fan_in, layer.weights.data(), layer.fan_out_pad,
          layer.bias.data(), out, layer.fan_out_pad, ep);
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
  // Chua et al. 2018 bounds, over the contiguous (rows, d) block rather than per padded row
  // (every SIMD lane does useful work): lv = max - softplus(max - raw);
  // lv = min + softplus(lv - min), softplus(x) = max(x, 0) + ln(1 + e^-|x|).
  const size_t n = static_cast<size_t>(rows) * d;
  if (ws->bound_max.size() != static_cast<Eigen::Index>(n)) {
    ws->bound_max = max_log_var_.replicate(rows, 1).array();
    ws->bound_min = min_log_var_.replicate(rows, 1).array();
    ws->softplus.resize(n);
  }
  Eigen::Map<Eigen::ArrayXf> lv(log_var, static_cast<Eigen::Index>(n));
  Eigen::ArrayXf& t = ws->softplus;
  t = ws->bound_max - lv;
  lv = ws->bound_max - (t.max(0.0f) + (1.0f + (-t.abs()).exp()).log());
  t = lv - ws->bound_min;
  lv = ws->bound_min + (t.max(0.0f) + (1.0f + (-t.abs()).exp()).log());
}

}  // namespace foray::model
