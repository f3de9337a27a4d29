// The dense matrix types Foray shares between layers: row-major float matrices are how
// sequences, batches and datasets are laid out (a row per step, sample or transition), so
// that a row is contiguous and maps onto the flat buffers the kernels and the wire use.
#ifndef FORAY_CORE_UTIL_MATRIX_H_
#define FORAY_CORE_UTIL_MATRIX_H_

#include "Eigen/Core"

namespace foray {

using RowMatrixXf = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;

}  // namespace foray

#endif  // FORAY_CORE_UTIL_MATRIX_H_
