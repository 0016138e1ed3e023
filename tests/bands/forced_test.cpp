// Forced amplitude fits and stacking.
#include "skerry/forced.h"

#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <string>

#include "tan_sky.h"

namespace skerry {
namespace {

using namespace skerry::testing;
const double kRa = 201.25, kDec = -38.6;

// Source: definition of integrated flux density (CONVENTIONS.md "Fitting":
// S = peak (M m)/(b_M b_m)); a noiseless image of the exact model gives the
// flux density back. Grid with east to the right, rotated 20 deg, non-square
// pixels (CONVENTIONS.md "Angles on the sky").
TEST(Forced, NoiselessPointAndExtendedOnOddGrid) {
  const TanSky g = TanSky::simple(kRa, kDec, 100, 100, 1.2, 20.0, false, 1.5);
  const Beam beam{8, 5, 30};
  ImageF im = ImageF::Zero(200, 200);
  std::vector<ForcedSource> src{{kRa, kDec, {}}, {kRa + 0.01, kDec + 0.005, {12, 4, 100}}};
  const std::vector<double> s{0.01, 0.02};
  for (int i = 0; i < 2; ++i) {
    const Ellipse conv = convolve(src[i].intrinsic, to_ellipse(beam));
    add_gaussian(im, g, src[i].ra_deg, src[i].dec_deg, conv, s[i] * 8 * 5 / (conv.maj * conv.min));
  }
  auto r = forced_measure(im, ImageF(), 1e-4, g, beam, src);
  for (int i = 0; i < 2; ++i) {
    EXPECT_NEAR(r[i].flux_jy, s[i], 1e-5 * s[i]);
    EXPECT_TRUE(r[i].detected);
    EXPECT_EQ(r[i].group_size, 1);
  }
  EXPECT_NEAR(r[1].conv_maj_arcsec, convolve({12, 4, 100}, {8, 5, 30}).maj, 1e-9);
}

// Source: linear least squares of a sum of known templates is exact on
// noiseless data (common practice); two sources 0.8 beam apart are blended.
TEST(Forced, BlendedPairFittedTogether) {
  const TanSky g = TanSky::simple(kRa, kDec, 60, 60, 1.0);
  const Beam beam{6, 6, 0};
  ImageF im = ImageF::Zero(120, 120);
  std::vector<ForcedSource> src{{kRa, kDec, {}}, {kRa + 4.8 / 3600.0 / std::cos(kDec * kDegToRad), kDec, {}}};
  add_gaussian(im, g, src[0].ra_deg, src[0].dec_deg, {6, 6, 0}, 0.005);
  add_gaussian(im, g, src[1].ra_deg, src[1].dec_deg, {6, 6, 0}, 0.002);
  auto r = forced_measure(im, ImageF(), 1e-4, g, beam, src);
  EXPECT_EQ(r[0].group, r[1].group);
  EXPECT_EQ(r[0].group_size, 2);
  EXPECT_TRUE(r[0].flags & kForcedBlended);
  EXPECT_NEAR(r[0].flux_jy, 0.005, 1e-8);
  EXPECT_NEAR(r[1].flux_jy, 0.002, 1e-8);
  // Blending raises the errors above the isolated-source value.
  auto alone = forced_measure(im, ImageF(), 1e-4, g, beam, {src[0]});
  EXPECT_GT(r[0].flux_err_jy, alone[0].flux_err_jy);
}

// Source: Gaussian integrals (forced.h): for an isolated point source in
// uniform beam-correlated noise of rms s, the weighted least-squares amplitude
// has variance s^2 * (2 pi)^2 det C / 3 / (pi sqrt(det C))^2 = (4/3) s^2.
TEST(Forced, IsolatedPointSourceErrorIdentity) {
  const TanSky g = TanSky::simple(kRa, kDec, 100, 100, 1.0);
  const Beam beam{7, 5, 40};
  ImageF im = ImageF::Zero(200, 200);
  auto r = forced_measure(im, ImageF(), 2e-4, g, beam, {{kRa, kDec, {}}});
  EXPECT_NEAR(r[0].peak_err_jy_per_beam, std::sqrt(4.0 / 3.0) * 2e-4, 2e-3 * 2e-4);
  // Not detected: upper limit = limit_snr x rms on the flux scale of the shape.
  EXPECT_FALSE(r[0].detected);
  EXPECT_TRUE(r[0].flags & kForcedNotDetected);
  EXPECT_NEAR(r[0].upper_limit_jy, 3.0 * 2e-4, 1e-12);
  EXPECT_NEAR(r[0].flux_jy, 0.0, 1e-12);
  // Flux-scale term in quadrature.
  ForcedOptions o;
  o.flux_scale_frac = 0.05;
  ImageF im2 = ImageF::Zero(200, 200);
  add_gaussian(im2, g, kRa, kDec, {7, 5, 40}, 0.01);
  auto r2 = forced_measure(im2, ImageF(), 2e-4, g, beam, {{kRa, kDec, {}}}, o);
  EXPECT_NEAR(r2[0].flux_err_total_jy, std::hypot(r2[0].flux_err_jy, 0.05 * r2[0].flux_jy), 1e-12);
}

// Source: CONVENTIONS.md "Fitting and errors": reported errors must describe
// the actual scatter in correlated noise; 900 isolated sources (point and
// resolved) in one noise realisation: the normalised residuals have a robust
// standard deviation within 0.88..1.12 (the standard error of 1.4826 MAD is
// about 1.166/sqrt(N) = 3.9 % for N = 900 (asymptotic variance of the MAD, from
// memory), so this is 3 sigma) and a median within 3 x 1.2533/sqrt(900) = 0.125
// of zero.
TEST(Forced, ErrorsDescribeScatterInCorrelatedNoise) {
  const long n = 960;
  const TanSky g = TanSky::simple(kRa, kDec, n / 2, n / 2, 1.0);
  const Beam beam{6, 4.5, 35};
  ImageF im = correlated_noise(n, n, g, beam, 1e-4, 99);
  std::vector<ForcedSource> src;
  std::vector<double> truth;
  for (int j = 0; j < 30; ++j)
    for (int i = 0; i < 30; ++i) {
      double ra, dec;
      g.pix_to_sky(20.3 + 31.0 * i, 19.6 + 31.0 * j, ra, dec);
      const Ellipse intr = ((i + j) % 3 == 0) ? Ellipse{6, 3, 15.0 * i} : Ellipse{};
      const Ellipse conv = convolve(intr, to_ellipse(beam));
      const double s = 1e-3;  // 10 sigma-ish
      add_gaussian(im, g, ra, dec, conv, s * 6 * 4.5 / (conv.maj * conv.min));
      src.push_back({ra, dec, intr});
      truth.push_back(s);
    }
  auto r = forced_measure(im, ImageF(), 1e-4, g, beam, src);
  std::vector<double> z;
  for (std::size_t i = 0; i < r.size(); ++i) z.push_back((r[i].flux_jy - truth[i]) / r[i].flux_err_jy);
  const double rs = robust_std(z);
  RecordProperty("robust_std", std::to_string(rs));
  std::printf("normalised residuals: robust std %.3f median %.3f\n", rs, median(z));
  EXPECT_GT(rs, 0.88);
  EXPECT_LT(rs, 1.12);
  EXPECT_LT(std::abs(median(z)), 0.125);
}

TEST(Forced, OutsideAndBlankPositionsAreFlagged) {
  const TanSky g = TanSky::simple(kRa, kDec, 20, 20, 1.0);
  ImageF im = ImageF::Zero(40, 40);
  im(20, 20) = NAN;
  auto r = forced_measure(im, ImageF(), 1e-4, g, {5, 5, 0}, {{kRa, kDec, {}}, {kRa + 1.0, kDec, {}}});
  EXPECT_TRUE(r[0].flags & kForcedOutside);
  EXPECT_TRUE(r[1].flags & kForcedOutside);
  EXPECT_TRUE(std::isnan(r[0].flux_jy));
  EXPECT_THROW(forced_measure(im, ImageF::Zero(3, 3), 0.0, g, {5, 5, 0}, {}), std::invalid_argument);
}

// Source: median stacking (common practice for sources below the detection
// threshold): 900 sources of 0.3 rms each are recovered by the stack within 3
// of its own errors; the stack's rms is close to rms / sqrt(N) times the
// efficiency of the median, sqrt(pi/2) (from memory); masked positions and
// positions inside exclusion circles are left out.
TEST(Stack, FaintPopulationRecovered) {
  const long n = 900;
  const TanSky g = TanSky::simple(kRa, kDec, n / 2, n / 2, 1.0);
  const Beam beam{5, 5, 0};
  ImageF im = correlated_noise(n, n, g, beam, 1e-4, 5);
  std::vector<ForcedSource> pos;
  for (int j = 0; j < 30; ++j)
    for (int i = 0; i < 30; ++i) {
      double ra, dec;
      g.pix_to_sky(15.4 + 29.0 * i, 15.7 + 29.0 * j, ra, dec);
      add_gaussian(im, g, ra, dec, {5, 5, 0}, 3e-5);
      pos.push_back({ra, dec, {}});
    }
  MaskU8 mask = MaskU8::Zero(n, n);
  mask.block(0, 0, 40, 40) = 1;  // covers the first position (15.4, 15.7)
  std::vector<ExclusionCircle> excl{{pos[31].ra_deg, pos[31].dec_deg, 3.0}};
  const StackResult s = forced_at_positions(im, ImageF(), 1e-4, g, beam, pos, mask, excl);
  EXPECT_TRUE(s.at_positions[0].flags & kForcedMasked);
  EXPECT_TRUE(s.at_positions[31].flags & kForcedMasked);
  EXPECT_EQ(s.n_stacked, 898);
  ASSERT_TRUE(std::isfinite(s.stacked_flux_jy));
  EXPECT_NEAR(s.stacked_flux_jy, 3e-5, 3.0 * s.stacked_flux_err_jy);
  const double expect_rms = 1e-4 * std::sqrt(kPi / 2.0) / std::sqrt(898.0);
  EXPECT_NEAR(s.stack_rms_jy_per_beam, expect_rms, 0.3 * expect_rms);
  EXPECT_LT(s.stacked_flux_err_jy, 1e-5);
}

}  // namespace
}  // namespace skerry
