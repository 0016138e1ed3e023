// Sky model: source counts, positions, shapes, doubles, spectra, determinism.
#include <gtest/gtest.h>
#include <tbb/global_control.h>

#include <algorithm>
#include <cmath>

#include "skerry/constants.h"
#include "skerry/simulate.h"

using namespace skerry;
using namespace skerry::sim;

namespace {

// Kolmogorov-Smirnov: sup |F_n - F| against the analytic CDF of the truncated power
// law dN/dS ~ S^-g on [a, b]: F(S) = (S^(1-g) - a^(1-g)) / (b^(1-g) - a^(1-g)).
// Critical value at significance 0.001 for large n: 1.949 / sqrt(n) (Kolmogorov's
// limiting distribution; Smirnov 1948, Ann. Math. Stat. 19, 279, table; from memory).
TEST(SkyModel, FluxDensitiesFollowThePowerLawCount) {
  SkyModelOptions o;
  o.count = 20000;
  o.s_min_jy = 1e-4;
  o.s_max_jy = 0.1;
  o.slope = 1.8;
  const SkyModel m = draw_sky_model(o, 2024);
  ASSERT_EQ(m.sources.size(), o.count);
  std::vector<double> s;
  for (const auto& src : m.sources) s.push_back(src.spectrum.s_ref_jy);
  std::sort(s.begin(), s.end());
  EXPECT_GE(s.front(), o.s_min_jy);
  EXPECT_LE(s.back(), o.s_max_jy);
  const double e = 1.0 - o.slope;
  auto cdf = [&](double x) {
    return (std::pow(x, e) - std::pow(o.s_min_jy, e)) / (std::pow(o.s_max_jy, e) - std::pow(o.s_min_jy, e));
  };
  double d = 0.0;
  const double n = static_cast<double>(s.size());
  for (std::size_t i = 0; i < s.size(); ++i) {
    const double f = cdf(s[i]);
    d = std::max({d, std::abs((i + 1) / n - f), std::abs(i / n - f)});
  }
  EXPECT_LT(d, 1.949 / std::sqrt(n));
  // A wrong slope is rejected by the same test (the test can fail).
  SkyModelOptions w = o;
  w.slope = 1.9;
  auto cdf_w = [&](double x) {
    const double ew = 1.0 - w.slope;
    return (std::pow(x, ew) - std::pow(o.s_min_jy, ew)) / (std::pow(o.s_max_jy, ew) - std::pow(o.s_min_jy, ew));
  };
  double dw = 0.0;
  for (std::size_t i = 0; i < s.size(); ++i) dw = std::max(dw, std::abs((i + 1) / n - cdf_w(s[i])));
  EXPECT_GT(dw, 1.949 / std::sqrt(n));
}

// Maximum-likelihood slope of a power law above s_min: g = 1 + n / sum ln(S_i / s_min),
// standard error (g - 1) / sqrt(n) (Clauset, Shalizi & Newman 2009, SIAM Review 51,
// 661, eqs. 3.1 and 3.2). s_max so large that the truncation (mass 1e6^-(g-1) ~ 2e-6
// for g = 2.0) is negligible. Tolerance 4 standard errors.
TEST(SkyModel, MaximumLikelihoodSlopeMatchesWithinItsError) {
  for (double slope : {1.6, 2.0, 2.5}) {
    SkyModelOptions o;
    o.count = 8000;
    o.s_min_jy = 1e-5;
    o.s_max_jy = 1e-5 * 1e8;
    o.slope = slope;
    const SkyModel m = draw_sky_model(o, 7);
    double sum = 0.0;
    for (const auto& src : m.sources) sum += std::log(src.spectrum.s_ref_jy / o.s_min_jy);
    const double n = static_cast<double>(m.sources.size());
    const double g = 1.0 + n / sum;
    const double err = (g - 1.0) / std::sqrt(n);
    EXPECT_NEAR(g, slope, 4.0 * err) << "slope " << slope;
  }
}

// Positions uniform on the sphere in the cap: the fraction within r of the centre is
// (1 - cos r) / (1 - cos R) (area of a spherical cap, 2 pi (1 - cos r)); binomial
// tolerance 4 sigma.
TEST(SkyModel, PositionsAreUniformInTheCap) {
  SkyModelOptions o;
  o.count = 10000;
  o.radius_deg = 2.0;
  o.centre_dec_deg = -88.5;  // the cap crosses the pole: RA wraps, area still uniform
  const SkyModel m = draw_sky_model(o, 3);
  for (double r : {0.5, 1.0, 1.5}) {
    std::size_t inside = 0;
    for (const auto& s : m.sources) {
      const double sep = separation_deg(o.centre_ra_deg, o.centre_dec_deg, s.ra_deg, s.dec_deg);
      ASSERT_LE(sep, o.radius_deg + 1e-9);
      if (sep < r) ++inside;
    }
    const double p = (1 - std::cos(r * kDegToRad)) / (1 - std::cos(o.radius_deg * kDegToRad));
    const double n = static_cast<double>(o.count);
    EXPECT_NEAR(inside / n, p, 4.0 * std::sqrt(p * (1 - p) / n)) << r;
  }
}

TEST(SkyModel, ShapesDoublesAndSpectraAreAsDrawn) {
  SkyModelOptions o;
  o.count = 4000;
  o.resolved_fraction = 0.3;
  o.double_fraction = 0.25;
  o.double_sep_min_beams = 1.5;
  o.double_sep_max_beams = 1.5;
  o.double_flux_ratio_min = 0.5;
  o.unit_beam = Beam{6.0, 5.0, 0.0};
  o.curved_fraction = 0.5;
  o.alpha_mean = -0.7;
  o.alpha_sigma = 0.2;
  const SkyModel m = draw_sky_model(o, 11);
  std::size_t resolved = 0, primaries = 0, doubles = 0, curved = 0;
  double alpha_sum = 0;
  for (const auto& s : m.sources) {
    ASSERT_EQ(s.id, &s - m.sources.data());
    if (s.flags & kSimDoubleSecondary) {
      const SkySource& p = m.sources[static_cast<std::size_t>(s.partner_id)];
      EXPECT_EQ(p.partner_id, s.id);
      EXPECT_TRUE(p.flags & kSimDoublePrimary);
      EXPECT_EQ(p.id + 1, s.id);  // a companion follows its primary
      EXPECT_NEAR(separation_deg(p.ra_deg, p.dec_deg, s.ra_deg, s.dec_deg) * 3600.0, 9.0, 1e-6);
      const double ratio = s.spectrum.s_ref_jy / p.spectrum.s_ref_jy;
      EXPECT_GE(ratio, 0.5 - 1e-12);
      EXPECT_LE(ratio, 1.0 + 1e-12);
      EXPECT_EQ(s.intrinsic.maj, 0.0);
      ++doubles;
      continue;
    }
    ++primaries;
    if (s.flags & kSimResolved) {
      ++resolved;
      EXPECT_GE(s.intrinsic.maj, o.size_min_arcsec);
      EXPECT_LE(s.intrinsic.maj, o.size_max_arcsec);
      EXPECT_GE(s.intrinsic.min / s.intrinsic.maj, o.axis_ratio_min - 1e-12);
      EXPECT_LE(s.intrinsic.min, s.intrinsic.maj);
      EXPECT_GE(s.intrinsic.pa_deg, 0.0);
      EXPECT_LT(s.intrinsic.pa_deg, 180.0);
    }
    if (s.flags & kSimCurved) ++curved;
    alpha_sum += s.spectrum.alpha;
  }
  const double n = static_cast<double>(primaries);
  EXPECT_EQ(primaries, o.count);
  // Binomial fractions, 4 sigma.
  EXPECT_NEAR(resolved / n, 0.3, 4 * std::sqrt(0.3 * 0.7 / n));
  EXPECT_NEAR(doubles / n, 0.25, 4 * std::sqrt(0.25 * 0.75 / n));
  EXPECT_NEAR(curved / n, 0.5, 4 * std::sqrt(0.25 / n));
  EXPECT_NEAR(alpha_sum / n, -0.7, 4 * 0.2 / std::sqrt(n));
}

// Spectra: S(nu) = S_ref 10^(alpha t + beta t^2), t = log10(nu / nu_ref), written
// here with natural logarithms as S_ref (nu/nu_ref)^alpha exp(beta ln(10) t^2)
// (definition of the log-parabola, base 10; docs/CONVENTIONS.md "Spectra").
TEST(Spectrum, PowerLawAndLogParabola) {
  Spectrum p{0.01, 1.4e9, -0.7, 0.0};
  EXPECT_NEAR(p.flux_at(1.4e9), 0.01, 1e-17);
  EXPECT_NEAR(p.flux_at(2.8e9), 0.01 * std::pow(2.0, -0.7), 1e-15);
  // Two-point index recovers alpha: ln(S1/S2) / ln(nu1/nu2) (docs/CONVENTIONS.md).
  EXPECT_NEAR(std::log(p.flux_at(0.9e9) / p.flux_at(3.0e9)) / std::log(0.9 / 3.0), -0.7, 1e-12);
  Spectrum c{0.02, 1.0e9, 0.3, -0.25};
  for (double nu : {0.3e9, 0.9e9, 1.4e9, 3.0e9, 10e9}) {
    const double t = std::log10(nu / 1.0e9);
    const double want = 0.02 * std::pow(nu / 1.0e9, 0.3) * std::exp(-0.25 * std::log(10.0) * t * t);
    EXPECT_NEAR(c.flux_at(nu), want, want * 1e-13) << nu;
    // Local index by central difference in ln S vs ln nu.
    const double h = 1e-4;
    const double num = (std::log(c.flux_at(nu * std::exp(h))) - std::log(c.flux_at(nu * std::exp(-h)))) / (2 * h);
    EXPECT_NEAR(c.alpha_at(nu), num, 1e-7);
  }
}

TEST(SkyModel, FootprintAndMinimumSeparationAreRespected) {
  const TanGrid grid = TanGrid::square(201.25, -38.6, 255.5, 255.5, 1.5);
  SkyModelOptions o;
  o.count = 200;  // well below the random-packing limit (~430 discs of 30" here)
  o.radius_deg = 0.3;
  o.footprint = &grid;
  o.footprint_nx = 512;
  o.footprint_ny = 512;
  o.footprint_margin_pix = 10.0;
  o.min_separation_arcsec = 30.0;
  o.double_fraction = 0.2;
  o.unit_beam = Beam{6.0, 5.0, 0.0};
  const SkyModel m = draw_sky_model(o, 5);
  for (const auto& s : m.sources) {
    if (s.flags & kSimDoubleSecondary) continue;
    double x, y;
    ASSERT_TRUE(grid.sky_to_pix(s.ra_deg, s.dec_deg, x, y));
    EXPECT_GE(x, 9.5);
    EXPECT_LE(x, 501.5);
    EXPECT_GE(y, 9.5);
    EXPECT_LE(y, 501.5);
  }
  for (std::size_t i = 0; i < m.sources.size(); ++i)
    for (std::size_t j = i + 1; j < m.sources.size(); ++j) {
      if (m.sources[i].partner_id == static_cast<std::int64_t>(j)) continue;
      EXPECT_GE(separation_deg(m.sources[i].ra_deg, m.sources[i].dec_deg, m.sources[j].ra_deg,
                               m.sources[j].dec_deg) * 3600.0,
                30.0) << i << " " << j;
    }
}

TEST(SkyModel, DeterministicForAnyThreadCountAndSeedDependent) {
  SkyModelOptions o;
  o.count = 3000;
  o.double_fraction = 0.1;
  o.resolved_fraction = 0.3;
  o.curved_fraction = 0.2;
  std::vector<SkySource> ref;
  for (int threads : {1, 2, 8}) {
    tbb::global_control gc(tbb::global_control::max_allowed_parallelism, threads);
    const SkyModel m = draw_sky_model(o, 42);
    if (ref.empty()) {
      ref = m.sources;
      continue;
    }
    ASSERT_EQ(m.sources.size(), ref.size());
    for (std::size_t i = 0; i < ref.size(); ++i) {
      EXPECT_EQ(m.sources[i].ra_deg, ref[i].ra_deg);
      EXPECT_EQ(m.sources[i].dec_deg, ref[i].dec_deg);
      EXPECT_EQ(m.sources[i].spectrum.s_ref_jy, ref[i].spectrum.s_ref_jy);
      EXPECT_EQ(m.sources[i].spectrum.alpha, ref[i].spectrum.alpha);
      EXPECT_EQ(m.sources[i].intrinsic.maj, ref[i].intrinsic.maj);
      EXPECT_EQ(m.sources[i].flags, ref[i].flags);
    }
  }
  const SkyModel other = draw_sky_model(o, 43);
  EXPECT_NE(other.sources[0].ra_deg, ref[0].ra_deg);
}

TEST(SkyModel, BadOptionsNameTheOption) {
  SkyModelOptions o;
  o.s_min_jy = 0.0;
  try {
    draw_sky_model(o, 1);
    FAIL() << "no exception";
  } catch (const std::invalid_argument& e) {
    EXPECT_STREQ(e.what(), "s_min_jy = 0 breaks 0 < s_min_jy < s_max_jy");
  }
  SkyModelOptions f;
  const TanGrid grid = TanGrid::square(0.0, 0.0, 5.0, 5.0, 1.0);  // far from the cap
  f.footprint = &grid;
  f.footprint_nx = 10;
  f.footprint_ny = 10;
  f.max_redraws = 50;
  EXPECT_THROW(draw_sky_model(f, 1), std::invalid_argument);
}

}  // namespace
