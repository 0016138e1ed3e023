// Robust statistics of one sample: iterative sigma clipping with its bias
// correction, MAD, and the float sort they rest on.
#include <algorithm>
#include <bit>
#include <cmath>
#include <limits>
#include <numbers>
#include <stdexcept>
#include <string>

#include "clip_internal.h"
#include "skerry/background.h"

namespace skerry {
namespace detail {

namespace {

// Order-preserving map of IEEE-754 single bits to unsigned integers: flip all
// bits of negatives, set the sign bit of non-negatives (common practice for
// radix-sorting floats). -0 maps just below +0, which std::sort treats as equal;
// both orders give the same multiset of values, so statistics do not change.
inline std::uint32_t float_key(float f) {
  const std::uint32_t u = std::bit_cast<std::uint32_t>(f);
  return (u & 0x80000000u) ? ~u : (u | 0x80000000u);
}
inline float key_float(std::uint32_t k) {
  const std::uint32_t u = (k & 0x80000000u) ? (k & 0x7fffffffu) : ~k;
  return std::bit_cast<float>(u);
}

}  // namespace

void sort_floats(float* v, std::size_t n, std::vector<std::uint32_t>& scratch) {
  if (n < 512) {
    std::sort(v, v + n);
    return;
  }
  constexpr int kBits = 11;
  constexpr std::uint32_t kBuckets = 1u << kBits;
  constexpr std::uint32_t kMask = kBuckets - 1;
  scratch.resize(2 * n);
  std::uint32_t* a = scratch.data();
  std::uint32_t* b = a + n;
  // One read pass for all three histograms; then three stable scatter passes
  // (v -> a, a -> b, b -> v), computing keys on the way in and values on the
  // way out, so no separate conversion passes.
  std::uint32_t hist[3][kBuckets] = {};
  for (std::size_t i = 0; i < n; ++i) {
    const std::uint32_t k = float_key(v[i]);
    ++hist[0][k & kMask];
    ++hist[1][(k >> kBits) & kMask];
    ++hist[2][k >> (2 * kBits)];
  }
  for (int pass = 0; pass < 3; ++pass) {
    std::uint32_t sum = 0;
    for (std::uint32_t j = 0; j < kBuckets; ++j) {
      const std::uint32_t c = hist[pass][j];
      hist[pass][j] = sum;
      sum += c;
    }
  }
  for (std::size_t i = 0; i < n; ++i) {
    const std::uint32_t k = float_key(v[i]);
    a[hist[0][k & kMask]++] = k;
  }
  for (std::size_t i = 0; i < n; ++i) {
    const std::uint32_t k = a[i];
    b[hist[1][(k >> kBits) & kMask]++] = k;
  }
  for (std::size_t i = 0; i < n; ++i) {
    const std::uint32_t k = b[i];
    v[hist[2][k >> (2 * kBits)]++] = key_float(k);
  }
}

namespace {

// Median of sorted v[a..b) (mean of the two middle values for an even count).
inline double median_sorted(const float* v, std::int64_t a, std::int64_t b) {
  const std::int64_t n = b - a;
  const double lo = v[a + (n - 1) / 2];
  const double hi = v[a + n / 2];
  return 0.5 * (lo + hi);
}

// Quantile of sorted v[0..n) with linear interpolation between order
// statistics, h = (n - 1) p (Hyndman & Fan 1996, Am. Stat. 50, 361, type 7;
// numpy's default).
inline double quantile_sorted(const float* v, std::int64_t n, double p) {
  const double h = static_cast<double>(n - 1) * p;
  const auto i = static_cast<std::int64_t>(std::floor(h));
  if (i + 1 >= n) return v[n - 1];
  return v[i] + (h - static_cast<double>(i)) * (static_cast<double>(v[i + 1]) - v[i]);
}

// Sample standard deviation (n - 1) of v[a..b) in one pass over values shifted
// by `shift` (the current median, close to the mean, so sum_sq - sum^2 / n has
// no cancellation); four partial sums in a fixed order (deterministic).
inline double stddev_sorted(const float* v, std::int64_t a, std::int64_t b, double shift) {
  const std::int64_t n = b - a;
  if (n < 2) return 0.0;
  double s[4] = {0, 0, 0, 0}, q[4] = {0, 0, 0, 0};
  std::int64_t i = a;
  for (; i + 4 <= b; i += 4)
    for (int j = 0; j < 4; ++j) {
      const double d = v[i + j] - shift;
      s[j] += d;
      q[j] += d * d;
    }
  for (int j = 0; i < b; ++i, ++j) {
    const double d = v[i] - shift;
    s[j] += d;
    q[j] += d * d;
  }
  const double sum = (s[0] + s[1]) + (s[2] + s[3]);
  const double sq = (q[0] + q[1]) + (q[2] + q[3]);
  const double var = (sq - sum * sum / static_cast<double>(n)) / static_cast<double>(n - 1);
  return var > 0.0 ? std::sqrt(var) : 0.0;
}

}  // namespace

ClipResult clip_sorted(const float* v, std::int64_t n, double k, int max_iterations,
                       double correction) {
  ClipResult r;
  r.n_valid = n;
  if (n <= 0) {
    r.centre = r.sigma_raw = r.sigma = std::numeric_limits<double>::quiet_NaN();
    return r;
  }
  // Start: median and sigma from the interquartile range, IQR / (2 Phi^-1(3/4))
  // (REF-ROBUST-02), robust against a bright source filling part of the box; if
  // the IQR is 0 (mostly identical values), the plain standard deviation.
  double m = median_sorted(v, 0, n);
  double s = (quantile_sorted(v, n, 0.75) - quantile_sorted(v, n, 0.25)) / 1.3489795003921634;
  if (!(s > 0.0)) s = stddev_sorted(v, 0, n, m);
  std::int64_t a = 0, b = n;
  bool first = true;
  for (int it = 0; it < max_iterations; ++it) {
    // Keep |x - m| <= k s: a contiguous range of the sorted sample.
    const double lo = m - k * s, hi = m + k * s;
    const std::int64_t na = std::lower_bound(v, v + n, lo, [](float x, double t) { return x < t; }) - v;
    const std::int64_t nb = std::upper_bound(v, v + n, hi, [](double t, float x) { return t < x; }) - v;
    r.iterations = it + 1;
    if (!first && na == a && nb == b) {
      r.converged = true;
      break;
    }
    first = false;
    if (nb - na < 2) {  // degenerate window (s = 0 between distinct middle values): keep the last one
      r.converged = true;
      break;
    }
    a = na;
    b = nb;
    m = median_sorted(v, a, b);
    s = stddev_sorted(v, a, b, m);
    if (s == 0.0) {  // constant kept values: nothing left to clip
      r.converged = true;
      break;
    }
  }
  r.centre = m;
  r.sigma_raw = s;
  r.sigma = s * correction;
  r.n_kept = b - a;
  return r;
}

}  // namespace detail

namespace {
// Standard normal pdf and cdf (REF-ROBUST-04: Phi(x) = erfc(-x / sqrt 2) / 2).
inline double normal_pdf(double x) { return std::exp(-0.5 * x * x) / std::sqrt(2.0 * std::numbers::pi); }
inline double normal_cdf(double x) { return 0.5 * std::erfc(-x / std::numbers::sqrt2); }

// Variance ratio of N(0,1) truncated at +-x: 1 - 2 x phi(x) / (2 Phi(x) - 1)
// (doubly truncated normal; Johnson, Kotz & Balakrishnan 1994; REF-ROBUST-03).
inline double truncated_variance_ratio(double x) {
  return 1.0 - 2.0 * x * normal_pdf(x) / (2.0 * normal_cdf(x) - 1.0);
}
}  // namespace

double clipped_sigma_correction_single(double k) {
  if (!(k > 0.0)) throw std::invalid_argument("clip k must be > 0, got " + std::to_string(k));
  return 1.0 / std::sqrt(truncated_variance_ratio(k));
}

double clipped_sigma_correction(double k) {
  if (!(k >= 2.0) || !std::isfinite(k))
    throw std::invalid_argument("clip_sigma = " + std::to_string(k) +
                                " breaks clip_sigma >= 2 (iterated clipping collapses below ~1.8)");
  // Iterated clipping at k times the current estimate s (in units of the true
  // sigma) maps s to sqrt(ratio(k s)); the data follow the same iteration from
  // s = 1, so the fixed point reached from s = 1 is the one that matters. The
  // map is a contraction there (converges in < 200 steps for k >= 2).
  double s = 1.0;
  for (int i = 0; i < 100000; ++i) {
    const double ns = std::sqrt(truncated_variance_ratio(k * s));
    if (std::fabs(ns - s) <= 1e-16) {
      s = ns;
      break;
    }
    s = ns;
  }
  return 1.0 / s;
}

ClipResult sigma_clip(std::vector<float>& values, double k, int max_iterations) {
  const double corr = clipped_sigma_correction(k);
  const auto end = std::remove_if(values.begin(), values.end(), [](float x) { return !std::isfinite(x); });
  values.erase(end, values.end());
  std::vector<std::uint32_t> scratch;
  detail::sort_floats(values.data(), values.size(), scratch);
  return detail::clip_sorted(values.data(), static_cast<std::int64_t>(values.size()), k,
                             max_iterations, corr);
}

double mad_sigma(std::vector<float>& values) {
  const auto end = std::remove_if(values.begin(), values.end(), [](float x) { return !std::isfinite(x); });
  values.erase(end, values.end());
  const std::size_t n = values.size();
  if (n == 0) return std::numeric_limits<double>::quiet_NaN();
  std::sort(values.begin(), values.end());
  const double med = 0.5 * (static_cast<double>(values[(n - 1) / 2]) + values[n / 2]);
  std::vector<double> dev(n);
  for (std::size_t i = 0; i < n; ++i) dev[i] = std::fabs(values[i] - med);
  std::sort(dev.begin(), dev.end());
  const double mad = 0.5 * (dev[(n - 1) / 2] + dev[n / 2]);
  // sigma = MAD / Phi^-1(3/4), Phi^-1(0.75) = 0.6744897501960817 (REF-ROBUST-01).
  return mad / 0.6744897501960817;
}

}  // namespace skerry
