// Pixel-frame elliptical Gaussian: value, analytic gradient, rendering.
#include <algorithm>
#include <cmath>
#include <cstring>

#include "fitting_internal.h"
#include "skerry/fitting.h"

namespace skerry {

/// Gradient of g = A exp(-Q/2), Q = u^2/sa^2 + v^2/sb^2,
/// u = dx c + dy s, v = -dx s + dy c, dx = x - x0, dy = y - y0, c = cos t, s = sin t:
///   dg/dA  = g / A
///   dg/dx0 = g (u c / sa^2 - v s / sb^2)
///   dg/dy0 = g (u s / sa^2 + v c / sb^2)
///   dg/dsa = g u^2 / sa^3,    dg/dsb = g v^2 / sb^3
///   dg/dt  = -g u v (1/sa^2 - 1/sb^2)          (du/dt = v, dv/dt = -u)
/// Units: Jy/beam per (Jy/beam, pix, pix, pix, pix, rad).
Eigen::Matrix<double, 6, 1> component_gradient(const double p[6], double x, double y) {
  Eigen::Matrix<double, 6, 1> g;
  fitting_detail::GaussEval ev(p);
  double val;
  ev.eval(x, y, val, g.data());
  return g;
}

double component_value(const PixelComponent& c, double x, double y) {
  // Callers render one component over many pixels: the evaluator's constants
  // (cos, sin, inverse squared sigmas) are kept per thread for the last
  // parameters seen and rebuilt when any of them differs bit for bit, so the
  // values are exactly those of a fresh evaluator.
  struct Cache {
    double p[6];
    fitting_detail::GaussEval ev;
  };
  static const double kNone[6] = {NAN, NAN, NAN, NAN, NAN, NAN};
  thread_local Cache cache{{NAN, NAN, NAN, NAN, NAN, NAN}, fitting_detail::GaussEval(kNone)};
  const double p[6] = {c.amplitude, c.x, c.y, c.sigma_major_pix, c.sigma_minor_pix, c.theta_rad};
  if (std::memcmp(p, cache.p, sizeof p) != 0) {
    cache.ev = fitting_detail::GaussEval(p);
    std::memcpy(cache.p, p, sizeof p);
  }
  double val;
  cache.ev.eval(x, y, val, nullptr);
  return val;
}

void render_components(const std::vector<PixelComponent>& comps, ImageD& model,
                       double extent_sigma) {
  const int ny = static_cast<int>(model.rows()), nx = static_cast<int>(model.cols());
  for (const auto& c : comps) {
    if (!std::isfinite(c.amplitude) || !std::isfinite(c.x) || !std::isfinite(c.y) ||
        !(c.sigma_major_pix > 0.0) || !(c.sigma_minor_pix > 0.0))
      continue;
    const double r = extent_sigma * c.sigma_major_pix;
    const int x0 = std::max(0, static_cast<int>(std::floor(c.x - r)));
    const int x1 = std::min(nx - 1, static_cast<int>(std::ceil(c.x + r)));
    const int y0 = std::max(0, static_cast<int>(std::floor(c.y - r)));
    const int y1 = std::min(ny - 1, static_cast<int>(std::ceil(c.y + r)));
    const double p[6] = {c.amplitude, c.x, c.y, c.sigma_major_pix, c.sigma_minor_pix,
                         c.theta_rad};
    fitting_detail::GaussEval ev(p);
    for (int y = y0; y <= y1; ++y)
      for (int x = x0; x <= x1; ++x) {
        double v;
        ev.eval(x, y, v, nullptr);
        model(y, x) += v;
      }
  }
}

}  // namespace skerry
