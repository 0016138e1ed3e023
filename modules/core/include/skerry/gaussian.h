#pragma once
/// Elliptical Gaussian shapes as 2x2 covariance matrices.
///
/// A shape (major FWHM M, minor FWHM m, PA phi east of north) is represented on
/// the local tangent plane with x towards east and y towards north by
///   C = 1/(8 ln 2) * R diag(M^2, m^2) R^T,  major-axis unit vector (sin phi, cos phi)
/// (REF-DECONV-01 covariance form, Wild 1970, Aust. J. Phys. 23, 113).
/// Convolution adds covariances; deconvolution subtracts them in one frame.
#include <Eigen/Core>
#include <optional>

#include "skerry/image.h"

namespace skerry {

struct Ellipse {
  double maj = 0.0;     ///< major-axis FWHM (any angular unit; arcsec in catalogues)
  double min = 0.0;     ///< minor-axis FWHM (same unit)
  double pa_deg = 0.0;  ///< position angle east of north in [0, 180) [deg]
};

inline Ellipse to_ellipse(const Beam& b) { return {b.maj_arcsec, b.min_arcsec, b.pa_deg}; }
inline Beam to_beam(const Ellipse& e) { return {e.maj, e.min, e.pa_deg}; }

/// Covariance (east, north) of an ellipse given by FWHMs [unit^2].
Eigen::Matrix2d ellipse_to_cov(const Ellipse& e);
/// Inverse of ellipse_to_cov; negative eigenvalues are clamped to zero (use
/// deconvolve() to learn whether a difference is positive definite).
Ellipse cov_to_ellipse(const Eigen::Matrix2d& c);
/// Gaussian convolution: covariances add (REF-CONV-01).
Ellipse convolve(const Ellipse& a, const Ellipse& b);

/// Result of removing the beam from a fitted (beam-convolved) shape.
struct Deconvolved {
  Ellipse shape;             ///< intrinsic shape; an axis with no positive extent is 0
  bool resolved_major = false;
  bool resolved_minor = false;
  double eig_major = 0.0;    ///< larger eigenvalue of C_fit - C_beam, as FWHM^2 (may be <= 0)
  double eig_minor = 0.0;    ///< smaller eigenvalue, as FWHM^2 (may be negative)
};
/// C_source = C_fit - C_beam; M^2, m^2 = (8 ln 2) eigenvalues (REF-DECONV-01).
Deconvolved deconvolve(const Ellipse& fitted, const Ellipse& beam);

/// Kernel that takes beam a to beam b: C_b - C_a (REF-CONV-02). Empty when
/// either eigenvalue is below min_eig_fwhm2 (b not strictly larger than a).
std::optional<Ellipse> convolution_kernel(const Ellipse& from, const Ellipse& to,
                                          double min_eig_fwhm2 = 0.0);

/// Wrap a position angle into [0, 180) degrees.
double wrap_pa_180(double pa_deg);
/// Wrap a direction into [0, 360) degrees.
double wrap_deg_360(double deg);

}  // namespace skerry
