// An analytic gnomonic (TAN) grid: Calabretta & Greisen (2002, A&A 395, 1077),
// sec. 5.1.3, with the linear step (xi, eta) = CD (p - p_ref) of their eq. (1)
// in 0-based pixels; the projection itself is core's gnomonic_offset/inverse.
#include <Eigen/LU>
#include <cmath>
#include <stdexcept>

#include "skerry/constants.h"
#include "skerry/simulate.h"

namespace skerry::sim {

TanGrid::TanGrid(double ra0_deg, double dec0_deg, double ref_x, double ref_y,
                 const Eigen::Matrix2d& cd_deg)
    : ra0_(ra0_deg), dec0_(dec0_deg), x0_(ref_x), y0_(ref_y), cd_(cd_deg) {
  if (!(std::abs(cd_.determinant()) > 0.0) || !cd_.allFinite())
    throw std::invalid_argument("TanGrid: the CD matrix is singular");
  cd_inv_ = cd_.inverse();
}

TanGrid TanGrid::square(double ra0_deg, double dec0_deg, double ref_x, double ref_y,
                        double pixel_arcsec, double rotation_deg, bool east_right) {
  // Unrotated: +x towards west (east left) or east, +y north. Rotating the pixel
  // axes by rot (so +y points to PA rot) gives column 0 (x step) and column 1
  // (y step) in (xi = east, eta = north).
  const double s = pixel_arcsec * kArcsecToDeg, r = rotation_deg * kDegToRad;
  const double px = east_right ? 1.0 : -1.0;
  Eigen::Matrix2d cd;
  // +y direction: PA r -> (sin r, cos r); +x: perpendicular, PA r + 90 (east_right)
  // or r - 90 (east left): (cos r, -sin r) * px.
  cd << px * s * std::cos(r), s * std::sin(r), -px * s * std::sin(r), s * std::cos(r);
  return TanGrid(ra0_deg, dec0_deg, ref_x, ref_y, cd);
}

bool TanGrid::pix_to_sky(double x, double y, double& ra_deg, double& dec_deg) const {
  const Eigen::Vector2d st = cd_ * Eigen::Vector2d(x - x0_, y - y0_) * kDegToRad;
  gnomonic_inverse(ra0_, dec0_, st(0), st(1), ra_deg, dec_deg);
  return std::isfinite(ra_deg) && std::isfinite(dec_deg);
}

bool TanGrid::sky_to_pix(double ra_deg, double dec_deg, double& x, double& y) const {
  double xi, eta;
  if (!gnomonic_offset(ra0_, dec0_, ra_deg, dec_deg, xi, eta)) return false;
  const Eigen::Vector2d p = cd_inv_ * Eigen::Vector2d(xi, eta) * kRadToDeg;
  x = p(0) + x0_;
  y = p(1) + y0_;
  return true;
}

}  // namespace skerry::sim
