// Quality numerics: Gehrels (1986) limits, Euclidean counts, visibility area,
// completeness and reliability curves.
#include <gtest/gtest.h>

#include <cmath>
#include <limits>
#include <stdexcept>
#include <random>

#include "skerry/quality.h"

namespace skerry {
namespace {

// Gehrels (1986, ApJ 303, 336) Tables 1 and 2, column S = 1 (CL 0.8413): exact
// Poisson limits. Values from memory, confirmed here to 4 decimals by bisection of
// the Poisson CDF (sum_{k<=n} e^-l l^k/k! = 0.1587 for the upper limit; the
// complement for the lower one).
struct GehrelsRow { int n; double upper, lower; };
constexpr GehrelsRow kGehrels[] = {{0, 1.8410, 0.0},    {1, 3.2995, 0.1728},  {2, 4.6379, 0.7082},
                                   {3, 5.9182, 1.3673}, {4, 7.1628, 2.0857},  {5, 8.3825, 2.8403},
                                   {10, 14.2669, 6.8913}, {20, 25.5465, 15.5656}, {50, 58.1182, 42.9527}};

TEST(Gehrels, ApproximationsMatchTablesWithinStatedAccuracy) {
  // Gehrels states his eqs. (7) and (11) are good to ~1-2 % at S = 1 for small N and
  // better for large N; the tolerance below is 1.5 % at N = 0, 0.8 % from N = 1.
  for (const auto& r : kGehrels) {
    const double tol_u = r.n == 0 ? 0.015 : 0.008;
    EXPECT_NEAR(gehrels_upper(r.n) / r.upper, 1.0, tol_u) << "N = " << r.n;
    if (r.n == 0) EXPECT_EQ(gehrels_lower(0), 0.0);
    else EXPECT_NEAR(gehrels_lower(r.n) / r.lower, 1.0, 0.008) << "N = " << r.n;
  }
  // The closed forms themselves (eq. 7: N + sqrt(N + 3/4) + 1; eq. 11: N(1 - 1/9N - 1/3sqrtN)^3).
  EXPECT_NEAR(gehrels_upper(4), 4 + std::sqrt(4.75) + 1, 1e-12);
  EXPECT_NEAR(gehrels_lower(9), 9 * std::pow(1 - 1.0 / 81 - 1.0 / 9, 3), 1e-12);
}

TEST(Counts, BinsMatchDirectCountAndEuclideanScaling) {
  std::vector<double> s = {1.5e-3, 2.0e-3, 2.2e-3, 9e-3, 1.1e-2, 5e-2, std::nan(""), -1.0};
  CountsOptions o;
  o.edges_jy = {1e-3, 1e-2, 1e-1};
  const double area = 0.01;  // sr
  const auto b = euclidean_counts(s, o, [&](double) { return area; });
  ASSERT_EQ(b.size(), 2u);
  EXPECT_EQ(b[0].n, 4u);  // 1.5, 2.0, 2.2, 9 mJy
  EXPECT_EQ(b[1].n, 2u);  // 11, 50 mJy
  // S_c = sqrt(lo hi); S^2.5 dN/dS = S_c^2.5 N / (A dS) (common practice definition).
  const double sc = std::sqrt(1e-3 * 1e-2);
  EXPECT_NEAR(b[0].centre_jy, sc, 1e-15);
  EXPECT_NEAR(b[0].euclid, std::pow(sc, 2.5) * 4 / (area * 9e-3), 1e-12 * b[0].euclid);
  EXPECT_NEAR(b[0].euclid_hi / b[0].euclid, gehrels_upper(4) / 4, 1e-12);
  EXPECT_NEAR(b[0].euclid_lo / b[0].euclid, gehrels_lower(4) / 4, 1e-12);
}

TEST(Counts, PowerLawRecovered) {
  // Sources drawn from dN/dS = k S^-2.5 (Euclidean: S^2.5 dN/dS flat) between 1 and
  // 1000 mJy over A = 1e-3 sr; each bin's value must agree with k within
  // 3 Poisson sigma (N ~ 10^2..10^4 per bin).
  std::mt19937_64 rng(20261201);
  std::uniform_real_distribution<double> u(0, 1);
  const double smin = 1e-3, smax = 1.0, A = 1e-3;
  const std::size_t n = 20000;
  std::vector<double> s(n);
  // Inverse CDF of S^-2.5 on [smin, smax]: S = (smin^-1.5 - u (smin^-1.5 - smax^-1.5))^(-1/1.5).
  for (auto& v : s) v = std::pow(std::pow(smin, -1.5) - u(rng) * (std::pow(smin, -1.5) - std::pow(smax, -1.5)), -1 / 1.5);
  const double k = n * 1.5 / (std::pow(smin, -1.5) - std::pow(smax, -1.5)) / A;  // per sr
  CountsOptions o;
  o.edges_jy = {1e-3, 1e-2, 1e-1, 1.0};
  const auto b = euclidean_counts(s, o, [&](double) { return A; });
  for (const auto& bin : b) {
    // Expected per bin: the integral of k S^-2.5 over the bin, S_c^2.5 / dS times it.
    const double expect_n = k * A / 1.5 * (std::pow(bin.lo_jy, -1.5) - std::pow(bin.hi_jy, -1.5));
    EXPECT_NEAR(static_cast<double>(bin.n), expect_n, 3 * std::sqrt(expect_n));
  }
}

// The counting rule (quality.h): the peak for an unresolved component (S_int = S_peak
// by the definition of Jy/beam for a point source, common practice), S_int for a
// resolved one; a source counts by the sum over its components.
TEST(Counts, CountFluxTakesPeakForUnresolvedAndSumsPerSource) {
  const double nan = std::numeric_limits<double>::quiet_NaN();
  const std::vector<double> peak{1e-3, 2e-3, 3e-3, nan, 5e-3};
  const std::vector<double> sint{1.2e-3, 4e-3, 3.1e-3, 7e-3, 6e-3};
  const std::vector<double> resolved{0, 1, 0, 0, nan};
  const auto f = count_flux_jy(peak, sint, resolved);
  ASSERT_EQ(f.size(), 5u);
  EXPECT_EQ(f[0], 1e-3);
  EXPECT_EQ(f[1], 4e-3);
  EXPECT_EQ(f[2], 3e-3);
  EXPECT_TRUE(std::isnan(f[3]));  // unresolved without a peak
  EXPECT_TRUE(std::isnan(f[4]));  // no decision
  // Sources 7 (components 0, 1), 9 (component 2), 8 (component 3: NaN), 4 (none).
  const auto s = sum_by_group(f, {7, 7, 9, 8, 11}, {7, 8, 9, 4});
  ASSERT_EQ(s.size(), 4u);
  EXPECT_DOUBLE_EQ(s[0], 5e-3);
  EXPECT_TRUE(std::isnan(s[1]));
  EXPECT_EQ(s[2], 3e-3);
  EXPECT_TRUE(std::isnan(s[3]));
  EXPECT_THROW(count_flux_jy(peak, sint, {0, 1}), std::invalid_argument);
  EXPECT_THROW(sum_by_group(f, {1, 2}, {1}), std::invalid_argument);
}

TEST(VisibilityArea, MatchesPixelCount) {
  ImageF rms(4, 5);
  for (int y = 0; y < 4; ++y) for (int x = 0; x < 5; ++x) rms(y, x) = static_cast<float>(1e-4 * (1 + y * 5 + x));
  rms(0, 0) = std::nanf("");
  const double pix = 2e-9;
  const auto v = visibility_area(rms, pix, {5e-4, 1e-3, 2e-3, 3e-3});
  EXPECT_NEAR(v.area_sr[0], 4 * pix, 1e-20);   // 2..5 e-4 (1e-4 is NaN)
  EXPECT_NEAR(v.area_sr[1], 9 * pix, 1e-20);
  EXPECT_NEAR(v.area_sr[2], 19 * pix, 1e-20);
  EXPECT_NEAR(v.area_sr[3], 19 * pix, 1e-20);
  EXPECT_NEAR(v.total_area_sr, 19 * pix, 1e-20);
  EXPECT_NEAR(v.area_at(7.5e-4), 6.5 * pix, 1e-20);
  EXPECT_EQ(v.area_at(1e-5), 0.0);
}

TEST(Fractions, WilsonAndCurves) {
  // Wilson (1927) score interval, k = 7, n = 10, z = 1: centre 0.681818..., half 0.1327...
  double lo, hi;
  wilson_interval(7, 10, 1.0, lo, hi);
  const double p = 0.7, den = 1.1, c = (p + 0.05) / den, h = std::sqrt(p * (1 - p) / 10 + 1.0 / 400) / den;
  EXPECT_NEAR(lo, c - h, 1e-12);
  EXPECT_NEAR(hi, c + h, 1e-12);
  const auto f = fraction_curve({1, 1.5, 2.5, 2.7, 2.9}, {false, true, true, true, false}, {NAN, 1.2, 1.0, 1.1, NAN},
                                {1, 2, 3});
  ASSERT_EQ(f.size(), 2u);
  EXPECT_EQ(f[0].n, 2u);
  EXPECT_EQ(f[0].k, 1u);
  EXPECT_NEAR(f[0].mean_ratio, 1.2, 1e-12);
  EXPECT_NEAR(f[1].fraction, 2.0 / 3.0, 1e-12);
  EXPECT_NEAR(f[1].mean_ratio, 1.05, 1e-12);
  const auto r = reliability_curve({5.5, 5.6, 5.7, 6.5, 8}, {5.1}, {5, 6, 7, 10});
  EXPECT_NEAR(r[0].fraction, 2.0 / 3.0, 1e-12);
  EXPECT_NEAR(r[1].fraction, 1.0, 1e-12);
  EXPECT_NEAR(r[0].fraction_lo, std::max(0.0, 1 - gehrels_upper(1) / 3), 1e-12);
  std::vector<FractionBin> bins(4);
  const double fr[] = {0.2, 0.95, 0.85, 0.97};
  for (int i = 0; i < 4; ++i) { bins[i].centre = i; bins[i].fraction = fr[i]; bins[i].n = 10; }
  EXPECT_EQ(fraction_limit(bins, 0.9), 3.0);  // 0.85 breaks the run at bin 2
}

}  // namespace
}  // namespace skerry
