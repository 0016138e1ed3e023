// False-discovery-rate thresholds (Benjamini & Hochberg 1995; Benjamini &
// Yekutieli 2001), per pixel on an image as in Hopkins et al. (2002).
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <algorithm>
#include <cmath>
#include <functional>
#include <limits>
#include <numbers>
#include <stdexcept>
#include <vector>

#include "skerry/islands.h"
#include "snr_internal.h"

namespace skerry {

double by_constant(std::int64_t n) {
  if (n <= 0) return 0.0;
  // c_N = sum_{j=1..N} 1/j (Benjamini & Yekutieli 2001, Ann. Stat. 29, 1165,
  // Theorem 1.3). Summed from the smallest term up for N <= 10^7; beyond, the
  // Euler-Maclaurin expansion ln N + gamma + 1/(2N) - 1/(12 N^2) + 1/(120 N^4),
  // whose next term is below 1e-30 there (Abramowitz & Stegun 1964, 6.3.18).
  if (n <= 10'000'000) {
    // Compensated (Kahan) summation: rounding error ~ 1e-16 instead of ~ sqrt(N) 1e-16.
    double s = 0.0, comp = 0.0;
    for (std::int64_t j = n; j >= 1; --j) {
      const double term = 1.0 / static_cast<double>(j) - comp;
      const double t = s + term;
      comp = (t - s) - term;
      s = t;
    }
    return s;
  }
  const double x = static_cast<double>(n);
  return std::log(x) + std::numbers::egamma + 1.0 / (2.0 * x) - 1.0 / (12.0 * x * x) +
         1.0 / (120.0 * x * x * x * x);
}

namespace {
// Largest 1-based i with p_(i) <= i alpha / (c N), p sorted ascending (REF-FDR-01 step 3).
std::int64_t bh_k(const std::vector<double>& p_sorted, std::int64_t n_tests, double alpha, double c) {
  std::int64_t k = 0;
  const double q = alpha / (c * static_cast<double>(n_tests));
  for (std::size_t i = 0; i < p_sorted.size(); ++i)
    if (p_sorted[i] <= static_cast<double>(i + 1) * q) k = static_cast<std::int64_t>(i + 1);
  return k;
}

void check_alpha(double alpha) {
  if (!(alpha > 0.0 && alpha < 1.0)) throw std::invalid_argument("fdr: alpha must be in (0, 1)");
}

// One-sided Gaussian tail probability p = erfc(z / sqrt 2) / 2 (REF-ROBUST-04).
inline double upper_tail(double z) { return 0.5 * std::erfc(z / std::numbers::sqrt2); }
}  // namespace

FdrResult fdr_from_pvalues(std::span<const double> p_values, double alpha, bool arbitrary_dependence) {
  check_alpha(alpha);
  std::vector<double> p;
  p.reserve(p_values.size());
  for (double v : p_values)
    if (!std::isnan(v)) p.push_back(v);
  std::sort(p.begin(), p.end());
  FdrResult r;
  r.tests = static_cast<std::int64_t>(p.size());
  if (r.tests == 0) return r;
  r.c_n = arbitrary_dependence ? by_constant(r.tests) : 1.0;
  r.rejections = bh_k(p, r.tests, alpha, r.c_n);
  r.p_threshold = r.rejections > 0 ? p[static_cast<std::size_t>(r.rejections - 1)] : 0.0;
  return r;
}

double fdr_threshold(const ImageF& image, const NoiseMaps& maps, double alpha, bool arbitrary_dependence,
                     FdrResult* result) {
  check_alpha(alpha);
  const int w = static_cast<int>(image.cols()), h = static_cast<int>(image.rows());
  if (maps.empty() || maps.width() != w || maps.height() != h)
    throw std::invalid_argument("fdr: background/rms maps missing or of a different size than the image");
  if (w == 0 || h == 0) {
    if (result) *result = FdrResult{};
    return std::numeric_limits<double>::infinity();
  }
  // Only p <= alpha / c can satisfy p_(i) <= i alpha / (c N) (i <= N), so only
  // pixels with snr >= z_min, p(z_min) >= alpha / c, are candidates. c needs N,
  // and N is the number of non-blank pixels: count them first.
  constexpr int kStrip = 64;
  const int nstrips = (h + kStrip - 1) / kStrip;
  std::vector<std::int64_t> n_valid(static_cast<std::size_t>(nstrips), 0);
  std::vector<std::vector<float>> cand(static_cast<std::size_t>(nstrips));
  auto for_strips = [&](const std::function<void(int, detail::RowBuffers&, int)>& f) {
    tbb::parallel_for(tbb::blocked_range<int>(0, nstrips, 1), [&](const tbb::blocked_range<int>& r) {
      detail::RowBuffers b;
      b.resize(w);
      for (int s = r.begin(); s < r.end(); ++s)
        for (int y = s * kStrip; y < std::min(h, (s + 1) * kStrip); ++y) {
          detail::snr_row(image, maps, y, b.bg.data(), b.rms.data(), b.snr.data());
          f(s, b, y);
        }
    });
  };
  for_strips([&](int s, detail::RowBuffers& b, int) {
    std::int64_t n = 0;
    for (int x = 0; x < w; ++x) n += std::isnan(b.snr[x]) ? 0 : 1;
    n_valid[s] += n;
  });
  FdrResult fr;
  for (std::int64_t n : n_valid) fr.tests += n;
  double threshold = std::numeric_limits<double>::infinity();
  if (fr.tests > 0) {
    fr.c_n = arbitrary_dependence ? by_constant(fr.tests) : 1.0;
    // z_min: largest z with upper_tail(z) >= alpha / c, by bisection (upper_tail decreases).
    const double target = alpha / fr.c_n;
    double lo = -40.0, hi = 40.0;
    for (int i = 0; i < 200; ++i) {
      const double mid = 0.5 * (lo + hi);
      if (upper_tail(mid) >= target) lo = mid;
      else hi = mid;
    }
    const float zmin = detail::float_threshold(lo) ;
    // lo has upper_tail(lo) >= target; anything below it has a larger p and cannot
    // be rejected, so snr >= (float) lo rounded down is a safe superset.
    const float zmin_safe = std::nextafter(zmin, -std::numeric_limits<float>::infinity());
    for_strips([&](int s, detail::RowBuffers& b, int) {
      for (int x = 0; x < w; ++x)
        if (b.snr[x] >= zmin_safe) cand[s].push_back(b.snr[x]);
    });
    std::vector<float> z;
    for (auto& c : cand) z.insert(z.end(), c.begin(), c.end());
    std::sort(z.begin(), z.end(), std::greater<float>());
    std::vector<double> p(z.size());
    for (std::size_t i = 0; i < z.size(); ++i) p[i] = upper_tail(z[i]);
    fr.rejections = bh_k(p, fr.tests, alpha, fr.c_n);
    if (fr.rejections > 0) {
      fr.p_threshold = p[static_cast<std::size_t>(fr.rejections - 1)];
      threshold = z[static_cast<std::size_t>(fr.rejections - 1)];
    }
  }
  if (result) *result = fr;
  return threshold;
}

}  // namespace skerry
