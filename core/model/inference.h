// PackedEnsemble: a read-only copy of an ensemble for the planner's hot path, its weights
// packed for the SIMD kernels (simd_kernels.h): re-laid row-major and padded to the widest SIMD
// width, each layer's product, bias and activation fused in one pass over register tiles, on the
// best target the CPU has (chosen at run time).
// Built once per published model version. Const methods are safe from several threads, each
// with its own Workspace.
//
//   PackedEnsemble packed(ensemble);
//   PackedEnsemble::Workspace ws;
//   packed.ForwardMember(b, x.data(), rows, mean.data(), log_var.data(), &ws);
#ifndef FORAY_CORE_MODEL_INFERENCE_H_
#define FORAY_CORE_MODEL_INFERENCE_H_

#include <cstdint>
#include <vector>

#include "core/model/ensemble.h"
#include "core/util/matrix.h"
#include "core/util/parallel.h"

namespace foray::model {

class PackedEnsemble {
 public:
  // Row-major float matrix storage used by the fast path.
  using RowMatrix = RowMatrixXf;

  // Per-thread scratch buffers; grow on first use and are reused afterwards.
  struct Workspace {
    Eigen::ArrayXf a, b;  // layer outputs, alternating (not zero-filled when they grow)
    // Log-variance bounds repeated over the rows of the last call, as e^-max and e^min when
    // the ensemble's bounds allow the one-step form, else as they are; bounds_of: the id of the
    // ensemble whose bounds they are (a workspace may outlive it).
    Eigen::ArrayXf bound_max, bound_min;
    uint64_t bounds_of = 0;
  };

  // Copyable and movable.
  explicit PackedEnsemble(const Ensemble& ensemble);

  int size() const { return members_; }
  int input_dim() const { return input_dim_; }
  int output_dim() const { return output_dim_; }

  // Member `member` at `rows` normalised inputs. x: (rows, input_dim) row-major, contiguous.
  // Writes mean and bounded log-variance, each (rows, output_dim) row-major, normalised
  // outputs: the same numbers as Ensemble::MemberForward up to float rounding. With a
  // termination head and term_logit not null, writes the head's logit (rows); without a
  // head, term_logit is left alone.
  void ForwardMember(int member, const float* x, int rows, float* mean, float* log_var,
                     Workspace* workspace, float* term_logit = nullptr) const;
  bool has_termination_head() const { return termination_head_; }

  // Every member at the same `rows` normalised inputs x (rows, input_dim), row-major. Writes
  // member b's mean and log-variance at mean + b * rows * output_dim (and likewise log_var),
  // each (rows, output_dim) row-major. Runs one task per member and block of up to kBlockRows
  // rows through `parallel`; the numbers do not depend on the split.
  static constexpr int kBlockRows = 512;
  // term_logit (may be null): member b's logits at term_logit + b * rows, with a head.
  void ForwardAll(const float* x, int rows, float* mean, float* log_var,
                  const ParallelFor& parallel, float* term_logit = nullptr) const;

 private:
  struct Layer {
    int fan_in = 0;       // real input width
    int fan_in_pad = 0;   // stride of the input rows
    int fan_out = 0;      // real output width
    int fan_out_pad = 0;  // multiple of simd::kPadFloats
    RowMatrix weights;    // (fan_in, fan_out_pad), zero-padded columns
    Eigen::VectorXf bias; // (fan_out_pad)
  };

  uint64_t id_ = 0;  // unique per construction (copies share it: same weights), never 0
  int members_ = 0;
  int input_dim_ = 0;
  int output_dim_ = 0;
  bool termination_head_ = false;  // the output layer's column 2 * output_dim is its logit
  Activation activation_ = Activation::kSilu;
  int widest_pad_ = 0;  // widest padded layer output: the row stride of the scratch buffers
  std::vector<std::vector<Layer>> layers_;  // [member][layer]
  // Learned log-variance bounds, (output_dim) each, normalised units.
  Eigen::VectorXf max_log_var_;
  Eigen::VectorXf min_log_var_;
  // Every bound within [-60, 60]: the bounds run in their one-step form
  // (simd::BoundLogVarFromExp).
  bool bounds_exp_ = false;
};

}  // namespace foray::model

#endif  // FORAY_CORE_MODEL_INFERENCE_H_
