#pragma once
// Test helpers: a gnomonic (TAN) pixel grid written out by hand from the FITS
// WCS definition (Calabretta & Greisen 2002, A&A 395, 1077: intermediate world
// coordinates = CD (p - crpix), then the TAN projection), and Gaussian
// rendering on such a grid.
#include <Eigen/Dense>
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <vector>

#include "skerry/constants.h"
#include "skerry/gaussian.h"
#include "skerry/image.h"
#include "skerry/sky.h"

namespace skerry::testing {

class TanSky : public PixelSky {
 public:
  /// crpix 0-based; cd in deg/pixel (row 0: xi = east, row 1: eta = north)...
  /// with the FITS sign convention: CD1_1 < 0 puts east towards -x.
  TanSky(double ra0, double dec0, double crpix_x, double crpix_y, const Eigen::Matrix2d& cd_deg)
      : ra0_(ra0), dec0_(dec0), cx_(crpix_x), cy_(crpix_y), cd_(cd_deg), cdi_(cd_deg.inverse()) {}
  /// Square pixels of `pix_arcsec`, rotated by `rot_deg`, east left when usual.
  static TanSky simple(double ra0, double dec0, double cx, double cy, double pix_arcsec,
                       double rot_deg = 0.0, bool usual_parity = true, double pix_y_arcsec = 0.0) {
    const double py = pix_y_arcsec > 0 ? pix_y_arcsec : pix_arcsec;
    const double r = rot_deg * kDegToRad;
    Eigen::Matrix2d rot;
    rot << std::cos(r), -std::sin(r), std::sin(r), std::cos(r);
    Eigen::Matrix2d s = Eigen::Matrix2d::Zero();
    s(0, 0) = (usual_parity ? -1.0 : 1.0) * pix_arcsec / 3600.0;
    s(1, 1) = py / 3600.0;
    return TanSky(ra0, dec0, cx, cy, rot * s);
  }
  bool pix_to_sky(double x, double y, double& ra, double& dec) const override {
    const Eigen::Vector2d w = cd_ * Eigen::Vector2d(x - cx_, y - cy_);
    gnomonic_inverse(ra0_, dec0_, w(0) * kDegToRad, w(1) * kDegToRad, ra, dec);
    return true;
  }
  bool sky_to_pix(double ra, double dec, double& x, double& y) const override {
    double xi, eta;
    if (!gnomonic_offset(ra0_, dec0_, ra, dec, xi, eta)) return false;
    const Eigen::Vector2d p = cdi_ * Eigen::Vector2d(xi * kRadToDeg, eta * kRadToDeg);
    x = p(0) + cx_;
    y = p(1) + cy_;
    return true;
  }

 private:
  double ra0_, dec0_, cx_, cy_;
  Eigen::Matrix2d cd_, cdi_;
};

/// Add a Gaussian of the given sky shape (FWHM arcsec, PA east of north) and peak
/// at (ra, dec) to `img`, evaluated exactly in the local tangent plane of the
/// source (gnomonic offsets), so that no pixel-frame approximation is involved.
inline void add_gaussian(ImageF& img, const PixelSky& wcs, double ra, double dec,
                         const Ellipse& shape, double peak) {
  const Eigen::Matrix2d ci = ellipse_to_cov(shape).inverse();
  const double reach_arcsec = 3.0 * shape.maj;  // 7 sigma
  double x0 = 0.0, y0 = 0.0;
  wcs.sky_to_pix(ra, dec, x0, y0);
  const auto g = local_geometry(wcs, x0, y0);
  const double pix = std::sqrt(g->pixel_area_arcsec2);
  const long r = static_cast<long>(std::ceil(reach_arcsec / pix * 1.5)) + 2;
  for (long y = std::max(0L, static_cast<long>(y0) - r); y < std::min<long>(img.rows(), static_cast<long>(y0) + r); ++y)
    for (long x = std::max(0L, static_cast<long>(x0) - r); x < std::min<long>(img.cols(), static_cast<long>(x0) + r); ++x) {
      double pra, pdec, xi, eta;
      wcs.pix_to_sky(static_cast<double>(x), static_cast<double>(y), pra, pdec);
      gnomonic_offset(ra, dec, pra, pdec, xi, eta);
      const Eigen::Vector2d d(xi * kRadToArcsec, eta * kRadToArcsec);
      img(y, x) += static_cast<float>(peak * std::exp(-0.5 * d.dot(ci * d)));
    }
}

}  // namespace skerry::testing

#include <random>

#include "skerry/resolution.h"

namespace skerry::testing {

/// Beam-correlated noise of the given rms (docs/CONVENTIONS.md "Noise": white noise
/// convolved with a Gaussian of the beam's FWHMs / sqrt(2), same PA, rescaled to
/// the target rms by its sample standard deviation).
inline ImageF correlated_noise(long ny, long nx, const PixelSky& wcs, const Beam& beam, double rms,
                               std::uint64_t seed) {
  std::mt19937_64 rng(seed);
  std::normal_distribution<float> n01;
  ImageF w(ny, nx);
  for (long i = 0; i < w.size(); ++i) w.data()[i] = n01(rng);
  const auto g = local_geometry(wcs, 0.5 * (nx - 1), 0.5 * (ny - 1));
  const Eigen::Matrix2d k = g->sky_cov_to_pixel(ellipse_to_cov(to_ellipse(beam))) * 0.5;
  ConvolveOptions o;
  o.method = 2;
  o.min_valid_fraction = 0.0;  // corners renormalised, not blanked
  ImageF c = convolve_gaussian_pixels(w, k, o);
  const double mean = c.cast<double>().mean();
  const double sd = std::sqrt((c.cast<double>() - mean).square().mean());
  return ((c.cast<double>() - mean) * (rms / sd)).cast<float>();
}

/// Robust standard deviation: 1.4826 x median absolute deviation (common practice).
inline double robust_std(std::vector<double> v) {
  auto med = [](std::vector<double> a) {
    std::sort(a.begin(), a.end());
    const std::size_t n = a.size();
    return n % 2 ? a[n / 2] : 0.5 * (a[n / 2 - 1] + a[n / 2]);
  };
  const double m = med(v);
  for (double& x : v) x = std::abs(x - m);
  return 1.4826 * med(v);
}
inline double median(std::vector<double> a) {
  std::sort(a.begin(), a.end());
  const std::size_t n = a.size();
  return n % 2 ? a[n / 2] : 0.5 * (a[n / 2 - 1] + a[n / 2]);
}

}  // namespace skerry::testing
