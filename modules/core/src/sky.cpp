#include "skerry/sky.h"

#include <Eigen/LU>
#include <cmath>

#include "skerry/constants.h"
#include "skerry/gaussian.h"

namespace skerry {

bool gnomonic_offset(double ra0_deg, double dec0_deg, double ra_deg, double dec_deg,
                     double& xi_rad, double& eta_rad) {
  const double a0 = ra0_deg * kDegToRad, d0 = dec0_deg * kDegToRad;
  const double a = ra_deg * kDegToRad, d = dec_deg * kDegToRad;
  const double da = a - a0;
  const double cosc = std::sin(d0) * std::sin(d) + std::cos(d0) * std::cos(d) * std::cos(da);
  if (!(cosc > 0.0)) return false;
  xi_rad = std::cos(d) * std::sin(da) / cosc;
  eta_rad = (std::cos(d0) * std::sin(d) - std::sin(d0) * std::cos(d) * std::cos(da)) / cosc;
  return true;
}

void gnomonic_inverse(double ra0_deg, double dec0_deg, double xi, double eta, double& ra_deg,
                      double& dec_deg) {
  const double a0 = ra0_deg * kDegToRad, d0 = dec0_deg * kDegToRad;
  const double denom = std::cos(d0) - eta * std::sin(d0);
  const double a = a0 + std::atan2(xi, denom);
  const double d = std::atan2(std::sin(d0) + eta * std::cos(d0), std::hypot(xi, denom));
  ra_deg = wrap_deg_360(a * kRadToDeg);
  dec_deg = d * kRadToDeg;
}

double LocalGeometry::pa_of_pixel_direction_deg(double dx, double dy) const {
  const Eigen::Vector2d en = jac_arcsec_per_pix * Eigen::Vector2d(dx, dy);
  return wrap_deg_360(std::atan2(en(0), en(1)) * kRadToDeg);
}

Eigen::Matrix2d LocalGeometry::pixel_cov_to_sky(const Eigen::Matrix2d& c) const {
  return jac_arcsec_per_pix * c * jac_arcsec_per_pix.transpose();
}

Eigen::Matrix2d LocalGeometry::sky_cov_to_pixel(const Eigen::Matrix2d& c) const {
  const Eigen::Matrix2d Ji = jac_arcsec_per_pix.inverse();
  return Ji * c * Ji.transpose();
}

std::optional<LocalGeometry> local_geometry(const PixelSky& wcs, double x, double y,
                                            double h) {
  double ra0, dec0;
  if (!wcs.pix_to_sky(x, y, ra0, dec0)) return std::nullopt;
  auto offset = [&](double px, double py, Eigen::Vector2d& out) {
    double ra, dec, xi, eta;
    if (!wcs.pix_to_sky(px, py, ra, dec)) return false;
    if (!gnomonic_offset(ra0, dec0, ra, dec, xi, eta)) return false;
    out = Eigen::Vector2d(xi, eta) * kRadToArcsec;
    return true;
  };
  Eigen::Vector2d xp, xm, yp, ym;
  if (!offset(x + h, y, xp) || !offset(x - h, y, xm) || !offset(x, y + h, yp) ||
      !offset(x, y - h, ym))
    return std::nullopt;
  LocalGeometry g;
  g.jac_arcsec_per_pix.col(0) = (xp - xm) / (2.0 * h);
  g.jac_arcsec_per_pix.col(1) = (yp - ym) / (2.0 * h);
  const double det = g.jac_arcsec_per_pix.determinant();
  if (!(std::abs(det) > 0.0) || !std::isfinite(det)) return std::nullopt;
  g.pixel_area_arcsec2 = std::abs(det);
  g.usual_parity = det < 0.0;
  g.plus_y_pa_deg = g.pa_of_pixel_direction_deg(0.0, 1.0);
  return g;
}

Eigen::Vector3d unit_vector(double ra_deg, double dec_deg) {
  const double a = ra_deg * kDegToRad, d = dec_deg * kDegToRad;
  return {std::cos(d) * std::cos(a), std::cos(d) * std::sin(a), std::sin(d)};
}

void radec_of_vector(const Eigen::Vector3d& v, double& ra_deg, double& dec_deg) {
  ra_deg = std::atan2(v(1), v(0)) * kRadToDeg;
  if (ra_deg < 0.0) ra_deg += 360.0;
  if (ra_deg >= 360.0) ra_deg -= 360.0;
  dec_deg = std::atan2(v(2), std::hypot(v(0), v(1))) * kRadToDeg;
}

double separation_deg(double ra1, double dec1, double ra2, double dec2) {
  const double d1 = dec1 * kDegToRad, d2 = dec2 * kDegToRad;
  const double da = (ra2 - ra1) * kDegToRad;
  const double sd1 = std::sin(d1), cd1 = std::cos(d1), sd2 = std::sin(d2), cd2 = std::cos(d2);
  const double sda = std::sin(da), cda = std::cos(da);
  const double num = std::hypot(cd2 * sda, cd1 * sd2 - sd1 * cd2 * cda);
  const double den = sd1 * sd2 + cd1 * cd2 * cda;
  return std::atan2(num, den) * kRadToDeg;
}

double position_angle_deg(double ra1, double dec1, double ra2, double dec2) {
  const double d1 = dec1 * kDegToRad, d2 = dec2 * kDegToRad;
  const double da = (ra2 - ra1) * kDegToRad;
  const double y = std::sin(da) * std::cos(d2);
  const double x = std::cos(d1) * std::sin(d2) - std::sin(d1) * std::cos(d2) * std::cos(da);
  return wrap_deg_360(std::atan2(y, x) * kRadToDeg);
}

}  // namespace skerry
