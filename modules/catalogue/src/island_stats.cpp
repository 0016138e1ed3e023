// Per-island pixel statistics: residual rms, mean local rms, and the error of
// the pixel-sum flux density in correlated noise.
#include <oneapi/tbb/blocked_range.h>
#include <oneapi/tbb/parallel_for.h>

#include <Eigen/LU>
#include <cmath>

#include "skerry/catalogue.h"

namespace skerry {

IslandPixelStats island_pixel_stats(const LabelsI32& labels, const std::vector<IslandBox>& boxes,
                                    const ImageF& residual, const ImageF& rms,
                                    const Eigen::Matrix2d& C, double beam_area_pix) {
  const std::size_t n = boxes.size();
  IslandPixelStats out;
  out.residual_rms_jy_per_beam.assign(n, NAN);
  out.mean_rms_jy_per_beam.assign(n, NAN);
  out.flux_err_jy.assign(n, NAN);
  const long ny = labels.rows(), nx = labels.cols();
  const bool have_res = residual.rows() == ny && residual.cols() == nx;

  // Noise correlation between pixels offset by d: the beam's shape,
  //   rho(d) = exp(-1/2 d^T C^-1 d),  C = beam covariance in pixels [pix^2]
  // (CONVENTIONS "Noise": the autocorrelation of restored-image noise has the
  // beam's shape, unit at zero lag). Truncated where rho < 1e-4, i.e.
  // d^T C^-1 d > 2 ln 1e4.
  const double q_max = 2.0 * std::log(1e4);
  const Eigen::Matrix2d Ci = C.inverse();
  const bool kernel_ok = std::isfinite(Ci.sum()) && C.determinant() > 0.0 && beam_area_pix > 0.0;
  struct Tap { int dx, dy; double rho; };
  std::vector<Tap> taps;  // half-plane: (dy > 0) or (dy == 0 and dx > 0)
  if (kernel_ok) {
    const int hx = static_cast<int>(std::ceil(std::sqrt(q_max * C(0, 0))));
    const int hy = static_cast<int>(std::ceil(std::sqrt(q_max * C(1, 1))));
    for (int dy = 0; dy <= hy; ++dy)
      for (int dx = -hx; dx <= hx; ++dx) {
        if (dy == 0 && dx <= 0) continue;
        const Eigen::Vector2d d(dx, dy);
        const double q = d.dot(Ci * d);
        if (q <= q_max) taps.push_back({dx, dy, std::exp(-0.5 * q)});
      }
  }

  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<std::size_t>(0, n, 16), [&](const auto& r) {
    for (std::size_t k = r.begin(); k != r.end(); ++k) {
      const IslandBox& b = boxes[k];
      const std::int32_t id = static_cast<std::int32_t>(k + 1);
      if (b.x1 < b.x0 || b.y1 < b.y0) continue;
      double res2 = 0.0, rms_sum = 0.0, var = 0.0;
      long n_res = 0, n_rms = 0;
      for (long y = std::max(0L, b.y0); y <= std::min(ny - 1, b.y1); ++y) {
        for (long x = std::max(0L, b.x0); x <= std::min(nx - 1, b.x1); ++x) {
          if (labels(y, x) != id) continue;
          if (have_res) {
            const double v = residual(y, x);
            if (std::isfinite(v)) { res2 += v * v; ++n_res; }
          }
          const double s = rms(y, x);
          if (!std::isfinite(s)) continue;
          rms_sum += s;
          ++n_rms;
          if (!kernel_ok) continue;
          // sum_i sum_j s_i s_j rho_ij = sum_i s_i^2 + 2 sum_{pairs} s_i s_j rho_ij
          double cross = 0.0;
          for (const Tap& t : taps) {
            const long xx = x + t.dx, yy = y + t.dy;
            if (xx < 0 || xx >= nx || yy >= ny) continue;
            if (labels(yy, xx) != id) continue;
            const double s2 = rms(yy, xx);
            if (std::isfinite(s2)) cross += s2 * t.rho;
          }
          var += s * s + 2.0 * s * cross;
        }
      }
      if (n_res > 0) out.residual_rms_jy_per_beam[k] = std::sqrt(res2 / n_res);
      if (n_rms > 0) out.mean_rms_jy_per_beam[k] = rms_sum / n_rms;
      if (n_rms > 0 && kernel_ok) out.flux_err_jy[k] = std::sqrt(std::max(0.0, var)) / beam_area_pix;
    }
  });
  return out;
}

}  // namespace skerry
