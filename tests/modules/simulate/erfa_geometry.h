#pragma once
// Local sky geometry of an analytic TAN grid computed with ERFA (IAU SOFA's
// gnomonic routines eraTpsts / eraTpxes), independent of the project's own
// projection code: the Jacobian d(east, north)/d(x, y) [arcsec/pixel] at a pixel,
// by central differences of the grid's linear step through the projection and back
// onto the tangent plane about the pixel's own sky position. It includes the
// convergence of the meridians away from the tangent point (north turns by about
// dRA sin Dec), which a pixel-axis PA ignores.
#include <erfa.h>

#include <Eigen/Core>

#include "skerry/constants.h"

namespace skerry::testing {

/// Grid: (xi, eta) [deg] = cd_deg (p - p0) about (ra0, dec0).
inline void erfa_pix_to_sky(const Eigen::Matrix2d& cd_deg, double x0, double y0, double ra0,
                            double dec0, double x, double y, double& a_rad, double& b_rad) {
  const Eigen::Vector2d st = cd_deg * Eigen::Vector2d(x - x0, y - y0) * kDegToRad;
  eraTpsts(st(0), st(1), ra0 * kDegToRad, dec0 * kDegToRad, &a_rad, &b_rad);
}

inline Eigen::Matrix2d erfa_jacobian(const Eigen::Matrix2d& cd_deg, double x0, double y0,
                                     double ra0, double dec0, double x, double y) {
  double a0, b0;
  erfa_pix_to_sky(cd_deg, x0, y0, ra0, dec0, x, y, a0, b0);
  // Offsets (east, north) [arcsec] of the four neighbours at +-h in x and y.
  const double h = 0.5;
  const double px[4] = {x + h, x - h, x, x};
  const double py[4] = {y, y, y + h, y - h};
  double e[4] = {0, 0, 0, 0}, n[4] = {0, 0, 0, 0};
  for (int k = 0; k < 4; ++k) {
    double a = 0, b = 0, xi = 0, eta = 0;
    erfa_pix_to_sky(cd_deg, x0, y0, ra0, dec0, px[k], py[k], a, b);
    eraTpxes(a, b, a0, b0, &xi, &eta);
    e[k] = xi * kRadToArcsec;
    n[k] = eta * kRadToArcsec;
  }
  Eigen::Matrix2d j;
  j << (e[0] - e[1]) / (2 * h), (e[2] - e[3]) / (2 * h), (n[0] - n[1]) / (2 * h),
      (n[2] - n[3]) / (2 * h);
  return j;
}

}  // namespace skerry::testing
