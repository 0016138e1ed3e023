// Residual-driven decomposition (FitOptions::residual_search): blended point
// sources closer than the beam are split, isolated point sources are not, and
// the search is bounded and deterministic.
//
// External check: the truth is injected. Every source is rendered on the sky by
// fittest::render_sky_gaussian (pixel -> sky -> tangent plane, independent of
// the fitter's pixel model) into beam-correlated noise from the simulator, and
// the fitted components are compared with the injected positions and flux
// densities. Targets are the project's stated decomposition targets:
// pairs of point sources both >= 10 sigma split in >= 90 % of cases at 1.0-1.5
// beam FWHMs and >= 40 % at 0.6-1.0; at most 1 % of isolated point sources
// >= 10 sigma split in two. The beam here (6" x 4.5", PA 35 deg at 1.5" pixels,
// elliptical and rotated) is not the one the threshold was chosen on
// (docs/CONVENTIONS.md "Fitting and errors": circular beams of 3.5-8 pixels).
#include <gtest/gtest.h>
#include <tbb/global_control.h>

#include <cmath>
#include <random>
#include <vector>

#include "skerry/constants.h"
#include "skerry/fitting.h"
#include "skerry/simulate.h"
#include "test_helpers.h"

namespace {

using skerry::Beam;
using skerry::FitOptions;
using skerry::IslandCutout;
using skerry::IslandFit;
using skerry::sim::TanGrid;

constexpr double kRa0 = 201.25, kDec0 = -38.6;  // Lanternfish Field centre
constexpr double kPixArcsec = 1.5;
constexpr int kSide = 48;
constexpr double kRms = 1e-4;
const Beam kBeam{6.0, 4.5, 35.0};

struct Truth {
  double x, y, peak;
};

// One stamp: `sources` (pixel positions, peaks [Jy/beam]) rendered on the sky
// into correlated noise of seed `seed`, cut out as the island above 3 sigma
// around the brightest source.
IslandCutout stamp(const TanGrid& sky, const std::vector<Truth>& sources, std::uint64_t seed,
                   const Eigen::Matrix2d& bp) {
  skerry::ImageF img = skerry::sim::correlated_noise(kSide, kSide, bp, kRms, seed);
  for (const Truth& s : sources) {
    double ra, dec;
    sky.pix_to_sky(s.x, s.y, ra, dec);
    fittest::render_sky_gaussian(img, sky, ra, dec, s.peak, skerry::to_ellipse(kBeam));
  }
  const Truth& b = sources[0].peak >= sources.back().peak ? sources[0] : sources.back();
  return fittest::make_cutout(img, kRms, 0, 0, kSide, kSide, 3.0, bp, 0, 2,
                              static_cast<int>(std::lround(b.x)), static_cast<int>(std::lround(b.y)));
}

// Both injected sources have their own fitted component within `radius` pixels
// (distinct components).
bool split_ok(const IslandFit& f, const Truth& a, const Truth& b, double radius) {
  int ia = -1, ib = -1;
  double da = radius, db = radius;
  for (int i = 0; i < static_cast<int>(f.components.size()); ++i) {
    const auto& c = f.components[i];
    const double d1 = std::hypot(c.x - a.x, c.y - a.y), d2 = std::hypot(c.x - b.x, c.y - b.y);
    if (d1 < da) da = d1, ia = i;
    if (d2 < db) db = d2, ib = i;
  }
  return ia >= 0 && ib >= 0 && ia != ib;
}

struct PairStats {
  int trials = 0, split = 0;
  std::vector<double> flux_ratio;  // fitted / injected peak, matched components of split pairs
};

PairStats run_pairs(double sep_lo_beams, double sep_hi_beams, int trials, std::uint64_t seed0) {
  const TanGrid sky = TanGrid::square(kRa0, kDec0, kSide / 2.0, kSide / 2.0, kPixArcsec);
  const Eigen::Matrix2d bp = fittest::beam_pix(sky, kBeam, kSide / 2.0, kSide / 2.0);
  const double fwhm_pix = kBeam.maj_arcsec / kPixArcsec;  // separations in major-axis FWHMs
  std::mt19937_64 rng(seed0);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  PairStats st;
  FitOptions opt;
  for (int t = 0; t < trials; ++t) {
    const double sep = (sep_lo_beams + (sep_hi_beams - sep_lo_beams) * u(rng)) * fwhm_pix;
    const double ang = skerry::kPi * u(rng);
    // SNR 10-200, log-uniform, each source on its own.
    const double s1 = 10.0 * std::pow(20.0, u(rng)), s2 = 10.0 * std::pow(20.0, u(rng));
    const double cx = kSide / 2.0 + u(rng) - 0.5, cy = kSide / 2.0 + u(rng) - 0.5;
    const Truth a{cx + 0.5 * sep * std::cos(ang), cy + 0.5 * sep * std::sin(ang), s1 * kRms};
    const Truth b{cx - 0.5 * sep * std::cos(ang), cy - 0.5 * sep * std::sin(ang), s2 * kRms};
    const IslandFit f = skerry::fit_island(stamp(sky, {a, b}, seed0 * 1000 + t, bp), opt);
    ++st.trials;
    if (split_ok(f, a, b, std::max(0.5 * sep, 0.35 * fwhm_pix))) ++st.split;
  }
  return st;
}

TEST(Decomposition, PairsAtOneToOneAndAHalfBeamsAreSplit) {
  const PairStats st = run_pairs(1.0, 1.5, 200, 41);
  const double frac = static_cast<double>(st.split) / st.trials;
  std::printf("pairs at 1.0-1.5 beams: %d of %d split (%.3f)\n", st.split, st.trials, frac);
  EXPECT_GE(frac, 0.90);
}

TEST(Decomposition, PairsCloserThanABeamAreOftenSplit) {
  const PairStats st = run_pairs(0.6, 1.0, 200, 43);
  const double frac = static_cast<double>(st.split) / st.trials;
  std::printf("pairs at 0.6-1.0 beams: %d of %d split (%.3f)\n", st.split, st.trials, frac);
  EXPECT_GE(frac, 0.40);
}

TEST(Decomposition, PairsAreNotSplitWithoutTheSearch) {
  // The same pairs closer than a beam without the residual search: one maximum,
  // one component (the search is what splits them).
  const TanGrid sky = TanGrid::square(kRa0, kDec0, kSide / 2.0, kSide / 2.0, kPixArcsec);
  const Eigen::Matrix2d bp = fittest::beam_pix(sky, kBeam, kSide / 2.0, kSide / 2.0);
  FitOptions off;
  off.residual_search = false;
  FitOptions on;
  const Truth a{23.0, 24.0, 60 * kRms}, b{26.2, 24.5, 40 * kRms};  // 0.81 beam apart
  const IslandCutout cut = stamp(sky, {a, b}, 7, bp);
  const IslandFit f0 = skerry::fit_island(cut, off), f1 = skerry::fit_island(cut, on);
  EXPECT_EQ(f0.components.size(), 1u);
  EXPECT_EQ(f0.n_added, 0);
  ASSERT_EQ(f1.components.size(), 2u);
  EXPECT_EQ(f1.n_added, 1);
  EXPECT_TRUE(split_ok(f1, a, b, 1.5));
  for (const auto& c : f1.components) EXPECT_TRUE(c.fit_flags & skerry::kFitAddedFromResidual);
  // Total flux density kept within the errors: sum of A sa sb equals the
  // injected 2 pi sigma_beam^2 sum of peaks (REF-GAUSS-02).
  double s = 0.0;
  for (const auto& c : f1.components) s += c.amplitude * c.sigma_major_pix * c.sigma_minor_pix;
  const double truth = (a.peak + b.peak) * std::sqrt(bp.determinant());
  EXPECT_NEAR(s / truth, 1.0, 0.05);
}

TEST(Decomposition, IsolatedPointSourcesAreNotSplit) {
  const TanGrid sky = TanGrid::square(kRa0, kDec0, kSide / 2.0, kSide / 2.0, kPixArcsec);
  const Eigen::Matrix2d bp = fittest::beam_pix(sky, kBeam, kSide / 2.0, kSide / 2.0);
  std::mt19937_64 rng(47);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  FitOptions opt;
  const int trials = 600;
  int split = 0;
  for (int t = 0; t < trials; ++t) {
    const double snr = 10.0 * std::pow(50.0, u(rng));  // 10-500 sigma
    const Truth a{kSide / 2.0 + u(rng) - 0.5, kSide / 2.0 + u(rng) - 0.5, snr * kRms};
    const IslandFit f = skerry::fit_island(stamp(sky, {a}, 5000 + t, bp), opt);
    if (f.components.size() > 1) ++split;
  }
  std::printf("isolated point sources split: %d of %d\n", split, trials);
  EXPECT_LE(split, trials / 100);
}

// Extended emission takes components up to the cap; at the cap with residual
// structure left the components say so; the result does not depend on the
// number of threads.
TEST(Decomposition, BoundedFlaggedAndThreadIndependent) {
  const TanGrid sky = TanGrid::square(kRa0, kDec0, kSide / 2.0, kSide / 2.0, kPixArcsec);
  const Eigen::Matrix2d bp = fittest::beam_pix(sky, kBeam, kSide / 2.0, kSide / 2.0);
  skerry::ImageF img = skerry::sim::correlated_noise(kSide, kSide, bp, kRms, 3);
  // A curved ridge (an arc of 14 beam-sized knots, 300 sigma each): no Gaussian
  // mixture of a few components describes it.
  std::vector<Truth> arc;
  for (int k = 0; k < 14; ++k) {
    const double phi = 0.2 + 0.2 * k;
    arc.push_back({24.0 + 14.0 * std::cos(phi) - 7.0, 12.0 + 14.0 * std::sin(phi), 3e-2});
  }
  for (const Truth& s : arc) {
    double ra, dec;
    sky.pix_to_sky(s.x, s.y, ra, dec);
    fittest::render_sky_gaussian(img, sky, ra, dec, s.peak, skerry::to_ellipse(kBeam));
  }
  const IslandCutout cut = fittest::make_cutout(img, kRms, 0, 0, kSide, kSide, 3.0, bp, 0, 2,
                                                static_cast<int>(arc[7].x), static_cast<int>(arc[7].y));
  FitOptions opt;
  opt.max_components = 3;
  const IslandFit f = skerry::fit_island(cut, opt);
  EXPECT_EQ(f.components.size(), 3u);
  EXPECT_TRUE(f.residual_at_cap);
  for (const auto& c : f.components) EXPECT_TRUE(c.fit_flags & skerry::kFitResidualAtCap);
  opt.max_components = 8;
  const IslandFit f8 = skerry::fit_island(cut, opt);
  EXPECT_GT(f8.components.size(), 3u);
  EXPECT_LE(f8.components.size(), 8u);
  EXPECT_LT(f8.residual_rms, f.residual_rms);

  std::vector<IslandCutout> many(12, cut);
  for (std::size_t i = 0; i < many.size(); ++i) many[i].island_id = static_cast<std::int64_t>(i);
  std::vector<IslandFit> one, two;
  {
    tbb::global_control c(tbb::global_control::max_allowed_parallelism, 1);
    one = skerry::fit_islands(many, opt);
  }
  {
    tbb::global_control c(tbb::global_control::max_allowed_parallelism, 2);
    two = skerry::fit_islands(many, opt);
  }
  ASSERT_EQ(one.size(), two.size());
  for (std::size_t i = 0; i < one.size(); ++i) {
    ASSERT_EQ(one[i].components.size(), two[i].components.size());
    EXPECT_EQ(one[i].chi2, two[i].chi2);
    for (std::size_t j = 0; j < one[i].components.size(); ++j) {
      EXPECT_EQ(one[i].components[j].x, two[i].components[j].x);
      EXPECT_EQ(one[i].components[j].amplitude, two[i].components[j].amplitude);
    }
  }
}

}  // namespace
