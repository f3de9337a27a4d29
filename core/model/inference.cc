#include "core/model/inference.h"

#include <algorithm>
#include <atomic>
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

uint64_t NextId() {
  static std::atomic<uint64_t> next{1};
  return next.fetch_add(1, std::memory_order_relaxed);
}

// What a dense layer does after x W + b.
struct Epilogue {
  Activation activation = Activation::kSilu;
  bool activate = true;  // hidden layers; false for the output layer (bounded afterwards)
};

#if defined(__AVX512F__)
using Packet = __m512;

// e^x for x <= 88 (larger x is clamped there). Cody-Waite reduction x = n ln2 + f with
// |f| <= ln2/2, e^f from the Cephes single-precision polynomial (about 1 ulp), and 2^n applied
// with vscalefps, which also flushes very negative x to 0 without integer exponent tricks.
inline Packet Exp(Packet x) {
  x = _mm512_min_ps(x, _mm512_set1_ps(88.0f));
  x = _mm512_max_ps(x, _mm512_set1_ps(-104.0f));
  const Packet n = _mm512_roundscale_ps(_mm512_mul_ps(x, _mm512_set1_ps(1.44269504088896341f)),
                                        _MM_FROUND_TO_NEAREST_INT | _MM_FROUND_NO_EXC);
  Packet f = _mm512_fnmadd_ps(n, _mm512_set1_ps(0.693359375f), x);
  f = _mm512_fnmadd_ps(n, _mm512_set1_ps(-2.12194440e-4f), f);
  Packet p = _mm512_set1_ps(1.9875691500e-4f);
  p = _mm512_fmadd_ps(p, f, _mm512_set1_ps(1.3981999507e-3f));
  p = _mm512_fmadd_ps(p, f, _mm512_set1_ps(8.3334519073e-3f));
  p = _mm512_fmadd_ps(p, f, _mm512_set1_ps(4.1665795894e-2f));
  p = _mm512_fmadd_ps(p, f, _mm512_set1_ps(1.6666665459e-1f));
  p = _mm512_fmadd_ps(p, f, _mm512_set1_ps(5.0000001201e-1f));
  const Packet f2 = _mm512_mul_ps(f, f);
  p = _mm512_fmadd_ps(p, f2, _mm512_add_ps(f, _mm512_set1_ps(1.0f)));
  return _mm512_scalef_ps(p, n);
}

// The activation of a hidden layer, chosen at compile time so that the epilogue of a register
// tile is straight-line code on registers. kNone: the output layer (bounded afterwards).
enum class Act { kNone, kSilu, kRelu, kTanh };

template <Act A>
inline Packet Activate(Packet z) {
  if constexpr (A == Act::kSilu) {
    // z * sigmoid(z), with 1 / (1 + e^-z) from the 14-bit reciprocal and one Newton step
    // (relative error about 1e-7, below float rounding of the products around it). Exp clamps
    // its argument, so the reciprocal of a huge denominator stays finite.
    const Packet d = _mm512_add_ps(_mm512_set1_ps(1.0f), Exp(_mm512_sub_ps(_mm512_setzero_ps(), z)));
    Packet r = _mm512_rcp14_ps(d);
    r = _mm512_mul_ps(r, _mm512_fnmadd_ps(d, r, _mm512_set1_ps(2.0f)));
    return _mm512_mul_ps(z, r);
  } else if constexpr (A == Act::kRelu) {
    return _mm512_max_ps(z, _mm512_setzero_ps());
  } else if constexpr (A == Act::kTanh) {
    return Eigen::internal::ptanh(z);
  } else {
    return z;
  }
}

// y[r][c] for R rows and V vectors of 16 columns: act(sum_k x[r][k] w[k][c] + b[c]).
template <Act A, int R, int V>
void DenseTile(const float* x, int ldx, int k_count, const float* w, int ldw, const float* bias,
               float* y, int ldy) {
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
  for (int r = 0; r < R; ++r) {
    for (int v = 0; v < V; ++v) _mm512_storeu_ps(y + r * ldy + v * kLanes, Activate<A>(acc[r][v]));
  }
}

template <Act A, int R>
void DenseTileColumns(int vectors, const float* x, int ldx, int k_count, const float* w, int ldw,
                      const float* bias, float* y, int ldy) {
  switch (vectors) {
    case 1: return DenseTile<A, R, 1>(x, ldx, k_count, w, ldw, bias, y, ldy);
    case 2: return DenseTile<A, R, 2>(x, ldx, k_count, w, ldw, bias, y, ldy);
    case 3: return DenseTile<A, R, 3>(x, ldx, k_count, w, ldw, bias, y, ldy);
    default: return DenseTile<A, R, 4>(x, ldx, k_count, w, ldw, bias, y, ldy);
  }
}

template <Act A>
void DenseWith(const float* x, int ldx, int rows, int k_count, const float* w, int ldw,
               const float* bias, float* y, int ldy) {
  // Column blocks outside, rows inside: a block of weights stays in L1 across all rows.
  for (int c0 = 0; c0 < ldw; c0 += 4 * kLanes) {
    const int vectors = std::min(4, (ldw - c0) / kLanes);
    int r0 = 0;
    for (; r0 + kTileRows <= rows; r0 += kTileRows) {
      DenseTileColumns<A, kTileRows>(vectors, x + r0 * ldx, ldx, k_count, w + c0, ldw, bias + c0,
                                     y + r0 * ldy + c0, ldy);
    }
    const float* xr = x + r0 * ldx;
    float* yr = y + r0 * ldy + c0;
    switch (rows - r0) {
      case 1: DenseTileColumns<A, 1>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy); break;
      case 2: DenseTileColumns<A, 2>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy); break;
      case 3: DenseTileColumns<A, 3>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy); break;
      case 4: DenseTileColumns<A, 4>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy); break;
      case 5: DenseTileColumns<A, 5>(vectors, xr, ldx, k_count, w + c0, ldw, bias + c0, yr, ldy); break;
      default: break;
    }
  }
}

// y (rows, ldy) = epilogue(x (rows, ldx) * w (k_count, ldw) + bias), ldw a multiple of 16.
void Dense(const float* x, int ldx, int rows, int k_count, const float* w, int ldw,
           const float* bias, float* y, int ldy, const Epilogue& ep) {
  if (!ep.activate) return DenseWith<Act::kNone>(x, ldx, rows, k_count, w, ldw, bias, y, ldy);
  switch (ep.activation) {
    case Activation::kSilu: return DenseWith<Act::kSilu>(x, ldx, rows, k_count, w, ldw, bias, y, ldy);
    case Activation::kRelu: return DenseWith<Act::kRelu>(x, ldx, rows, k_count, w, ldw, bias, y, ldy);
    case Activation::kTanh: return DenseWith<Act::kTanh>(x, ldx, rows, k_count, w, ldw, bias, y, ldy);
  }
}

#else  // portable path: Eigen products on row-major maps

void Dense(const float* x, int ldx, int rows, int k_count, const float* w, int ldw,
           const float* bias, float* y, int ldy, const Epilogue& ep) {
  using RowMatrix = PackedEnsemble::RowMatrix;
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
  if (termination_head_ && term_logit != nullptr) {
    for (int r = 0; r < rows; ++r) term_logit[r] = in[static_cast<size_t>(r) * ld_in + 2 * d];
  }
  // Chua et al. 2018 bounds, over the contiguous (rows, d) block rather than per padded row
  // (every SIMD lane does useful work): lv = max - softplus(max - raw);
  // lv = min + softplus(lv - min), softplus(x) = max(x, 0) + ln(1 + e^-|x|).
  const size_t n = static_cast<size_t>(rows) * d;
  if (ws->bounds_of != id_ || ws->bound_max.size() != static_cast<Eigen::Index>(n)) {
    ws->bound_max = max_log_var_.replicate(rows, 1).array();
    ws->bound_min = min_log_var_.replicate(rows, 1).array();
    ws->bounds_of = id_;
    ws->softplus.resize(n);
  }
  // Computed in the workspace's own (aligned) arrays and copied out: Eigen splits an
  // expression over a caller's buffer into scalar and SIMD parts by the buffer's address, and
  // the scalar and SIMD exp and log may round differently; the result must not depend on where
  // the caller's buffer lies.
  Eigen::Map<Eigen::ArrayXf> lv(log_var, static_cast<Eigen::Index>(n));
  Eigen::ArrayXf& t = ws->softplus;
  t = ws->bound_max - lv;
  t = ws->bound_max - (t.max(0.0f) + (1.0f + (-t.abs()).exp()).log());
  t = t - ws->bound_min;
  t = ws->bound_min + (t.max(0.0f) + (1.0f + (-t.abs()).exp()).log());
  lv = t;
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
