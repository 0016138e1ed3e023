#pragma once
// Test helper: Gaussian noise correlated like a circular beam.
//
// White noise convolved with a Gaussian kernel of FWHM beam / sqrt 2 has an
// autocorrelation of FWHM = beam (docs/CONVENTIONS.md "Noise"; a Gaussian convolved
// with itself has sqrt 2 its width). The separable 1-D kernel k is normalised to
// sum k^2 = 1, so the 2-D kernel (k x k) has sum of squares 1 and unit white
// noise becomes noise of unit variance exactly (in expectation); it is then
// scaled to `rms`. The white field is padded by the kernel half-width so that
// the edges are statistically like the interior.
#include <cmath>
#include <cstdint>
#include <random>
#include <vector>

#include "skerry/image.h"

namespace skerry::testing {

inline ImageF correlated_noise(int width, int height, double beam_fwhm_pix, double rms, std::uint64_t seed) {
  const double fwhm_k = beam_fwhm_pix / std::sqrt(2.0);
  const double sigma_k = fwhm_k / (2.0 * std::sqrt(2.0 * std::log(2.0)));
  const int half = static_cast<int>(std::ceil(4.5 * sigma_k));
  std::vector<double> k(2 * half + 1);
  double ss = 0.0;
  for (int i = -half; i <= half; ++i) {
    k[i + half] = std::exp(-0.5 * i * i / (sigma_k * sigma_k));
    ss += k[i + half] * k[i + half];
  }
  for (double& v : k) v /= std::sqrt(ss);
  const int pw = width + 2 * half, ph = height + 2 * half;
  std::mt19937_64 rng(seed);
  std::normal_distribution<double> gauss(0.0, 1.0);
  std::vector<double> white(static_cast<std::size_t>(pw) * ph);
  for (double& v : white) v = gauss(rng);
  // Along x (rows of the padded field, output width), then along y.
  std::vector<double> tmp(static_cast<std::size_t>(width) * ph);
  for (int y = 0; y < ph; ++y)
    for (int x = 0; x < width; ++x) {
      double s = 0.0;
      for (int i = 0; i <= 2 * half; ++i) s += k[i] * white[static_cast<std::size_t>(y) * pw + x + i];
      tmp[static_cast<std::size_t>(y) * width + x] = s;
    }
  ImageF out(height, width);
  for (int y = 0; y < height; ++y)
    for (int x = 0; x < width; ++x) {
      double s = 0.0;
      for (int i = 0; i <= 2 * half; ++i) s += k[i] * tmp[static_cast<std::size_t>(y + i) * width + x];
      out(y, x) = static_cast<float>(rms * s);
    }
  return out;
}

/// Add a circular Gaussian of peak `peak` and FWHM `fwhm_pix` centred at (x0, y0).
inline void add_gaussian(ImageF& img, double x0, double y0, double fwhm_pix, double peak) {
  const double s2 = std::pow(fwhm_pix / (2.0 * std::sqrt(2.0 * std::log(2.0))), 2);
  for (Eigen::Index y = 0; y < img.rows(); ++y)
    for (Eigen::Index x = 0; x < img.cols(); ++x) {
      const double r2 = (x - x0) * (x - x0) + (y - y0) * (y - y0);
      img(y, x) += static_cast<float>(peak * std::exp(-0.5 * r2 / s2));
    }
}

}  // namespace skerry::testing
