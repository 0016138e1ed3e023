#include "skerry/gaussian.h"

#include <Eigen/Eigenvalues>
#include <cmath>

#include "skerry/constants.h"

namespace skerry {

namespace {
const double k8Ln2 = 8.0 * kLn2;
}

double wrap_pa_180(double pa_deg) {
  double r = std::fmod(pa_deg, 180.0);
  if (r < 0) r += 180.0;
  if (r >= 180.0) r -= 180.0;
  return r;
}

double wrap_deg_360(double deg) {
  double r = std::fmod(deg, 360.0);
  if (r < 0) r += 360.0;
  if (r >= 360.0) r -= 360.0;
  return r;
}

Eigen::Matrix2d ellipse_to_cov(const Ellipse& e) {
  const double phi = e.pa_deg * kDegToRad;
  const double s = std::sin(phi), c = std::cos(phi);
  const double M2 = e.maj * e.maj, m2 = e.min * e.min;
  Eigen::Matrix2d C;
  C(0, 0) = M2 * s * s + m2 * c * c;
  C(1, 1) = M2 * c * c + m2 * s * s;
  C(0, 1) = C(1, 0) = (M2 - m2) * s * c;
  return C / k8Ln2;
}

namespace {
// Eigen-decomposition of a symmetric 2x2 in closed form (stable for any input).
void eig2(const Eigen::Matrix2d& C, double& lmax, double& lmin, double& pa_deg) {
  const double a = C(0, 0), d = C(1, 1), b = 0.5 * (C(0, 1) + C(1, 0));
  const double mean = 0.5 * (a + d);
  const double half = std::hypot(0.5 * (a - d), b);
  lmax = mean + half;
  lmin = mean - half;
  // Major axis direction (sin phi, cos phi): phi = 1/2 atan2(2 C_xy, C_yy - C_xx).
  pa_deg = wrap_pa_180(0.5 * std::atan2(2.0 * b, d - a) * kRadToDeg);
}
}  // namespace

Ellipse cov_to_ellipse(const Eigen::Matrix2d& C) {
  double lmax, lmin, pa;
  eig2(C, lmax, lmin, pa);
  return {std::sqrt(std::max(0.0, lmax * k8Ln2)), std::sqrt(std::max(0.0, lmin * k8Ln2)), pa};
}

Ellipse convolve(const Ellipse& a, const Ellipse& b) {
  return cov_to_ellipse(ellipse_to_cov(a) + ellipse_to_cov(b));
}

Deconvolved deconvolve(const Ellipse& fitted, const Ellipse& beam) {
  const Eigen::Matrix2d D = ellipse_to_cov(fitted) - ellipse_to_cov(beam);
  double lmax, lmin, pa;
  eig2(D, lmax, lmin, pa);
  Deconvolved out;
  out.eig_major = lmax * k8Ln2;
  out.eig_minor = lmin * k8Ln2;
  // Relative tolerance: a fit identical to the beam must give exactly a point.
  const double scale = (fitted.maj * fitted.maj + beam.maj * beam.maj) * 1e-12;
  out.resolved_major = out.eig_major > scale;
  out.resolved_minor = out.eig_minor > scale;
  out.shape.maj = out.resolved_major ? std::sqrt(out.eig_major) : 0.0;
  out.shape.min = out.resolved_minor ? std::sqrt(out.eig_minor) : 0.0;
  out.shape.pa_deg = out.resolved_major ? pa : 0.0;
  return out;
}

std::optional<Ellipse> convolution_kernel(const Ellipse& from, const Ellipse& to,
                                          double min_eig_fwhm2) {
  const Eigen::Matrix2d K = ellipse_to_cov(to) - ellipse_to_cov(from);
  double lmax, lmin, pa;
  eig2(K, lmax, lmin, pa);
  if (lmin * k8Ln2 <= min_eig_fwhm2 || lmin <= 0.0) return std::nullopt;
  return Ellipse{std::sqrt(lmax * k8Ln2), std::sqrt(lmin * k8Ln2), pa};
}

}  // namespace skerry
