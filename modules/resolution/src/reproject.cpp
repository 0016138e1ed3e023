// Reprojection of a Jy/beam image onto another grid (resolution.h).
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <algorithm>
#include <cmath>
#include <vector>

#include "skerry/resolution.h"

namespace skerry {

namespace {

// Exact mapping of a target pixel to source pixel coordinates (0-based).
inline bool map_exact(const PixelSky& src, const PixelSky& tgt, double x, double y, double& sx,
                      double& sy) {
  double ra, dec;
  if (!tgt.pix_to_sky(x, y, ra, dec)) return false;
  return src.sky_to_pix(ra, dec, sx, sy) && std::isfinite(sx) && std::isfinite(sy);
}

// Keys (1981) cubic convolution weights, a = -0.5, for fractional offset t in
// [0, 1): taps at -1, 0, 1, 2.
inline void keys_weights(double t, double w[4]) {
  const double a = -0.5;
  auto far = [a](double s) { return ((a * s - 5.0 * a) * s + 8.0 * a) * s - 4.0 * a; };  // 1<=s<2
  auto near = [a](double s) { return ((a + 2.0) * s - (a + 3.0)) * s * s + 1.0; };       // 0<=s<1
  w[0] = far(1.0 + t);
  w[1] = near(t);
  w[2] = near(1.0 - t);
  w[3] = far(2.0 - t);
}

float sample(const ImageF& im, double sx, double sy, Interpolation mode) {
  const long nx = im.cols(), ny = im.rows();
  if (!(sx >= 0.0) || !(sy >= 0.0) || sx > nx - 1 || sy > ny - 1) return NAN;
  long ix = std::min(static_cast<long>(std::floor(sx)), std::max(0L, nx - 2));
  long iy = std::min(static_cast<long>(std::floor(sy)), std::max(0L, ny - 2));
  const double tx = sx - ix, ty = sy - iy;
  if (mode == Interpolation::Bicubic && ix >= 1 && iy >= 1 && ix + 2 < nx && iy + 2 < ny) {
    double wx[4], wy[4];
    keys_weights(tx, wx);
    keys_weights(ty, wy);
    double s = 0.0;
    bool ok = true;
    for (int j = 0; j < 4 && ok; ++j) {
      double r = 0.0;
      for (int i = 0; i < 4; ++i) {
        const float v = im(iy - 1 + j, ix - 1 + i);
        if (std::isnan(v)) {
          ok = false;
          break;
        }
        r += wx[i] * v;
      }
      s += wy[j] * r;
    }
    if (ok) return static_cast<float>(s);
  }
  // Bilinear on the 2x2 neighbours (also the fallback of bicubic).
  if (nx < 2 || ny < 2) {
    return (nx == 1 && ny == 1) ? im(0, 0) : NAN;
  }
  const float v00 = im(iy, ix), v01 = im(iy, ix + 1), v10 = im(iy + 1, ix), v11 = im(iy + 1, ix + 1);
  if (std::isnan(v00) || std::isnan(v01) || std::isnan(v10) || std::isnan(v11)) return NAN;
  return static_cast<float>((1 - ty) * ((1 - tx) * v00 + tx * v01) + ty * ((1 - tx) * v10 + tx * v11));
}

}  // namespace

ImageF reproject(const ImageF& source, const PixelSky& src, const PixelSky& tgt, long nx, long ny,
                 const ReprojectOptions& opt) {
  ImageF out(ny, nx);
  if (nx <= 0 || ny <= 0) return out;
  const long step = std::max(1, opt.map_step_pix);
  const long ncx = (nx - 1 + step - 1) / step + 1, ncy = (ny - 1 + step - 1) / step + 1;
  // Nodes at x = 0, step, 2 step, ..., clamped to nx - 1 at the last one.
  auto node_x = [&](long i) { return std::min(i * step, nx - 1); };
  auto node_y = [&](long j) { return std::min(j * step, ny - 1); };
  std::vector<double> mx(ncx * ncy), my(ncx * ncy);
  std::vector<unsigned char> mok(ncx * ncy);
  tbb::parallel_for(tbb::blocked_range<long>(0, ncy), [&](const tbb::blocked_range<long>& r) {
    for (long j = r.begin(); j != r.end(); ++j)
      for (long i = 0; i < ncx; ++i) {
        double sx, sy;
        const bool ok = map_exact(src, tgt, static_cast<double>(node_x(i)),
                                  static_cast<double>(node_y(j)), sx, sy);
        mx[j * ncx + i] = sx;
        my[j * ncx + i] = sy;
        mok[j * ncx + i] = ok;
      }
  });
  const long cells_y = std::max(1L, ncy - 1), cells_x = std::max(1L, ncx - 1);
  tbb::parallel_for(tbb::blocked_range<long>(0, cells_y), [&](const tbb::blocked_range<long>& r) {
    for (long cj = r.begin(); cj != r.end(); ++cj) {
      const long y0 = node_y(cj), y1 = (ncy == 1) ? y0 : node_y(cj + 1);
      const long ylast = (cj == cells_y - 1) ? y1 : y1 - 1;
      for (long ci = 0; ci < cells_x; ++ci) {
        const long x0 = node_x(ci), x1 = (ncx == 1) ? x0 : node_x(ci + 1);
        const long xlast = (ci == cells_x - 1) ? x1 : x1 - 1;
        const long i0 = ci, i1 = std::min(ci + 1, ncx - 1), j0 = cj, j1 = std::min(cj + 1, ncy - 1);
        bool interp = mok[j0 * ncx + i0] && mok[j0 * ncx + i1] && mok[j1 * ncx + i0] &&
                      mok[j1 * ncx + i1] && step > 1;
        auto bil = [&](const std::vector<double>& m, double x, double y) {
          const double tx = x1 > x0 ? (x - x0) / static_cast<double>(x1 - x0) : 0.0;
          const double ty = y1 > y0 ? (y - y0) / static_cast<double>(y1 - y0) : 0.0;
          return (1 - ty) * ((1 - tx) * m[j0 * ncx + i0] + tx * m[j0 * ncx + i1]) +
                 ty * ((1 - tx) * m[j1 * ncx + i0] + tx * m[j1 * ncx + i1]);
        };
        if (interp) {
          // Check the interpolated mapping at the cell centre against the exact one.
          const double xc = 0.5 * (x0 + x1), yc = 0.5 * (y0 + y1);
          double sx, sy;
          if (!map_exact(src, tgt, xc, yc, sx, sy) ||
              std::hypot(sx - bil(mx, xc, yc), sy - bil(my, xc, yc)) > opt.max_map_error_pix)
            interp = false;
        }
        for (long y = y0; y <= ylast; ++y)
          for (long x = x0; x <= xlast; ++x) {
            double sx, sy;
            bool ok = true;
            if (interp) {
              sx = bil(mx, static_cast<double>(x), static_cast<double>(y));
              sy = bil(my, static_cast<double>(x), static_cast<double>(y));
            } else {
              ok = map_exact(src, tgt, static_cast<double>(x), static_cast<double>(y), sx, sy);
            }
            out(y, x) = ok ? sample(source, sx, sy, opt.interpolation) : NAN;
          }
      }
    }
  });
  return out;
}

double overlap_fraction(long snx, long sny, const PixelSky& src, const PixelSky& tgt, long nx,
                        long ny) {
  const long s = std::max(1L, std::max(nx, ny) / 64);
  long in = 0, total = 0;
  for (long y = 0; y < ny; y += s)
    for (long x = 0; x < nx; x += s) {
      ++total;
      double sx, sy;
      if (map_exact(src, tgt, static_cast<double>(x), static_cast<double>(y), sx, sy) &&
          sx >= -0.5 && sy >= -0.5 && sx <= snx - 0.5 && sy <= sny - 0.5)
        ++in;
    }
  return total ? static_cast<double>(in) / static_cast<double>(total) : 0.0;
}

}  // namespace skerry
