// modules/catalogue: flag bits, designations, source grouping, position flags,
// and the error of an island's pixel-sum flux density in correlated noise.
#include <gtest/gtest.h>

#include <Eigen/LU>
#include <map>
#include <numeric>
#include <random>
#include <set>

#include "extract/catalogue_tables.h"
#include "skerry/catalogue.h"
#include "skerry/constants.h"
#include "skerry/gaussian.h"
#include "skerry/simulate.h"
#include "skerry/sky.h"

namespace skerry {
namespace {

const Beam kBeam{6.0, 6.0, 0.0};

TEST(Flags, BitsAndNamesAreUnique) {
  std::set<std::uint32_t> bits;
  std::set<std::string> names;
  for (const auto& f : flag_table()) {
    EXPECT_EQ(f.bit & (f.bit - 1), 0u) << f.name << " is not a single bit";
    EXPECT_TRUE(bits.insert(f.bit).second) << f.name;
    EXPECT_TRUE(names.insert(f.name).second) << f.name;
    EXPECT_GT(std::string(f.description).size(), 10u);
  }
  EXPECT_EQ(flag_names(kFlagNearEdge | kFlagFitFailed), "near_edge|fit_failed");
  EXPECT_EQ(flag_names(0), "");
}

// `flags` holds warnings only and `info_bits` information only: the two tables
// are each a run of single bits from bit 0, and no name appears in both.
TEST(Flags, WarningsAndInformationAreSeparate) {
  std::set<std::string> warn;
  std::uint32_t expect = 1;
  for (const auto& f : flag_table()) {
    EXPECT_EQ(f.bit, expect) << f.name;
    expect <<= 1;
    warn.insert(f.name);
  }
  expect = 1;
  for (const auto& f : info_bit_table()) {
    EXPECT_EQ(f.bit, expect) << f.name;
    expect <<= 1;
    EXPECT_EQ(warn.count(f.name), 0u) << f.name << " is both a warning and information";
    EXPECT_GT(std::string(f.description).size(), 10u);
  }
  for (const char* info : {"unresolved", "fixed_shape", "fewer_components", "multi_island"})
    EXPECT_EQ(warn.count(info), 0u) << info << " must not count as a quality warning";
  EXPECT_EQ(info_bit_names(kInfoUnresolved | kInfoMultiIsland), "unresolved|multi_island");
}

// Source: IAU recommendations for nomenclature (designation JHHMMSS.s+DDMMSS,
// truncated, never rounded; docs/CONVENTIONS.md "Catalogues and names"). RA 201.25 deg =
// 13h25m00s exactly; Dec -38.6 deg = -38d36m00s.
TEST(Designation, TruncatesNeverRounds) {
  EXPECT_EQ(designation("SKDC", 201.25, -38.6), "SKDC J132500.0-383600");
  // 13h25m00.09s -> .0 ; -38d35m59.9s -> 383559
  EXPECT_EQ(designation("SKDC", (13 + 25 / 60.0 + 0.09 / 3600.0) * 15.0, -(38 + 35 / 60.0 + 59.9 / 3600.0)),
            "SKDC J132500.0-383559");
  // 23h59m59.99s stays 23h59m59.9s (no carry into 24h).
  EXPECT_EQ(designation("SKDC", 359.99995, 0.5), "SKDC J235959.9+003000");
  EXPECT_EQ(designation("SKDC", 0.0, -0.0001), "SKDC J000000.0-000000");
}

CatalogueComponent point(std::int64_t island, double ra, double dec, double s) {
  CatalogueComponent c;
  c.island_id = island;
  c.ra_deg = ra;
  c.dec_deg = dec;
  c.s_int_jy = s;
  c.s_peak_jy_per_beam = s;
  c.s_int_err_jy = 0.1 * s;
  c.ra_err_arcsec = c.dec_err_arcsec = 0.1;
  c.fitted_arcsec = to_ellipse(kBeam);
  c.deconv_arcsec = {0, 0, 0};
  c.info_bits = kInfoUnresolved;
  return c;
}

// Offsets along Dec on the sky [arcsec].
double dec_off(double arcsec) { return -38.6 + arcsec / 3600.0; }

TEST(Grouping, NeighbouringIslandsJoinWithinTheGap) {
  GroupingOptions o;  // gap 1 beam: point sources link up to 2 beams apart
  // 1.5 beams apart, equal flux: one source of two islands.
  auto s = group_sources({point(1, 201.25, dec_off(0), 1.0), point(2, 201.25, dec_off(9.0), 1.0)}, {}, kBeam, o);
  ASSERT_EQ(s.size(), 1u);
  EXPECT_EQ(s[0].components.size(), 2u);
  EXPECT_EQ(s[0].structure, SourceStructure::Composite);
  EXPECT_NE(s[0].info_bits & kInfoMultiIsland, 0u);
  EXPECT_EQ(s[0].info_bits & kInfoUnresolved, 0u) << "two unresolved lobes make a measured LAS";
  // LAS of two points = their separation (deconvolved extents 0).
  EXPECT_NEAR(s[0].las_arcsec, 9.0, 1e-6);
  // 2.5 beams apart: gap 1.5 beams > 1: two sources.
  s = group_sources({point(1, 201.25, dec_off(0), 1.0), point(2, 201.25, dec_off(15.0), 1.0)}, {}, kBeam, o);
  EXPECT_EQ(s.size(), 2u);
  EXPECT_NE(s[0].info_bits & kInfoUnresolved, 0u) << "a single unresolved component: LAS is an upper limit";
  // Flux ratio 20 > 10: not linked.
  s = group_sources({point(1, 201.25, dec_off(0), 1.0), point(2, 201.25, dec_off(9.0), 20.0)}, {}, kBeam, o);
  EXPECT_EQ(s.size(), 2u);
  // ... unless the ratio restriction is off.
  o.link_max_flux_ratio = 0.0;
  s = group_sources({point(1, 201.25, dec_off(0), 1.0), point(2, 201.25, dec_off(9.0), 20.0)}, {}, kBeam, o);
  EXPECT_EQ(s.size(), 1u);
  // Islands only.
  o.link_gap_beams = -1.0;
  s = group_sources({point(1, 201.25, dec_off(0), 1.0), point(2, 201.25, dec_off(1.0), 1.0),
                     point(2, 201.25, dec_off(30.0), 1.0)},
                    {}, kBeam, o);
  ASSERT_EQ(s.size(), 2u);
  EXPECT_EQ(s[1].components.size(), 2u);
  EXPECT_EQ(s[1].info_bits & kInfoMultiIsland, 0u);
}

// Flux-weighted mean on the sphere; totals: sum and errors in quadrature.
TEST(Grouping, WeightedPositionAndTotals) {
  GroupingOptions o;
  auto a = point(1, 10.0, 0.0, 1.0), b = point(1, 10.002, 0.0, 3.0);
  const auto s = group_sources({a, b}, {}, kBeam, o);
  ASSERT_EQ(s.size(), 1u);
  // Small-angle: the weighted mean of unit vectors lies at 10 + 0.002 * 3/4 to ~1e-10 deg.
  EXPECT_NEAR(s[0].ra_deg, 10.0015, 1e-9);
  EXPECT_NEAR(s[0].dec_deg, 0.0, 1e-12);
  EXPECT_NEAR(s[0].s_int_jy, 4.0, 1e-15);
  EXPECT_NEAR(s[0].s_int_err_jy, std::sqrt(0.01 + 0.09), 1e-15);
  EXPECT_NEAR(s[0].ra_err_arcsec, std::sqrt(1 * 0.01 + 9 * 0.01) / 4.0, 1e-15);
  EXPECT_EQ(s[0].structure, SourceStructure::Composite);
  EXPECT_EQ(s[0].info_bits & kInfoMultiIsland, 0u);
  EXPECT_NEAR(s[0].las_arcsec, 0.002 * 3600.0, 1e-6);
}

TEST(Grouping, DiffuseIslandMakesADiffuseSource) {
  GroupingOptions o;
  CatalogueIsland isl;
  isl.id = 1;
  isl.n_pixels = 500;
  isl.n_beams = 10.0;
  isl.mean_rms_jy_per_beam = 1e-4;
  isl.residual_rms_jy_per_beam = 2e-4;  // 2 x rms > 1.5
  auto s = group_sources({point(1, 201.25, -38.6, 1.0)}, {isl}, kBeam, o);
  ASSERT_EQ(s.size(), 1u);
  EXPECT_EQ(s[0].structure, SourceStructure::Diffuse);
  EXPECT_NE(s[0].flags & kFlagDiffuse, 0u);
  isl.residual_rms_jy_per_beam = 1.2e-4;
  s = group_sources({point(1, 201.25, -38.6, 1.0)}, {isl}, kBeam, o);
  EXPECT_EQ(s[0].structure, SourceStructure::Compact);
  isl.residual_rms_jy_per_beam = 2e-4;
  isl.n_beams = 1.0;  // too small to judge
  s = group_sources({point(1, 201.25, -38.6, 1.0)}, {isl}, kBeam, o);
  EXPECT_EQ(s[0].structure, SourceStructure::Compact);
}

// Reference: a direct O(n^2) friends-of-friends (every pair tested with the
// same rule, union-find), on random components with random sizes: the grid
// search must give the same partition.
TEST(Grouping, SameAsBruteForce) {
  std::mt19937_64 rng(3);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  std::vector<CatalogueComponent> c;
  for (int i = 0; i < 1500; ++i) {
    auto p = point(i / 2 + 1, 201.2 + 0.1 * u(rng), -38.65 + 0.1 * u(rng), std::exp(3.0 * u(rng)));
    p.fitted_arcsec = {6.0 + 40.0 * u(rng) * u(rng) * u(rng), 6.0, 180.0 * u(rng)};
    c.push_back(p);
  }
  GroupingOptions o;
  const auto s = group_sources(c, {}, kBeam, o);
  std::vector<std::size_t> parent(c.size());
  std::iota(parent.begin(), parent.end(), 0);
  auto find = [&](std::size_t i) { while (parent[i] != i) i = parent[i] = parent[parent[i]]; return i; };
  auto hw = [](const Ellipse& e, double dir) {
    const double d = (dir - e.pa_deg) * kDegToRad;
    return 0.5 * std::sqrt(e.maj * e.maj * std::cos(d) * std::cos(d) + e.min * e.min * std::sin(d) * std::sin(d));
  };
  for (std::size_t i = 0; i < c.size(); ++i)
    for (std::size_t j = i + 1; j < c.size(); ++j) {
      bool link = c[i].island_id == c[j].island_id;
      if (!link) {
        const double lo = std::min(c[i].s_int_jy, c[j].s_int_jy), hi = std::max(c[i].s_int_jy, c[j].s_int_jy);
        const double sep = separation_deg(c[i].ra_deg, c[i].dec_deg, c[j].ra_deg, c[j].dec_deg) * 3600.0;
        const double gap = sep - hw(c[i].fitted_arcsec, position_angle_deg(c[i].ra_deg, c[i].dec_deg, c[j].ra_deg, c[j].dec_deg)) -
                           hw(c[j].fitted_arcsec, position_angle_deg(c[j].ra_deg, c[j].dec_deg, c[i].ra_deg, c[i].dec_deg));
        link = hi <= 10.0 * lo && gap <= 6.0;
      }
      if (link) parent[find(i)] = find(j);
    }
  std::map<std::size_t, std::set<std::size_t>> ref;
  for (std::size_t i = 0; i < c.size(); ++i) ref[find(i)].insert(i);
  std::set<std::set<std::size_t>> want, got;
  for (auto& [k, v] : ref) want.insert(v);
  for (const auto& src : s) got.insert(std::set<std::size_t>(src.components.begin(), src.components.end()));
  EXPECT_EQ(got.size(), want.size());
  EXPECT_TRUE(got == want);
  EXPECT_LT(s.size(), c.size() / 2) << "the test field should have groups";
}

TEST(PositionFlags, EdgeBlankAndBrighterNeighbour) {
  ImageF img = ImageF::Zero(200, 200);
  img(100, 150) = std::numeric_limits<float>::quiet_NaN();
  const Eigen::Matrix2d J = (Eigen::Matrix2d() << -1.0, 0.0, 0.0, 1.0).finished();  // 1"/pix, east left
  auto at = [](double x, double y, double peak) {
    CatalogueComponent c;
    c.x_pix = x;
    c.y_pix = y;
    c.s_peak_jy_per_beam = peak;
    return c;
  };
  std::vector<CatalogueComponent> c = {
      at(3.0, 100.0, 1.0),     // 3.5" from the left edge < 6": near_edge
      at(20.0, 100.0, 1.0),    // 20.5": not
      at(150.0, 104.0, 1.0),   // NaN 4" away: near_blank
      at(150.0, 110.0, 1.0),   // 10": not
      at(60.0, 60.0, 100.0),   // bright
      at(60.0, 100.0, 1.0),    // 40" = 6.7 beams from a 100x brighter one: near_bright
      at(60.0, 130.0, 1.0),    // 70" = 11.7 beams: not
      at(110.0, 60.0, 10.0),   // 50" away, only 10x fainter: not
  };
  FlagOptions o;  // margins 1 beam, bright radius 10 beams, ratio 50
  flag_components(c, img, J, kBeam, o);
  EXPECT_NE(c[0].flags & kFlagNearEdge, 0u);
  EXPECT_EQ(c[1].flags & kFlagNearEdge, 0u);
  EXPECT_NE(c[2].flags & kFlagNearBlank, 0u);
  EXPECT_EQ(c[3].flags & kFlagNearBlank, 0u);
  EXPECT_EQ(c[4].flags & kFlagNearBright, 0u);
  EXPECT_NE(c[5].flags & kFlagNearBright, 0u);
  EXPECT_EQ(c[6].flags & kFlagNearBright, 0u);
  EXPECT_EQ(c[7].flags & kFlagNearBright, 0u);
}

// docs/CONVENTIONS.md "Noise": sigma_S = sqrt(sum_ij s_i s_j rho_ij) / Omega_beam_pix.
TEST(PixelSumError, ExactSmallCases) {
  const Eigen::Matrix2d C = (Eigen::Matrix2d() << 4.0, 1.0, 1.0, 3.0).finished();
  const double omega = 2.0 * kPi * std::sqrt(C.determinant());
  ImageF rms = ImageF::Constant(5, 5, 2.0f);
  rms(2, 3) = 3.0f;
  MaskU8 m = MaskU8::Zero(5, 5);
  m(2, 2) = 1;
  EXPECT_NEAR(pixel_sum_flux_error(rms, m, C, omega), 2.0 / omega, 1e-15);
  m(2, 3) = 1;  // neighbour at d = (1, 0): rho = exp(-1/2 d^T C^-1 d)
  const double rho = std::exp(-0.5 * C.inverse()(0, 0));
  EXPECT_NEAR(pixel_sum_flux_error(rms, m, C, omega), std::sqrt(4.0 + 9.0 + 2 * 2 * 3 * rho) / omega, 1e-14);
}

// Large island, constant rms: tends to s sqrt(N / Omega) (docs/CONVENTIONS.md "Noise"),
// short by the border pixels' missing partners: for a square of side L the
// deficit is about 2 (perimeter / L^2) x sigma/sqrt(2 pi) ~ 1 % here.
TEST(PixelSumError, LargeIslandApproachesConventionFormula) {
  const Eigen::Matrix2d C = Eigen::Matrix2d::Identity() * 6.25;  // sigma 2.5 pix
  const double omega = 2.0 * kPi * 2.5 * 2.5;
  const long L = 240;
  const ImageF rms = ImageF::Constant(L, L, 1.0f);
  const MaskU8 m = MaskU8::Ones(L, L);
  const double got = pixel_sum_flux_error(rms, m, C, omega);
  const double approx = std::sqrt(static_cast<double>(L * L) / omega);
  EXPECT_LT(got, approx);
  EXPECT_GT(got, approx * 0.98);
}

// Monte Carlo with the simulator's beam-correlated noise (modules/simulate,
// whose autocorrelation is tested against the beam): the scatter of an
// island's pixel sum / Omega over 300 realisations matches the formula. The
// standard deviation of 300 draws is good to 1/sqrt(2 x 300) = 4 %: allow 12 %.
TEST(PixelSumError, MatchesCorrelatedNoiseScatter) {
  const Beam beam{7.0, 5.0, 30.0};
  const Eigen::Matrix2d C = sim::beam_cov_pix_flat(beam, 1.0);
  const double omega = 2.0 * kPi * std::sqrt(C.determinant());
  const long n = 96;
  MaskU8 m = MaskU8::Zero(n, n);
  for (long y = 0; y < n; ++y)
    for (long x = 0; x < n; ++x)
      if (std::hypot(x - 47.5, (y - 47.5) * 1.3) < 14.0) m(y, x) = 1;
  const ImageF rms = ImageF::Constant(n, n, 1.0f);
  const double predicted = pixel_sum_flux_error(rms, m, C, omega);
  double s1 = 0, s2 = 0;
  const int reps = 300;
  for (int k = 0; k < reps; ++k) {
    const ImageF noise = sim::correlated_noise(n, n, C, 1.0, 1234, static_cast<std::uint64_t>(k));
    double sum = 0;
    for (long y = 0; y < n; ++y)
      for (long x = 0; x < n; ++x)
        if (m(y, x)) sum += noise(y, x);
    sum /= omega;
    s1 += sum;
    s2 += sum * sum;
  }
  const double sd = std::sqrt((s2 - s1 * s1 / reps) / (reps - 1));
  EXPECT_NEAR(sd / predicted, 1.0, 0.12);
}

}  // namespace
}  // namespace skerry
