#pragma once
// Rendering of beam-convolved Gaussians on a pixel grid (internal; simulate.h
// add_sources documents the formulas).
#include <Eigen/Core>
#include <cmath>
#include <vector>

#include "skerry/simulate.h"

namespace skerry::sim::detail {

/// What to draw for one source on one grid.
struct Footprint {
  bool draw = false;
  double x = 0.0, y = 0.0;          ///< centre, 0-based pixels
  double a00 = 0, a01 = 0, a11 = 0; ///< inverse pixel-frame covariance [pix^-2]
  double peak = 0.0;                ///< value at the centre [image units]
  double k2 = 64.0;                 ///< cutoff: q = d^T C^-1 d <= k2
  long y0 = 0, y1 = -1;             ///< rows with pixels inside the cutoff (clipped)
  bool clipped = false;             ///< part of the cutoff ellipse lies off the grid
};

/// Fill `out` (truth) and `fp` for source `s` at pixel (x, y) (already located),
/// with flux multiplied by `factor`. located = false: not on the projection.
void prepare(const SkySource& s, const PixelSky& sky, long nx, long ny, const RenderOptions& o,
             bool located, double x, double y, double factor, BandSource& out, Footprint& fp);

/// Pixel range [x_lo, x_hi] of row `row` inside the cutoff ellipse (clipped to the
/// grid); empty when x_lo > x_hi.
inline void row_span(const Footprint& f, long nx, long row, long& x_lo, long& x_hi) {
  const double dy = static_cast<double>(row) - f.y;
  const double b = f.a01 * dy;
  const double disc = b * b - f.a00 * (f.a11 * dy * dy - f.k2);
  if (!(disc >= 0.0)) {
    x_lo = 1;
    x_hi = 0;
    return;
  }
  const double r = std::sqrt(disc);
  x_lo = std::max<long>(0, static_cast<long>(std::ceil(f.x + (-b - r) / f.a00)));
  x_hi = std::min<long>(nx - 1, static_cast<long>(std::floor(f.x + (-b + r) / f.a00)));
}

/// True when any pixel inside the cutoff of `f` is flagged by `blank(x, y)`.
template <class Blank>
bool touches(const Footprint& f, long nx, Blank&& blank) {
  if (!f.draw) return false;
  for (long row = f.y0; row <= f.y1; ++row) {
    long lo, hi;
    row_span(f, nx, row, lo, hi);
    for (long x = lo; x <= hi; ++x)
      if (blank(x, row)) return true;
  }
  return false;
}

/// Add every footprint to `img`, each pixel receiving its sources in index order
/// (fixed row strips in parallel): the result does not depend on the thread count.
template <class T>
void render(Eigen::Array<T, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>& img,
            const std::vector<Footprint>& fps);

extern template void render<float>(ImageF&, const std::vector<Footprint>&);
extern template void render<double>(ImageD&, const std::vector<Footprint>&);

}  // namespace skerry::sim::detail
