#include "core/model/normalizer.h"

#include <cmath>

#include "absl/strings/str_format.h"

namespace foray::model {

template <typename Scalar>
Normalizer<Scalar>::Normalizer(int dim) : mean_(Vector::Zero(dim)), std_(Vector::Ones(dim)) {}

template <typename Scalar>
absl::Status Normalizer<Scalar>::Fit(const Matrix& rows, Scalar constant_std) {
  if (rows.cols() != dim()) {
    return absl::InvalidArgumentError(absl::StrFormat(
        "normaliser fit: data has %d columns, normaliser has %d", rows.cols(), dim()));
  }
  if (rows.rows() == 0) {
    return absl::InvalidArgumentError("normaliser fit: no rows");
  }
  // Two-pass in double: the data can have large offsets relative to its spread.
  const Eigen::MatrixXd data = rows.template cast<double>();
  const Eigen::VectorXd mean = data.colwise().mean().transpose();
  const Eigen::VectorXd var =
      (data.rowwise() - mean.transpose()).array().square().colwise().mean().transpose();
  for (int k = 0; k < dim(); ++k) {
    mean_(k) = static_cast<Scalar>(mean(k));
    const double s = std::sqrt(var(k));
    std_(k) = s < static_cast<double>(kMinStd) ? constant_std : static_cast<Scalar>(s);
  }
  return absl::OkStatus();
}

template <typename Scalar>
typename Normalizer<Scalar>::Matrix Normalizer<Scalar>::Apply(const Matrix& x) const {
  return ((x.rowwise() - mean_.transpose()).array().rowwise() / std_.transpose().array())
      .matrix();
}

template <typename Scalar>
typename Normalizer<Scalar>::Matrix Normalizer<Scalar>::Invert(const Matrix& z) const {
  return ((z.array().rowwise() * std_.transpose().array()).matrix().rowwise() +
          mean_.transpose());
}

template class Normalizer<float>;
template class Normalizer<double>;

}  // namespace foray::model
