// Per-dimension affine normaliser: z = (x - mean) / std, fitted from data.
// A fitted normaliser is a value; reading it from several threads is safe, fitting is not.
//
//   Normalizer<float> n(3);
//   n.Fit(rows);                 // rows: (n, 3), a row per sample
//   Matrix z = n.Apply(rows);
#ifndef FORAY_CORE_MODEL_NORMALIZER_H_
#define FORAY_CORE_MODEL_NORMALIZER_H_

#include "Eigen/Core"
#include "absl/status/status.h"

namespace foray::model {

template <typename Scalar>
class Normalizer {
 public:
  using Matrix = Eigen::Matrix<Scalar, Eigen::Dynamic, Eigen::Dynamic>;
  using Vector = Eigen::Matrix<Scalar, Eigen::Dynamic, 1>;

  // Copyable and movable.
  Normalizer() = default;
  // Identity normaliser (mean 0, std 1) over `dim` dimensions.
  explicit Normalizer(int dim);

  // Sets mean and std from `rows` (n, dim), a row per sample; std is the population standard
  // deviation. A dimension whose std is below kMinStd (constant data) gets `constant_std`
  // instead: 1 (the default) passes an input through unscaled instead of blowing it up; for a
  // predicted quantity, kMinStd keeps what is denormalised (mean * std + mean, variance *
  // std^2) at the constant the data showed. Returns InvalidArgument on a column-count mismatch
  // or n == 0.
  absl::Status Fit(const Matrix& rows, Scalar constant_std = Scalar(1));

  // z = (x - mean) / std, row-wise. x: (n, dim).
  Matrix Apply(const Matrix& x) const;
  // x = z * std + mean, row-wise.
  Matrix Invert(const Matrix& z) const;

  int dim() const { return static_cast<int>(mean_.size()); }
  const Vector& mean() const { return mean_; }
  const Vector& std() const { return std_; }
  Vector& mutable_mean() { return mean_; }
  Vector& mutable_std() { return std_; }

  static constexpr Scalar kMinStd = Scalar(1e-6);

 private:
  Vector mean_;
  Vector std_;
};

}  // namespace foray::model

#endif  // FORAY_CORE_MODEL_NORMALIZER_H_
