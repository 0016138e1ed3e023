#pragma once
// Helpers shared by the fitting tests: a sky-defined Gaussian renderer that does
// not use the fitter's pixel model, and island cutouts made by a flood fill.
#include <Eigen/Core>
#include <Eigen/LU>
#include <cmath>
#include <cstdint>
#include <vector>

#include "skerry/constants.h"
#include "skerry/fitting.h"
#include "skerry/gaussian.h"
#include "skerry/sky.h"

namespace fittest {

// Adds peak * exp(-0.5 d^T C^-1 d) to every pixel, d = gnomonic offset (east, north)
// [arcsec] of the pixel's sky position about (ra, dec), C = ellipse_to_cov(shape)
// (REF-DECONV-01 covariance form). Rendering goes pixel -> sky -> tangent plane, so
// parity, rotation and non-square pixels enter only through the PixelSky.
template <typename Image>
void render_sky_gaussian(Image& img, const skerry::PixelSky& sky, double ra_deg, double dec_deg,
                         double peak, const skerry::Ellipse& shape) {
  const Eigen::Matrix2d Ci = skerry::ellipse_to_cov(shape).inverse();
  for (int y = 0; y < img.rows(); ++y)
    for (int x = 0; x < img.cols(); ++x) {
      double ra, dec, xi, eta;
      if (!sky.pix_to_sky(x, y, ra, dec)) continue;
      if (!skerry::gnomonic_offset(ra_deg, dec_deg, ra, dec, xi, eta)) continue;
      const Eigen::Vector2d d(xi * skerry::kRadToArcsec, eta * skerry::kRadToArcsec);
      img(y, x) += static_cast<typename Image::Scalar>(peak * std::exp(-0.5 * d.dot(Ci * d)));
    }
}

// Beam covariance in the pixel frame at (x, y).
inline Eigen::Matrix2d beam_pix(const skerry::PixelSky& sky, const skerry::Beam& beam, double x,
                                double y) {
  return skerry::local_geometry(sky, x, y)->sky_cov_to_pixel(
      skerry::ellipse_to_cov(skerry::to_ellipse(beam)));
}

// Cutout [x0, x0 + w) x [y0, y0 + h) of `img` with constant rms; island = pixels
// >= thresh * rms 8-connected to the highest pixel within `seed_radius` of the
// seed (cutout coordinates; default the cutout centre); every other pixel is
// kCutoutFree.
template <typename Image>
skerry::IslandCutout make_cutout(const Image& img, double rms, int x0, int y0, int w, int h,
                                 double thresh, const Eigen::Matrix2d& beam_cov_pix,
                                 std::int64_t id = 0, int seed_radius = 3, int seed_x = -1,
                                 int seed_y = -1) {
  skerry::IslandCutout c;
  c.island_id = id;
  c.x_origin = x0;
  c.y_origin = y0;
  c.data.resize(h, w);
  c.rms.setConstant(h, w, static_cast<float>(rms));
  c.mask.setConstant(h, w, skerry::kCutoutFree);
  for (int y = 0; y < h; ++y)
    for (int x = 0; x < w; ++x) c.data(y, x) = static_cast<float>(img(y0 + y, x0 + x));
  if (seed_x < 0) seed_x = w / 2;
  if (seed_y < 0) seed_y = h / 2;
  int sx = seed_x, sy = seed_y;
  for (int y = std::max(0, seed_y - seed_radius); y <= std::min(h - 1, seed_y + seed_radius); ++y)
    for (int x = std::max(0, seed_x - seed_radius); x <= std::min(w - 1, seed_x + seed_radius); ++x)
      if (c.data(y, x) > c.data(sy, sx)) {
        sx = x;
        sy = y;
      }
  std::vector<int> stack{sy * w + sx};
  if (!(c.data(sy, sx) >= thresh * rms)) stack.clear();
  while (!stack.empty()) {
    const int p = stack.back();
    stack.pop_back();
    const int px = p % w, py = p / w;
    if (c.mask(py, px) == skerry::kCutoutIsland) continue;
    c.mask(py, px) = skerry::kCutoutIsland;
    for (int dy = -1; dy <= 1; ++dy)
      for (int dx = -1; dx <= 1; ++dx) {
        const int qx = px + dx, qy = py + dy;
        if (qx < 0 || qy < 0 || qx >= w || qy >= h) continue;
        if (c.mask(qy, qx) != skerry::kCutoutIsland && c.data(qy, qx) >= thresh * rms)
          stack.push_back(qy * w + qx);
      }
  }
  c.beam_cov_pix = beam_cov_pix;
  return c;
}

// Offset of (ra, dec) from (ra0, dec0) along east (RA cos Dec) and north [arcsec].
inline Eigen::Vector2d sky_offset_arcsec(double ra0, double dec0, double ra, double dec) {
  double xi, eta;
  skerry::gnomonic_offset(ra0, dec0, ra, dec, xi, eta);
  return {xi * skerry::kRadToArcsec, eta * skerry::kRadToArcsec};
}

// Robust standard deviation 1.4826 MAD (REF-ROBUST-01: 1 / Phi^-1(3/4), the normal-consistent scale).
inline double robust_std(std::vector<double> v) {
  auto median = [](std::vector<double> a) {
    const std::size_t n = a.size();
    std::nth_element(a.begin(), a.begin() + n / 2, a.end());
    double m = a[n / 2];
    if (n % 2 == 0) {
      std::nth_element(a.begin(), a.begin() + n / 2 - 1, a.end());
      m = 0.5 * (m + a[n / 2 - 1]);
    }
    return m;
  };
  const double med = median(v);
  for (double& x : v) x = std::abs(x - med);
  return 1.482602218505602 * median(v);
}

inline double median(std::vector<double> a) {
  std::sort(a.begin(), a.end());
  const std::size_t n = a.size();
  return n % 2 ? a[n / 2] : 0.5 * (a[n / 2 - 1] + a[n / 2]);
}

}  // namespace fittest
