// Pixel-frame elliptical Gaussian: value, analytic gradient, rendering.
#include <algorithm>
#include <cmath>
#include <cstring>
#include <vector>

#include <oneapi/tbb/blocked_range.h>
#include <oneapi/tbb/parallel_for.h>

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

ImageF render_components(long nx, long ny, const std::vector<PixelComponent>& comps,
                         double extent_sigma) {
  ImageF model = ImageF::Zero(ny, nx);
  constexpr long kStrip = 64;
  const long n_strips = (ny + kStrip - 1) / kStrip;
  struct Box {
    long x0, x1, y0, y1;
  };
  std::vector<Box> boxes(comps.size());
  std::vector<std::vector<std::size_t>> by_strip(static_cast<std::size_t>(std::max(0L, n_strips)));
  for (std::size_t i = 0; i < comps.size(); ++i) {
    const auto& c = comps[i];
    const double r = extent_sigma * c.sigma_major_pix;
    if (!std::isfinite(c.x) || !std::isfinite(c.y) || !std::isfinite(r) || !std::isfinite(c.amplitude)) {
      boxes[i] = {0, -1, 0, -1};
      continue;
    }
    const Box b{std::max(0L, static_cast<long>(std::floor(c.x - r))),
                std::min(nx - 1, static_cast<long>(std::ceil(c.x + r))),
                std::max(0L, static_cast<long>(std::floor(c.y - r))),
                std::min(ny - 1, static_cast<long>(std::ceil(c.y + r)))};
    boxes[i] = b;
    if (b.x1 < b.x0 || b.y1 < b.y0) continue;
    for (long s = b.y0 / kStrip; s <= b.y1 / kStrip; ++s) by_strip[static_cast<std::size_t>(s)].push_back(i);
  }
  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<long>(0, n_strips, 1), [&](const auto& range) {
    for (long s = range.begin(); s != range.end(); ++s) {
      const long ys = s * kStrip, ye = std::min(ny, ys + kStrip) - 1;
      for (std::size_t i : by_strip[static_cast<std::size_t>(s)]) {
        const Box& b = boxes[i];
        for (long y = std::max(ys, b.y0); y <= std::min(ye, b.y1); ++y)
          for (long x = b.x0; x <= b.x1; ++x)
            model(y, x) += static_cast<float>(component_value(comps[i], static_cast<double>(x), static_cast<double>(y)));
      }
    }
  });
  return model;
}

}  // namespace skerry
