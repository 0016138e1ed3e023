// Error of an island's pixel-sum flux density in beam-correlated noise, and the
// "diffuse" island rule.
#include <Eigen/LU>
#include <cmath>

#include "skerry/catalogue.h"

namespace skerry {

bool island_is_diffuse(const CatalogueIsland& isl, const GroupingOptions& opt) {
  return isl.n_beams >= opt.diffuse_min_beams && isl.mean_rms_jy_per_beam > 0.0 &&
         isl.residual_rms_jy_per_beam > opt.diffuse_residual_ratio * isl.mean_rms_jy_per_beam;
}

double pixel_sum_flux_error(const ImageF& rms, const MaskU8& in_island, const Eigen::Matrix2d& C,
                            double beam_area_pix) {
  const long ny = rms.rows(), nx = rms.cols();
  if (in_island.rows() != ny || in_island.cols() != nx) return NAN;
  if (!(C.determinant() > 0.0) || !(beam_area_pix > 0.0) || !std::isfinite(C.sum())) return NAN;
  // rho(d) = exp(-1/2 d^T C^-1 d): the noise autocorrelation has the beam's
  // shape with unit value at zero lag (docs/CONVENTIONS.md "Noise"). Truncated where
  // rho < 1e-4, i.e. d^T C^-1 d > 2 ln 1e4. Taps over a half plane
  // (dy > 0, or dy == 0 and dx > 0); each pair is counted twice below.
  const double q_max = 2.0 * std::log(1e4);
  const Eigen::Matrix2d Ci = C.inverse();
  const int hx = static_cast<int>(std::ceil(std::sqrt(q_max * C(0, 0))));
  const int hy = static_cast<int>(std::ceil(std::sqrt(q_max * C(1, 1))));
  struct Tap { int dx, dy; double rho; };
  std::vector<Tap> taps;
  for (int dy = 0; dy <= hy; ++dy)
    for (int dx = -hx; dx <= hx; ++dx) {
      if (dy == 0 && dx <= 0) continue;
      const Eigen::Vector2d d(dx, dy);
      const double q = d.dot(Ci * d);
      if (q <= q_max) taps.push_back({dx, dy, std::exp(-0.5 * q)});
    }
  double var = 0.0;
  long used = 0;
  for (long y = 0; y < ny; ++y) {
    for (long x = 0; x < nx; ++x) {
      if (!in_island(y, x)) continue;
      const double s = rms(y, x);
      if (!std::isfinite(s)) continue;
      ++used;
      // sum_i sum_j s_i s_j rho_ij = sum_i s_i^2 + 2 sum_{i<j} s_i s_j rho_ij
      double cross = 0.0;
      for (const Tap& t : taps) {
        const long xx = x + t.dx, yy = y + t.dy;
        if (xx < 0 || xx >= nx || yy >= ny || !in_island(yy, xx)) continue;
        const double s2 = rms(yy, xx);
        if (std::isfinite(s2)) cross += s2 * t.rho;
      }
      var += s * s + 2.0 * s * cross;
    }
  }
  if (used == 0) return NAN;
  return std::sqrt(std::max(0.0, var)) / beam_area_pix;
}

}  // namespace skerry
