#pragma once
// Internal: forced measurement with an optional pixel mask (nonzero = excluded).
#include "skerry/forced.h"

namespace skerry::detail {

std::vector<ForcedMeasurement> forced_measure_masked(const ImageF& image, const ImageF& rms,
                                                     double rms_scalar, const PixelSky& wcs,
                                                     const Beam& beam,
                                                     const std::vector<ForcedSource>& sources,
                                                     const MaskU8* mask,
                                                     const ForcedOptions& options);

/// sum_ij g_k(i) g_l(j) rho_ij in the continuous limit [pix^2 units], for
/// unit-peak Gaussians of pixel covariances ck, cl whose centres differ by d, and
/// a noise correlation of covariance cb (forced.h).
double correlated_overlap(const Eigen::Matrix2d& ck, const Eigen::Matrix2d& cl,
                          const Eigen::Matrix2d& cb, const Eigen::Vector2d& d);

}  // namespace skerry::detail
