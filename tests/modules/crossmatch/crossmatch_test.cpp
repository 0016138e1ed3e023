// Cross-matching: separations against ERFA (IAU SOFA eraSeps/eraPas, Debian's
// liberfa-dev) and REF-SEP-02 check values; every mode against a brute-force
// O(N M) reference, across the poles and RA = 0/360; chance matches against
// N_A N_B pi r^2 / area (common practice); thread-count independence.
#include <erfa.h>
#include <gtest/gtest.h>
#include <tbb/global_control.h>

#include <algorithm>
#include <cmath>
#include <map>
#include <numeric>
#include <random>

#include "skerry/crossmatch.h"
#include "skerry/sky.h"

using namespace skerry;

namespace {

constexpr double kPi = 3.14159265358979323846;
constexpr double kD2R = kPi / 180.0;
constexpr double kR2As = 180.0 / kPi * 3600.0;

/// Uniform on the sphere within dec in [d0, d1], ra in [r0, r1] (r1 may exceed 360).
SkyPositions random_patch(std::mt19937_64& g, std::size_t n, double r0, double r1, double d0, double d1) {
  std::uniform_real_distribution<double> u(0.0, 1.0);
  SkyPositions p;
  const double s0 = std::sin(d0 * kD2R), s1 = std::sin(d1 * kD2R);
  for (std::size_t i = 0; i < n; ++i) {
    double ra = r0 + (r1 - r0) * u(g);
    ra = std::fmod(ra, 360.0);
    p.ra_deg.push_back(ra);
    p.dec_deg.push_back(std::asin(s0 + (s1 - s0) * u(g)) / kD2R);
  }
  return p;
}

void add_errors(std::mt19937_64& g, SkyPositions& p) {
  std::uniform_real_distribution<double> u(0.0, 1.0);
  for (std::size_t i = 0; i < p.size(); ++i) {
    p.err_east_arcsec.push_back(5 + 20 * u(g));
    p.err_north_arcsec.push_back(5 + 20 * u(g));
    p.err_corr.push_back(-0.5 + u(g));
  }
}

struct Ref {
  std::int64_t a, b;
  double sep, key;
};

/// All pairs within radius by brute force, per A sorted by (key, sep, b).
/// Every pair within the radius, by brute force over all N M pairs.
std::vector<Ref> within_radius(const SkyPositions& a, const SkyPositions& b, double radius) {
  std::vector<Ref> out;
  for (std::size_t i = 0; i < a.size(); ++i)
    for (std::size_t j = 0; j < b.size(); ++j) {
      const double s = separation_deg(a.ra_deg[i], a.dec_deg[i], b.ra_deg[j], b.dec_deg[j]) * 3600.0;
      if (s <= radius) out.push_back({static_cast<std::int64_t>(i), static_cast<std::int64_t>(j), s, s});
    }
  return out;
}

std::vector<std::vector<Ref>> brute(const SkyPositions& a, const SkyPositions& b, const MatchOptions& o,
                                    const std::vector<Ref>& within) {
  std::vector<std::vector<Ref>> out(a.size());
  const double k = o.mode == MatchMode::ErrorAware ? rayleigh_threshold(o.completeness) : 0;
  for (const Ref& w : within) {
      const std::size_t i = static_cast<std::size_t>(w.a), j = static_cast<std::size_t>(w.b);
      const double s = w.sep;
      double key = s;
      if (o.mode == MatchMode::ErrorAware) {
        double xi, eta;
        gnomonic_offset(a.ra_deg[i], a.dec_deg[i], b.ra_deg[j], b.dec_deg[j], xi, eta);
        const double dx = xi * kR2As, dy = eta * kR2As;
        auto cov = [](const SkyPositions& c, std::size_t r, double m[3]) {
          m[0] = c.err_east_arcsec[r] * c.err_east_arcsec[r];
          m[1] = c.err_corr[r] * c.err_east_arcsec[r] * c.err_north_arcsec[r];
          m[2] = c.err_north_arcsec[r] * c.err_north_arcsec[r];
        };
        double ma[3], mb[3];
        cov(a, i, ma);
        cov(b, j, mb);
        const double sys2 = o.systematic_arcsec * o.systematic_arcsec;
        const double sxx = ma[0] + mb[0] + sys2, sxy = ma[1] + mb[1], syy = ma[2] + mb[2] + sys2;
        const double det = sxx * syy - sxy * sxy;
        const double d2 = (syy * dx * dx - 2 * sxy * dx * dy + sxx * dy * dy) / det;
        key = std::sqrt(d2);
        if (!(key < k)) continue;
      }
      out[i].push_back({static_cast<std::int64_t>(i), static_cast<std::int64_t>(j), s, key});
    }
  for (auto& v : out)
    std::sort(v.begin(), v.end(), [](const Ref& x, const Ref& y) {
      if (x.key != y.key) return x.key < y.key;
      if (x.sep != y.sep) return x.sep < y.sep;
      return x.b < y.b;
    });
  return out;
}

std::vector<MatchPair> reference(const SkyPositions& a, const SkyPositions& b, const MatchOptions& o,
                                 const std::vector<Ref>& within) {
  auto per = brute(a, b, o, within);
  std::vector<MatchPair> res;
  std::vector<MatchPair> all;
  for (auto& v : per)
    for (std::size_t r = 0; r < v.size(); ++r) {
      MatchPair p;
      p.a = v[r].a;
      p.b = v[r].b;
      p.sep_arcsec = v[r].sep;
      p.n_candidates = static_cast<std::int32_t>(v.size());
      p.rank = static_cast<std::int32_t>(r + 1);
      p.norm_sep = o.mode == MatchMode::ErrorAware ? v[r].key : std::nan("");
      all.push_back(p);
    }
  if (o.mode == MatchMode::All) return all;
  if (o.mode == MatchMode::Nearest || o.mode == MatchMode::ErrorAware) {
    for (const auto& p : all)
      if (p.rank == 1) res.push_back(p);
    return res;
  }
  // One-to-one: greedy in the order (separation, A, B).
  std::vector<MatchPair> sorted = all;
  std::sort(sorted.begin(), sorted.end(), [](const MatchPair& x, const MatchPair& y) {
    return std::tie(x.sep_arcsec, x.a, x.b) < std::tie(y.sep_arcsec, y.a, y.b);
  });
  std::vector<char> ua(a.size()), ub(b.size());
  for (const auto& p : sorted)
    if (!ua[p.a] && !ub[p.b]) {
      ua[p.a] = ub[p.b] = 1;
      res.push_back(p);
    }
  std::sort(res.begin(), res.end(), [](const MatchPair& x, const MatchPair& y) { return x.a < y.a; });
  return res;
}

void expect_same(const std::vector<MatchPair>& got, const std::vector<MatchPair>& want, const std::string& what) {
  ASSERT_EQ(got.size(), want.size()) << what;
  for (std::size_t i = 0; i < got.size(); ++i) {
    ASSERT_EQ(got[i].a, want[i].a) << what << " pair " << i;
    ASSERT_EQ(got[i].b, want[i].b) << what << " pair " << i;
    EXPECT_EQ(got[i].sep_arcsec, want[i].sep_arcsec) << what;
    EXPECT_EQ(got[i].n_candidates, want[i].n_candidates) << what << " a=" << got[i].a;
    EXPECT_EQ(got[i].rank, want[i].rank) << what;
    if (!std::isnan(want[i].norm_sep)) {
      EXPECT_NEAR(got[i].norm_sep, want[i].norm_sep, 1e-12) << what;
    }
  }
}

SkyPositions one(double ra, double dec) {
  SkyPositions p;
  p.ra_deg = {ra};
  p.dec_deg = {dec};
  return p;
}

}  // namespace

TEST(Separation, MatchesErfaThroughTheMatchPath) {
  // REF-SEP-02 rows (expected from 50-digit arithmetic) plus pole, wrap, tiny
  // and near-antipodal pairs; separation and PA compared with eraSeps/eraPas.
  struct Case {
    double ra1, dec1, ra2, dec2, expected_rad;
  };
  const double nan = std::nan("");
  const std::vector<Case> cases = {
      {10, 20, 10.001, 20.001, 2.3949940747106935e-05},
      {359.9999, 0, 0.0001, 0, 3.4906585035505458e-06},
      {0, 89.9999, 180, 89.9999, 3.4906585041045370e-06},
      {0, 89.99, 90, 89.99, 2.4682682927124868e-04},
      {0, 0, 90, 0, 1.5707963267948966},
      {83.63308333, 22.0145, 187.70593075, 12.39112331, 1.7109957032912533},
      {0, 0, 179.9999, 0.0001, 3.1415901853214942},
      {45, -89.999, 225, 89.999, 3.1415926535897932},
      {150, 2, 150, 2 + 1 / 3.6e6, 4.8481368091894163e-09},
      {359.99999999, -89.9999999, 0.00000001, -89.9999999, nan},  // south pole, across RA 0
      {123.4, -45.6, 123.4 + 1e-6 / 3600 / std::cos(45.6 * kD2R), -45.6, nan},  // 1e-6 arcsec
      {0.0, 10.0, 180.0, -9.9999999, nan},                                        // near-antipodal
      {270.0, 90.0, 12.0, 89.99999, nan},                                         // at the pole
  };
  for (const auto& c : cases) {
    const double erfa = eraSeps(c.ra1 * kD2R, c.dec1 * kD2R, c.ra2 * kD2R, c.dec2 * kD2R);
    MatchOptions o;
    o.mode = MatchMode::All;
    o.radius_arcsec = 648000.0;  // the whole sky
    MatchResult r = match_catalogues(one(c.ra1, c.dec1), one(c.ra2, c.dec2), o);
    ASSERT_EQ(r.pairs.size(), 1u) << c.ra1 << " " << c.dec1;
    const double got = r.pairs[0].sep_arcsec / kR2As;
    // ERFA's atan2 form is accurate to ~1e-16 rad at any angle (REF-SEP-01); the
    // tolerance 1e-12 rad of REF-SEP-02, and 2e-15 rad below 1 arcsec (a few
    // ulps of the degree inputs, e.g. of 359.9999 deg: 1e-15 rad).
    const double tol = erfa < 5e-6 ? 2e-15 : 1e-12;
    EXPECT_NEAR(got, erfa, tol) << c.ra1 << "," << c.dec1 << " -> " << c.ra2 << "," << c.dec2;
    if (!std::isnan(c.expected_rad)) {
      EXPECT_NEAR(got, c.expected_rad, tol);
    }
    if (erfa > 1e-9 && erfa < kPi - 1e-6 && std::fabs(c.dec1) < 89.9999999) {
      double pa = eraPas(c.ra1 * kD2R, c.dec1 * kD2R, c.ra2 * kD2R, c.dec2 * kD2R) / kD2R;
      if (pa < 0) pa += 360.0;
      EXPECT_NEAR(std::remainder(r.pairs[0].pa_deg - pa, 360.0), 0.0, 1e-7) << c.ra1 << "," << c.dec1;
    }
    // A radius just below the separation must exclude the pair, just above include it.
    if (erfa * kR2As < 648000.0 * 0.999) {
      o.radius_arcsec = got * kR2As * (1 - 1e-9);
      EXPECT_EQ(match_catalogues(one(c.ra1, c.dec1), one(c.ra2, c.dec2), o).pairs.size(), 0u);
      o.radius_arcsec = got * kR2As * (1 + 1e-9);
      EXPECT_EQ(match_catalogues(one(c.ra1, c.dec1), one(c.ra2, c.dec2), o).pairs.size(), 1u);
    }
  }
}

TEST(Modes, IdenticalToBruteForceAcrossPolesAndWrap) {
  std::mt19937_64 g(7);
  struct Region {
    const char* name;
    double r0, r1, d0, d1, radius;
  };
  const std::vector<Region> regions = {
      {"north cap", 0, 360, 88.0, 90.0, 120.0},
      {"south cap", 0, 360, -90.0, -88.5, 100.0},
      {"RA wrap", 358.5, 361.5, -1.0, 1.0, 150.0},
  };
  for (const auto& rg : regions) {
    SkyPositions a = random_patch(g, 2500, rg.r0, rg.r1, rg.d0, rg.d1);
    SkyPositions b = random_patch(g, 2500, rg.r0, rg.r1, rg.d0, rg.d1);
    // Exact duplicates and points on the pole: ties broken by index.
    for (int k = 0; k < 50; ++k) {
      b.ra_deg[k] = b.ra_deg[2000 + k];
      b.dec_deg[k] = b.dec_deg[2000 + k];
    }
    a.ra_deg[0] = 17.0;
    a.dec_deg[0] = rg.d1 >= 90 ? 90.0 : rg.d0 <= -90 ? -90.0 : 0.0;
    // Invalid rows never match.
    a.dec_deg[1] = 91.0;
    b.ra_deg[2] = std::nan("");
    add_errors(g, a);
    add_errors(g, b);
    const std::vector<Ref> within = within_radius(a, b, rg.radius);
    for (MatchMode m : {MatchMode::Nearest, MatchMode::All, MatchMode::OneToOne, MatchMode::ErrorAware}) {
      MatchOptions o;
      o.mode = m;
      o.radius_arcsec = rg.radius;
      o.systematic_arcsec = 2.0;
      o.completeness = 0.99;
      MatchResult r = match_catalogues(a, b, o);
      EXPECT_EQ(r.a_invalid, 1u);
      EXPECT_EQ(r.b_invalid, 1u);
      std::vector<MatchPair> want = reference(a, b, o, within);
      ASSERT_GT(want.size(), 100u) << rg.name;
      expect_same(r.pairs, want, std::string(rg.name) + " mode " + std::to_string(static_cast<int>(m)));
      // PA of every pair equals the direct formula.
      for (const auto& p : r.pairs)
        EXPECT_EQ(p.pa_deg, position_angle_deg(a.ra_deg[p.a], a.dec_deg[p.a], b.ra_deg[p.b], b.dec_deg[p.b]));
    }
    // Self-match against brute force with friends-of-friends groups.
    SelfMatchResult s = self_match(b, rg.radius);
    const std::size_t n = b.size();
    std::vector<std::vector<std::size_t>> adj(n);
    std::size_t npairs = 0;
    for (std::size_t i = 0; i < n; ++i)
      for (std::size_t j = i + 1; j < n; ++j) {
        const double sep = separation_deg(b.ra_deg[i], b.dec_deg[i], b.ra_deg[j], b.dec_deg[j]) * 3600.0;
        if (sep <= rg.radius) {
          adj[i].push_back(j);
          adj[j].push_back(i);
          ++npairs;
        }
      }
    EXPECT_EQ(s.pairs.size(), npairs) << rg.name;
    for (const auto& p : s.pairs) {
      EXPECT_LT(p.a, p.b);
      EXPECT_EQ(static_cast<std::size_t>(p.n_candidates), adj[p.a].size());
    }
    std::vector<std::int64_t> comp(n, -1);
    for (std::size_t i = 0; i < n; ++i) {
      if (comp[i] >= 0) continue;
      std::vector<std::size_t> stack{i}, members;
      comp[i] = 0;
      while (!stack.empty()) {
        std::size_t x = stack.back();
        stack.pop_back();
        members.push_back(x);
        for (std::size_t y : adj[x])
          if (comp[y] < 0) {
            comp[y] = 0;
            stack.push_back(y);
          }
      }
      const auto gid = static_cast<std::int64_t>(*std::min_element(members.begin(), members.end()));
      for (std::size_t x : members) {
        EXPECT_EQ(s.group[x], gid) << rg.name << " row " << x;
        EXPECT_EQ(static_cast<std::size_t>(s.group_size[x]), members.size());
      }
    }
  }
}

TEST(Modes, IdenticalForOneAndTwoThreads) {
  std::mt19937_64 g(11);
  SkyPositions a = random_patch(g, 20000, 200, 202, -40, -38);
  SkyPositions b = random_patch(g, 20000, 200, 202, -40, -38);
  for (MatchMode m : {MatchMode::Nearest, MatchMode::All, MatchMode::OneToOne}) {
    MatchOptions o;
    o.mode = m;
    o.radius_arcsec = 60;
    std::vector<MatchPair> r1, r2;
    {
      tbb::global_control gc(tbb::global_control::max_allowed_parallelism, 1);
      r1 = match_catalogues(a, b, o).pairs;
    }
    {
      tbb::global_control gc(tbb::global_control::max_allowed_parallelism, 2);
      r2 = match_catalogues(a, b, o).pairs;
    }
    ASSERT_EQ(r1.size(), r2.size());
    for (std::size_t i = 0; i < r1.size(); ++i) {
      EXPECT_EQ(r1[i].a, r2[i].a);
      EXPECT_EQ(r1[i].b, r2[i].b);
      EXPECT_EQ(r1[i].sep_arcsec, r2[i].sep_arcsec);
      EXPECT_EQ(r1[i].rank, r2[i].rank);
    }
  }
}

TEST(Modes, TinyRadiusAndEmptyCatalogues) {
  SkyPositions a = one(201.25, -38.6);
  SkyPositions b;
  b.ra_deg = {201.25, 201.25};
  b.dec_deg = {-38.6 + 0.5e-6 / 3600, -38.6 + 2e-6 / 3600};
  MatchOptions o;
  o.radius_arcsec = 1e-6;
  MatchResult r = match_catalogues(a, b, o);
  ASSERT_EQ(r.pairs.size(), 1u);
  EXPECT_EQ(r.pairs[0].b, 0);
  // One ulp of Dec = 38.6 deg is 7e-15 deg = 2.6e-11 arcsec: the input's own resolution.
  EXPECT_NEAR(r.pairs[0].sep_arcsec, 0.5e-6, 3e-11);
  SkyPositions empty;
  EXPECT_TRUE(match_catalogues(empty, b, o).pairs.empty());
  EXPECT_TRUE(match_catalogues(a, empty, o).pairs.empty());
  EXPECT_TRUE(self_match(empty, 5).pairs.empty());
  o.radius_arcsec = 0;
  EXPECT_THROW(match_catalogues(a, b, o), std::invalid_argument);
  o.radius_arcsec = 1;
  o.mode = MatchMode::ErrorAware;
  EXPECT_THROW(match_catalogues(a, b, o), std::invalid_argument);  // no errors given
}

TEST(ErrorAware, RayleighThreshold) {
  // REF-SEP-03: R_p / sigma = sqrt(-2 ln(1 - p)).
  EXPECT_NEAR(rayleigh_threshold(0.5), 1.1774100225154747, 1e-12);
  EXPECT_NEAR(rayleigh_threshold(0.99), 3.0348542587702925, 1e-12);
  EXPECT_NEAR(rayleigh_threshold(0.997), 3.4085606904715737, 1e-12);
  EXPECT_THROW(rayleigh_threshold(1.0), std::invalid_argument);
}

TEST(ErrorAware, CompletenessOfTrueMatches) {
  // True counterparts displaced by Gaussian errors (sigma_A = 0.5", sigma_B =
  // 1.2" per coordinate, REF-SEP-03 example: combined 1.3"): the fraction kept
  // at p = 0.9 is binomial around 0.9 (N = 4000: sigma = 0.0047; 4 sigma).
  std::mt19937_64 g(3);
  std::normal_distribution<double> z(0.0, 1.0);
  SkyPositions a = random_patch(g, 4000, 10, 30, -60, -40), b;
  for (std::size_t i = 0; i < a.size(); ++i) {
    a.err_east_arcsec.push_back(0.5);
    a.err_north_arcsec.push_back(0.5);
    double ra, dec;
    const double dx = 1.3 * z(g), dy = 1.3 * z(g);
    gnomonic_inverse(a.ra_deg[i], a.dec_deg[i], dx / kR2As, dy / kR2As, ra, dec);
    b.ra_deg.push_back(ra);
    b.dec_deg.push_back(dec);
    b.err_east_arcsec.push_back(1.2);
    b.err_north_arcsec.push_back(1.2);
  }
  MatchOptions o;
  o.mode = MatchMode::ErrorAware;
  o.radius_arcsec = 30;
  o.completeness = 0.9;
  MatchResult r = match_catalogues(a, b, o);
  std::size_t true_kept = 0;
  for (const auto& p : r.pairs) true_kept += p.a == p.b;
  EXPECT_NEAR(static_cast<double>(true_kept) / 4000.0, 0.9, 4 * std::sqrt(0.9 * 0.1 / 4000));
}

TEST(Summary, ChanceMatchesAgreeWithAnalyticExpectation) {
  // Unrelated uniform catalogues: expected matched A rows N_A N_B pi r^2 / area
  // (common practice; exact form N_A (1 - exp(-n_B pi r^2)), 0.3% lower here).
  std::mt19937_64 g(5);
  const double r0 = 195, r1 = 205, d0 = -45, d1 = -35;
  SkyPositions a = random_patch(g, 20000, r0, r1, d0, d1);
  SkyPositions b = random_patch(g, 20000, r0, r1, d0, d1);
  const double area_sr = (r1 - r0) * kD2R * (std::sin(d1 * kD2R) - std::sin(d0 * kD2R));
  const double radius = 10.0;
  const double r_rad = radius / kR2As;
  const double expected = 20000.0 * 20000.0 * kPi * r_rad * r_rad / area_sr;
  ChanceEstimate ce = chance_matches(a, b, radius);
  ASSERT_EQ(ce.per_shift.size(), 8u);
  // Mean of 8 Poisson counts: sigma = sqrt(expected / 8); 4 sigma, plus 1% for
  // the saturation and the footprint shrinking by the shift (<= 130" of 10 deg).
  const double tol = 4 * std::sqrt(expected / 8) + 0.01 * expected;
  EXPECT_NEAR(ce.expected_chance, expected, tol) << "expected " << expected;
  // The unshifted match of unrelated catalogues is itself a chance count.
  MatchOptions o;
  o.radius_arcsec = radius;
  const double direct = static_cast<double>(match_catalogues(a, b, o).pairs.size());
  EXPECT_NEAR(direct, expected, 4 * std::sqrt(expected) + 0.01 * expected);
}

TEST(Summary, OffsetsAndFluxRatio) {
  // B = A moved by (+1.0", -0.5") plus Gaussian scatter 0.2" per coordinate:
  // the medians recover the offset within 4 of their errors, and the errors
  // equal 1.2533 sigma / sqrt(N) within 10% (N = 5000).
  std::mt19937_64 g(9);
  std::normal_distribution<double> z(0.0, 1.0);
  SkyPositions a = random_patch(g, 5000, 100, 110, 20, 30), b;
  std::vector<MatchPair> pairs;
  for (std::size_t i = 0; i < a.size(); ++i) {
    double ra, dec;
    gnomonic_inverse(a.ra_deg[i], a.dec_deg[i], (1.0 + 0.2 * z(g)) / kR2As, (-0.5 + 0.2 * z(g)) / kR2As, ra, dec);
    b.ra_deg.push_back(ra);
    b.dec_deg.push_back(dec);
  }
  MatchOptions o;
  o.radius_arcsec = 3;
  MatchResult r = match_catalogues(a, b, o);
  OffsetSummary s = offset_summary(a, b, r.pairs);
  EXPECT_EQ(s.n, 5000u);
  EXPECT_NEAR(s.median_east_arcsec, 1.0, 4 * s.median_east_err_arcsec);
  EXPECT_NEAR(s.median_north_arcsec, -0.5, 4 * s.median_north_err_arcsec);
  const double want_err = 1.2533 * 0.2 / std::sqrt(5000.0);
  EXPECT_NEAR(s.median_east_err_arcsec, want_err, 0.1 * want_err);
  // Flux ratio with a spectral correction: S_B = 1.1^-1 S_A (nu_B/nu_A)^alpha
  // gives S_A / (S_B (nu_A/nu_B)^alpha) = 1.1 exactly (S ~ nu^alpha).
  std::vector<double> fa(a.size()), fb(a.size());
  const double alpha = -0.7, na = 1.4e9, nb = 0.888e9;
  for (std::size_t i = 0; i < a.size(); ++i) {
    fa[i] = 0.001 * (1 + static_cast<double>(i % 97));
    fb[i] = fa[i] / 1.1 * std::pow(nb / na, alpha);
  }
  FluxRatioSummary fr = flux_ratio_summary(fa, fb, r.pairs, na, nb, alpha);
  EXPECT_NEAR(fr.median_ratio, 1.1, 1e-12);
  EXPECT_NEAR(fr.robust_scatter, 0.0, 1e-12);
}

TEST(Summary, OffsetPositionIsExact) {
  // Direct problem on the sphere: the moved point lies at the distance and PA asked.
  for (double dec : {-89.0, -38.6, 0.0, 45.0, 89.5})
    for (double pa : {0.0, 45.0, 135.0, 270.0}) {
      double ra2, dec2;
      offset_position(201.25, dec, pa, 0.01, ra2, dec2);
      // The asin/atan2 forms lose a few digits to cancellation: 1e-11 deg (4e-8 arcsec).
      EXPECT_NEAR(separation_deg(201.25, dec, ra2, dec2), 0.01, 1e-11);
      EXPECT_NEAR(std::remainder(position_angle_deg(201.25, dec, ra2, dec2) - pa, 360.0), 0.0, 1e-8);
    }
}

TEST(Multi, CountsAndVariability) {
  // Master of 3 objects, three epochs. Object 0 in all epochs with S = 1, 2, 3
  // and errors 1: mean 2, sample sigma 1, m = 0.5; weighted mean 2, chi2 = 2
  // with 2 dof (Bevington & Robinson 2003, ch. 4, fit of a constant).
  SkyPositions m;
  m.ra_deg = {10, 20, 30};
  m.dec_deg = {0, 0, 0};
  std::vector<SkyPositions> cats(3);
  std::vector<FluxColumn> fl(3);
  for (int e = 0; e < 3; ++e) {
    cats[e].ra_deg = {10 + 1e-4, 50.0};
    cats[e].dec_deg = {0, 0};
    fl[e].flux = {1.0 + e, 9.0};
    fl[e].flux_err = {1.0, 1.0};
  }
  cats[1].ra_deg.push_back(20.0);
  cats[1].dec_deg.push_back(0.0);
  fl[1].flux.push_back(5.0);
  fl[1].flux_err.push_back(0.5);
  MultiMatchOptions o;
  o.radius_arcsec = 5;
  MultiMatchResult r = match_to_master(m, cats, fl, o);
  EXPECT_EQ(r.n_catalogues[0], 3);
  EXPECT_EQ(r.n_catalogues[1], 1);
  EXPECT_EQ(r.n_catalogues[2], 0);
  EXPECT_EQ(r.match_index[1][1], 2);
  EXPECT_DOUBLE_EQ(r.mean_flux[0], 2.0);
  EXPECT_DOUBLE_EQ(r.modulation_index[0], 0.5);
  EXPECT_DOUBLE_EQ(r.weighted_mean_flux[0], 2.0);
  EXPECT_DOUBLE_EQ(r.chi2_const[0], 2.0);
  EXPECT_EQ(r.chi2_dof[0], 2);
  EXPECT_TRUE(std::isnan(r.modulation_index[1]));
  EXPECT_EQ(r.n_flux[2], 0);
}
