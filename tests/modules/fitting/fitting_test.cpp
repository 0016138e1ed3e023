// Unit and reference tests of the island fitter and the sky measurements.
#include <gtest/gtest.h>
#include <tbb/global_control.h>

#include <cmath>
#include <random>

#include "skerry/constants.h"
#include "skerry/fitting.h"
#include "skerry/gaussian.h"
#include "skerry/simulate.h"
#include "test_helpers.h"

namespace {

using skerry::Beam;
using skerry::Ellipse;
using skerry::FitOptions;
using skerry::IslandCutout;
using skerry::PixelComponent;
using skerry::SkyComponent;
using skerry::sim::TanGrid;

constexpr double kRa0 = 201.25, kDec0 = -38.6;  // Lanternfish Field centre

// Identity check (symmetric finite differences, as in derivative checkers of
// general least-squares libraries; common practice): the analytic Jacobian of the
// pixel model against central differences with step 1e-6, rel 1e-6.
TEST(GaussianModel, JacobianMatchesFiniteDifferences) {
  std::mt19937_64 rng(7);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  for (int trial = 0; trial < 50; ++trial) {
    const double p[6] = {0.5 + u(rng), 10 * u(rng), 10 * u(rng), 1.0 + 3 * u(rng),
                         0.8 + 2 * u(rng), 3.0 * u(rng)};
    const double x = p[1] + 4 * (u(rng) - 0.5), y = p[2] + 4 * (u(rng) - 0.5);
    const auto g = skerry::component_gradient(p, x, y);
    for (int j = 0; j < 6; ++j) {
      double pp[6], pm[6];
      std::copy(p, p + 6, pp);
      std::copy(p, p + 6, pm);
      const double h = 1e-6;
      pp[j] += h;
      pm[j] -= h;
      PixelComponent cp, cm;
      cp.amplitude = pp[0]; cp.x = pp[1]; cp.y = pp[2];
      cp.sigma_major_pix = pp[3]; cp.sigma_minor_pix = pp[4]; cp.theta_rad = pp[5];
      cm.amplitude = pm[0]; cm.x = pm[1]; cm.y = pm[2];
      cm.sigma_major_pix = pm[3]; cm.sigma_minor_pix = pm[4]; cm.theta_rad = pm[5];
      const double fd = (skerry::component_value(cp, x, y) - skerry::component_value(cm, x, y)) / (2 * h);
      EXPECT_NEAR(g(j), fd, 1e-6 * (std::abs(fd) + 1e-3)) << "parameter " << j << " trial " << trial;
    }
  }
}

// REF-CONDON-02 worked example (Condon 1997, PASP 109, 166, eqs. 41-42): A = 5 mJy/beam,
// sigma = 0.1 mJy/beam, 9" x 7" PA 30 deg, theta_N = 6" circular; rel 1e-12.
TEST(CondonErrors, CorrelatedWorkedExample) {
  const auto e = skerry::condon_errors_correlated(5.0, 0.1, 9.0, 7.0, 30.0, 36.0);
  EXPECT_NEAR(e.peak, 0.10735770099161309, 1e-12 * 0.107);
  EXPECT_NEAR(e.maj, 0.21177110818162015, 1e-12 * 0.21);
  EXPECT_NEAR(e.min, 0.13715139744108124, 1e-12 * 0.14);
  EXPECT_NEAR(e.x_major, 0.08993090942490123, 1e-12 * 0.09);
  EXPECT_NEAR(e.y_minor, 0.05824283589333836, 1e-12 * 0.058);
  EXPECT_NEAR(e.pa_rad, 0.054551634288637414, 1e-12 * 0.055);
  // S_int = 8.75 mJy for the 6" x 6" beam (REF-SINT-01); sigma_S = 0.27625241176147545.
  EXPECT_NEAR(e.s_int_rel * 8.75, 0.27625241176147545, 1e-12 * 0.28);
  // REF-CONDON-03 rotation into RA cos(Dec) and Dec.
  EXPECT_NEAR(e.ra, 0.06757265028967861, 1e-12 * 0.068);
  EXPECT_NEAR(e.dec, 0.08314886250404707, 1e-12 * 0.083);
}

// REF-CONDON-02 identity: a point source (theta_M = theta_m = theta_N) has
// sigma_A = sigma exactly and sigma_S = sqrt(3) sigma.
TEST(CondonErrors, PointSourceIdentity) {
  const auto e = skerry::condon_errors_correlated(2.0, 0.1, 6.0, 6.0, 0.0, 36.0);
  EXPECT_NEAR(e.peak, 0.1, 1e-15);
  EXPECT_NEAR(e.s_int_rel * 2.0, std::sqrt(3.0) * 0.1, 1e-15);
}

// REF-CONDON-01 (Condon 1997 eq. 21, white noise): A = 1, sigma = 0.05, h = 0.25",
// 9" x 7" PA 30: the table's expected variances (11 digits given, so rel 1e-9), and
// the REF-CONDON-03 white-noise RA/Dec variances (rel 1e-12).
TEST(CondonErrors, WhiteWorkedExample) {
  const auto e = skerry::condon_errors_white(1.0, 0.05, 9.0, 7.0, 30.0, 0.25);
  EXPECT_NEAR(e.peak * e.peak, 8.7553809584e-06, 1e-9 * 8.76e-6);
  EXPECT_NEAR(e.x_major * e.x_major, 1.2789236498e-04, 1e-9 * 1.28e-4);
  EXPECT_NEAR(e.y_minor * e.y_minor, 7.7366986225e-05, 1e-9 * 7.74e-5);
  EXPECT_NEAR(std::pow(e.maj / 9.0, 2), 8.7553809584e-06, 1e-9 * 8.76e-6);
  EXPECT_NEAR(std::pow(e.min / 7.0, 2), 8.7553809584e-06, 1e-9 * 8.76e-6);
  EXPECT_NEAR(e.pa_rad * e.pa_rad, 6.7871302781e-05, 1e-9 * 6.79e-5);
  EXPECT_NEAR(e.ra * e.ra, 8.999833091505985e-05, 1e-12 * 9e-5);
  EXPECT_NEAR(e.dec * e.dec, 1.1526102029472577e-04, 1e-12 * 1.15e-4);
}

// REF-RESOLVED-01 check values for the published member of the envelope family
// (a = 6, b = 1.44; Smolcic et al. 2017): rel 1e-12.
TEST(ResolvedEnvelope, PublishedCheckValues) {
  EXPECT_NEAR(skerry::resolved_envelope(5.0, 6.0, 1.44), 1.5910639123628827, 1e-12);
  EXPECT_NEAR(skerry::resolved_envelope(20.0, 6.0, 1.44), 1.080291219943224, 1e-12);
  EXPECT_NEAR(skerry::resolved_envelope(100.0, 6.0, 1.44), 1.0079095404313385, 1e-12);
}

// Whole island of one noiseless image as a cutout.
IslandCutout whole_image_cutout(const skerry::ImageD& img, double rms, const Eigen::Matrix2d& beam) {
  IslandCutout c;
  c.data = img.cast<float>();
  c.rms.setConstant(img.rows(), img.cols(), static_cast<float>(rms));
  c.mask.setConstant(img.rows(), img.cols(), skerry::kCutoutIsland);
  c.beam_cov_pix = beam;
  return c;
}

// REF-CONDON-01 Fisher-matrix check (Condon 1997 eq. 21; the table's "Fisher-matrix
// value" column): fit a noiseless 401 x 401 image of A = 1, 9" x 7" PA 30 on 0.25"
// pixels with white-noise weights sigma = 0.05; the covariance (J^T W J)^-1 at the
// solution reproduces the table to rel 1e-6, and measure_on_sky's propagated RA/Dec
// variances match REF-CONDON-03's white-noise example.
TEST(FitIsland, CondonFisherMatrixWhiteNoise) {
  const TanGrid sky = TanGrid::square(kRa0, kDec0, 200, 200, 0.25);
  skerry::ImageD img = skerry::ImageD::Zero(401, 401);
  double ra, dec;
  sky.pix_to_sky(200, 200, ra, dec);
  fittest::render_sky_gaussian(img, sky, ra, dec, 1.0, Ellipse{9.0, 7.0, 30.0});
  const Beam beam{6.0, 5.0, 0.0};
  FitOptions opt;
  opt.error_model = skerry::ErrorModel::kWhite;
  const auto fit = skerry::fit_island(whole_image_cutout(img, 0.05, fittest::beam_pix(sky, beam, 200, 200)), opt);
  ASSERT_EQ(fit.components.size(), 1u);
  const PixelComponent& c = fit.components[0];
  ASSERT_EQ(c.status, skerry::ComponentStatus::kFitted);
  const double h = 0.25;
  EXPECT_NEAR(c.x, 200.0, 1e-6);
  EXPECT_NEAR(c.y, 200.0, 1e-6);
  EXPECT_NEAR(c.sigma_major_pix * h * skerry::kSigmaToFwhm, 9.0, 1e-6);
  EXPECT_NEAR(c.sigma_minor_pix * h * skerry::kSigmaToFwhm, 7.0, 1e-6);
  const auto& V = c.cov;
  EXPECT_NEAR(V(0, 0), 8.7553809589e-06, 1e-6 * 8.76e-6);
  const Eigen::Vector2d emaj(std::cos(c.theta_rad), std::sin(c.theta_rad));
  const Eigen::Vector2d emin(-std::sin(c.theta_rad), std::cos(c.theta_rad));
  const Eigen::Matrix2d Vxy = V.block<2, 2>(1, 1) * h * h;
  EXPECT_NEAR(emaj.dot(Vxy * emaj), 1.2789236495e-04, 1e-6 * 1.28e-4);
  EXPECT_NEAR(emin.dot(Vxy * emin), 7.7366986209e-05, 1e-6 * 7.74e-5);
  EXPECT_NEAR(V(3, 3) / std::pow(c.sigma_major_pix, 2), 8.7553809588e-06, 1e-6 * 8.76e-6);
  EXPECT_NEAR(V(4, 4) / std::pow(c.sigma_minor_pix, 2), 8.7553809573e-06, 1e-6 * 8.76e-6);
  EXPECT_NEAR(V(5, 5), 6.7871302775e-05, 1e-6 * 6.79e-5);
  // Same through the sky measurement (S_int error propagated with full covariance).
  const SkyComponent s = skerry::measure_on_sky(c, sky, beam, {});
  ASSERT_TRUE(s.valid);
  EXPECT_NEAR(std::pow(s.s_int_err_jy / s.s_int_jy, 2), 8.7553809581e-06, 1e-6 * 8.76e-6);
  EXPECT_NEAR(s.ra_err_arcsec * s.ra_err_arcsec, 8.999833091505985e-05, 1e-6 * 9e-5);
  EXPECT_NEAR(s.dec_err_arcsec * s.dec_err_arcsec, 1.1526102029472577e-04, 1e-6 * 1.15e-4);
  EXPECT_NEAR(s.pa_deg, 30.0, 1e-6);
  // REF-SINT-01: S_int = A maj min / (bmaj bmin) = 63 / 30 Jy.
  EXPECT_NEAR(s.s_int_jy, 63.0 / 30.0, 1e-7);
}

// Sky measurements on grids of both parities, rotated CD matrices and non-square
// pixels: the same sky source (positions, FWHMs, PA east of north) must come back
// from every grid (docs/CONVENTIONS.md "Angles on the sky"; parity through the local
// Jacobian). Noiseless, rendered on the sky pixel by pixel: positions within 1e-4
// pixel, sizes rel 1e-5, PA within 1e-3 deg, S_int rel 1e-5 (the golden-image
// tolerances of the reference data).
TEST(MeasureOnSky, ParityRotationNonSquarePixels) {
  const Beam beam{12.0, 6.0, 30.0};
  const Ellipse shape = skerry::convolve(Ellipse{10.0, 5.0, 125.0}, skerry::to_ellipse(beam));
  const double s_int = 0.012;  // Jy
  const double peak = s_int * beam.maj_arcsec * beam.min_arcsec / (shape.maj * shape.min);
  struct Grid {
    const char* name;
    Eigen::Matrix2d cd_arcsec;
  };
  const double r20 = 20.0 * skerry::kDegToRad, r35 = -35.0 * skerry::kDegToRad;
  Eigen::Matrix2d east_right_rot, usual_rot, usual_plain;
  // Columns: (east, north) step of +x and +y [arcsec].
  east_right_rot << 1.5 * std::cos(r20), 2.0 * std::sin(r20), -1.5 * std::sin(r20), 2.0 * std::cos(r20);
  usual_rot << -1.5 * std::cos(r35), 2.0 * std::sin(r35), 1.5 * std::sin(r35), 2.0 * std::cos(r35);
  usual_plain << -1.5, 0.0, 0.0, 1.5;
  const Grid grids[] = {{"usual parity, square", usual_plain},
                        {"east right, rotated 20, 1.5 x 2.0", east_right_rot},
                        {"usual parity, rotated -35, 1.5 x 2.0", usual_rot}};
  const double ra_src = kRa0 + 0.001, dec_src = kDec0 - 0.0007;
  for (const Grid& g : grids) {
    SCOPED_TRACE(g.name);
    const TanGrid sky(kRa0, kDec0, 40.3, 38.7, g.cd_arcsec * skerry::kArcsecToDeg);
    skerry::ImageD img = skerry::ImageD::Zero(80, 80);
    double xs, ys;
    ASSERT_TRUE(sky.sky_to_pix(ra_src, dec_src, xs, ys));
    fittest::render_sky_gaussian(img, sky, ra_src, dec_src, peak, shape);
    const auto fit = skerry::fit_island(whole_image_cutout(img, 1e-5, fittest::beam_pix(sky, beam, xs, ys)), {});
    ASSERT_EQ(fit.components.size(), 1u);
    const PixelComponent& c = fit.components[0];
    EXPECT_EQ(c.status, skerry::ComponentStatus::kFitted);
    EXPECT_NEAR(c.x, xs, 1e-4);
    EXPECT_NEAR(c.y, ys, 1e-4);
    const SkyComponent s = skerry::measure_on_sky(c, sky, beam, {});
    ASSERT_TRUE(s.valid);
    const Eigen::Vector2d off = fittest::sky_offset_arcsec(ra_src, dec_src, s.ra_deg, s.dec_deg);
    EXPECT_LT(off.norm(), 1e-4 * 1.5);
    EXPECT_NEAR(s.maj_arcsec, shape.maj, 1e-5 * shape.maj);
    EXPECT_NEAR(s.min_arcsec, shape.min, 1e-5 * shape.min);
    EXPECT_NEAR(s.pa_deg, shape.pa_deg, 1e-3);
    EXPECT_NEAR(s.peak_jy_per_beam, peak, 1e-5 * peak);
    EXPECT_NEAR(s.s_int_jy, s_int, 1e-5 * s_int);
    EXPECT_NEAR(s.deconv_maj_arcsec, 10.0, 1e-4);
    EXPECT_NEAR(s.deconv_min_arcsec, 5.0, 1e-4);
    EXPECT_NEAR(s.deconv_pa_deg, 125.0, 1e-3);
    EXPECT_FALSE(s.deconv_maj_upper_limit);
    EXPECT_FALSE(s.deconv_min_upper_limit);
  }
}

// REF-DECONV-01 worked example (Wild 1970, Aust. J. Phys. 23, 113) through the whole
// measurement path: a 10 mJy source of 10" x 4" PA 30 seen with a 6" x 5" PA 60 beam
// appears 11.554340210156925" x 6.595242399483949" PA 33.03781162576456 with peak
// 3.936818036098981 mJy/beam; fitting and deconvolving gives 10" x 4" PA 30 back.
// Tolerances: the fit of a point-sampled noiseless image, rel 1e-6.
TEST(MeasureOnSky, DeconvolutionWorkedExample) {
  const Beam beam{6.0, 5.0, 60.0};
  const TanGrid sky = TanGrid::square(kRa0, kDec0, 32, 32, 1.0, 15.0);
  skerry::ImageD img = skerry::ImageD::Zero(64, 64);
  double ra, dec;
  sky.pix_to_sky(32.2, 31.6, ra, dec);
  fittest::render_sky_gaussian(img, sky, ra, dec, 3.936818036098981e-3,
                               Ellipse{11.554340210156925, 6.595242399483949, 33.03781162576456});
  const auto fit = skerry::fit_island(whole_image_cutout(img, 2e-5, fittest::beam_pix(sky, beam, 32, 32)), {});
  ASSERT_EQ(fit.components.size(), 1u);
  const SkyComponent s = skerry::measure_on_sky(fit.components[0], sky, beam, {});
  EXPECT_NEAR(s.maj_arcsec, 11.554340210156925, 1e-6 * 11.55);
  EXPECT_NEAR(s.min_arcsec, 6.595242399483949, 1e-6 * 6.6);
  EXPECT_NEAR(s.pa_deg, 33.03781162576456, 1e-5);
  EXPECT_NEAR(s.s_int_jy, 10e-3, 1e-6 * 10e-3);
  EXPECT_NEAR(s.deconv_maj_arcsec, 10.0, 1e-5);
  EXPECT_NEAR(s.deconv_min_arcsec, 4.0, 1e-5);
  EXPECT_NEAR(s.deconv_pa_deg, 30.0, 1e-4);
  EXPECT_TRUE(s.resolved);  // S_int / S_peak = 2.54, far above the envelope at SNR ~ 200
}

// An unresolved component gives upper limits (docs/CONVENTIONS.md "Fitting and errors");
// REF-DECONV-01: a fit identical to the beam deconvolves to a point.
TEST(MeasureOnSky, PointSourceGivesUpperLimits) {
  const Beam beam{6.0, 5.0, 60.0};
  const TanGrid sky = TanGrid::square(kRa0, kDec0, 32, 32, 1.0);
  skerry::ImageD img = skerry::ImageD::Zero(64, 64);
  double ra, dec;
  sky.pix_to_sky(32, 32, ra, dec);
  fittest::render_sky_gaussian(img, sky, ra, dec, 1e-3, skerry::to_ellipse(beam));
  const auto fit = skerry::fit_island(whole_image_cutout(img, 1e-4, fittest::beam_pix(sky, beam, 32, 32)), {});
  const SkyComponent s = skerry::measure_on_sky(fit.components[0], sky, beam, {});
  EXPECT_NEAR(s.s_int_jy, 1e-3, 1e-8);  // REF-SINT-01: unresolved => S_int = S_peak
  EXPECT_TRUE(s.deconv_maj_upper_limit);
  EXPECT_TRUE(s.deconv_min_upper_limit);
  EXPECT_GT(s.deconv_maj_arcsec, 0.0);  // the limit is a size, not zero
  EXPECT_FALSE(s.resolved);
  // Systematic terms add in quadrature; the primary beam divides.
  skerry::SkyOptions so;
  so.flux_scale_frac = 0.05;
  so.astrometric_floor_arcsec = 0.3;
  const SkyComponent t = skerry::measure_on_sky(fit.components[0], sky, beam, so, 0.5);
  EXPECT_NEAR(t.s_int_err_jy, std::hypot(s.s_int_err_jy, 0.05 * s.s_int_jy), 1e-15);
  EXPECT_NEAR(t.ra_err_arcsec, std::hypot(s.ra_err_arcsec, 0.3), 1e-12);
  EXPECT_NEAR(t.s_int_pbcor_jy, 2.0 * t.s_int_jy, 1e-15);
  EXPECT_NEAR(t.s_int_pbcor_err_jy, 2.0 * t.s_int_err_jy, 1e-15);
}

// Shape fixed to the beam: only amplitude and position are free.
TEST(FitIsland, FixedShapeMode) {
  const Beam beam{6.0, 5.0, 60.0};
  const TanGrid sky = TanGrid::square(kRa0, kDec0, 32, 32, 1.0);
  skerry::ImageD img = skerry::ImageD::Zero(64, 64);
  double ra, dec;
  sky.pix_to_sky(31.3, 32.4, ra, dec);
  fittest::render_sky_gaussian(img, sky, ra, dec, 2e-3, skerry::to_ellipse(beam));
  FitOptions opt;
  opt.fix_shape_to_beam = true;
  const auto fit = skerry::fit_island(whole_image_cutout(img, 1e-4, fittest::beam_pix(sky, beam, 31, 32)), opt);
  ASSERT_EQ(fit.components.size(), 1u);
  const auto& c = fit.components[0];
  EXPECT_TRUE(c.fit_flags & skerry::kFitShapeFixed);
  EXPECT_NEAR(c.amplitude, 2e-3, 1e-7);
  EXPECT_NEAR(c.x, 31.3, 1e-4);
  EXPECT_NEAR(c.y, 32.4, 1e-4);
  EXPECT_EQ(c.cov(3, 3), 0.0);
  EXPECT_GT(c.cov(0, 0), 0.0);
}

// Bad input gets a status and flags, never a crash (issue: "an island of NaNs, a
// zero-rms region, a degenerate beam").
TEST(FitIsland, BadInputIsFlagged) {
  IslandCutout c;
  c.data.setConstant(10, 10, NAN);
  c.rms.setConstant(10, 10, 1e-4f);
  c.mask.setConstant(10, 10, skerry::kCutoutIsland);
  c.beam_cov_pix << 4, 0, 0, 3;
  auto f = skerry::fit_island(c, {});
  ASSERT_EQ(f.components.size(), 1u);
  EXPECT_EQ(f.components[0].status, skerry::ComponentStatus::kBadInput);
  EXPECT_TRUE(f.components[0].fit_flags & skerry::kFitExcludedPixels);
  c.data.setConstant(1e-3f);
  c.rms.setZero();
  f = skerry::fit_island(c, {});
  EXPECT_EQ(f.components[0].status, skerry::ComponentStatus::kBadInput);
  c.rms.setConstant(1e-4f);
  c.beam_cov_pix.setZero();
  f = skerry::fit_island(c, {});
  EXPECT_EQ(f.components[0].status, skerry::ComponentStatus::kBadInput);
  EXPECT_EQ(skerry::to_string(f.components[0].status), "bad_input");
  // A one-pixel island cannot constrain 6 parameters: moments, flagged.
  c.beam_cov_pix << 4, 0, 0, 3;
  c.mask.setConstant(skerry::kCutoutExcluded);
  c.mask(5, 5) = skerry::kCutoutIsland;
  f = skerry::fit_island(c, {});
  EXPECT_EQ(f.components[0].status, skerry::ComponentStatus::kMoments);
  EXPECT_TRUE(f.components[0].fit_flags & skerry::kFitMomentsFallback);
  EXPECT_NEAR(f.components[0].amplitude, 1e-3, 1e-9);
  // An island of negative values: the only fit puts the amplitude on its bound 0,
  // which is rejected; the moment-based measurement is reported, flagged.
  c.mask.setConstant(skerry::kCutoutIsland);
  for (int y = 0; y < 10; ++y)
    for (int x = 0; x < 10; ++x) c.data(y, x) = -1e-3f * (1.0f + 0.1f * static_cast<float>((x * 7 + y * 3) % 5));
  f = skerry::fit_island(c, {});
  ASSERT_EQ(f.components.size(), 1u);
  EXPECT_EQ(f.components[0].status, skerry::ComponentStatus::kMoments);
}

// Derivation check behind the sandwich covariance (docs/CONVENTIONS.md "Noise"): white
// noise convolved with a Gaussian kernel of covariance C_beam / 2 has the
// autocorrelation rho(d) = exp(-d^T C_beam^-1 d / 2). Direct convolution here (not
// the simulator); sample autocorrelation of 256 x 256 pixels, whose standard error is
// about sqrt(Omega_beam / N) ~ 0.02, so tolerance 0.05 absolute.
TEST(NoiseCorrelation, BeamShapedAutocorrelation) {
  Eigen::Matrix2d C;
  C << 5.0, 1.5, 1.5, 3.0;  // beam covariance [pix^2]
  const Eigen::Matrix2d K = C / 2.0, Ki = K.inverse();
  const int R = 8, N = 256, M = N + 2 * R;
  std::mt19937_64 rng(11);
  std::normal_distribution<double> gauss;
  skerry::ImageD white(M, M);
  for (int i = 0; i < white.size(); ++i) white.data()[i] = gauss(rng);
  skerry::ImageD noise = skerry::ImageD::Zero(N, N);
  for (int y = 0; y < N; ++y)
    for (int x = 0; x < N; ++x) {
      double s = 0.0;
      for (int dy = -R; dy <= R; ++dy)
        for (int dx = -R; dx <= R; ++dx) {
          const Eigen::Vector2d d(dx, dy);
          s += std::exp(-0.5 * d.dot(Ki * d)) * white(y + R + dy, x + R + dx);
        }
      noise(y, x) = s;
    }
  noise -= noise.mean();
  const double var = noise.square().mean();
  const int lags[][2] = {{1, 0}, {0, 1}, {2, 0}, {0, 2}, {1, 1}, {2, -1}, {3, 2}, {-2, 2}};
  for (const auto& l : lags) {
    double s = 0.0;
    int n = 0;
    for (int y = 0; y < N; ++y)
      for (int x = 0; x < N; ++x) {
        const int x2 = x + l[0], y2 = y + l[1];
        if (x2 < 0 || y2 < 0 || x2 >= N || y2 >= N) continue;
        s += noise(y, x) * noise(y2, x2);
        ++n;
      }
    const Eigen::Vector2d d(l[0], l[1]);
    EXPECT_NEAR(s / n / var, std::exp(-0.5 * d.dot(C.inverse() * d)), 0.05)
        << "lag " << l[0] << "," << l[1];
  }
}

// Results do not depend on the thread count (each island independent; output
// sorted by island id).
TEST(FitIslands, IndependentOfThreadCount) {
  const Beam beam{6.0, 5.0, 60.0};
  const TanGrid sky = TanGrid::square(kRa0, kDec0, 100, 100, 1.5);
  const Eigen::Matrix2d bp = fittest::beam_pix(sky, beam, 100, 100);
  const skerry::ImageF noise = skerry::sim::correlated_noise(200, 200, bp, 1e-4, 5);
  std::vector<IslandCutout> islands;
  skerry::ImageD img = noise.cast<double>();
  for (int k = 0; k < 25; ++k) {
    const int cx = 20 + 40 * (k % 5), cy = 20 + 40 * (k / 5);
    double ra, dec;
    sky.pix_to_sky(cx + 0.3, cy - 0.2, ra, dec);
    fittest::render_sky_gaussian(img, sky, ra, dec, 1e-4 * (10 + 3 * k), skerry::to_ellipse(beam));
  }
  for (int k = 24; k >= 0; --k) {
    const int cx = 20 + 40 * (k % 5), cy = 20 + 40 * (k / 5);
    islands.push_back(fittest::make_cutout(img, 1e-4, cx - 16, cy - 16, 32, 32, 3.0, bp, k));
  }
  std::vector<skerry::IslandFit> a, b;
  {
    tbb::global_control gc(tbb::global_control::max_allowed_parallelism, 1);
    a = skerry::fit_islands(islands, {});
  }
  {
    tbb::global_control gc(tbb::global_control::max_allowed_parallelism, 2);
    b = skerry::fit_islands(islands, {});
  }
  ASSERT_EQ(a.size(), 25u);
  for (std::size_t i = 0; i < a.size(); ++i) {
    EXPECT_EQ(a[i].island_id, static_cast<std::int64_t>(i));
    ASSERT_EQ(a[i].components.size(), b[i].components.size());
    for (std::size_t j = 0; j < a[i].components.size(); ++j) {
      EXPECT_EQ(a[i].components[j].amplitude, b[i].components[j].amplitude);
      EXPECT_EQ(a[i].components[j].x, b[i].components[j].x);
      EXPECT_TRUE((a[i].components[j].cov.array() == b[i].components[j].cov.array()).all());
    }
  }
}

}  // namespace

namespace {

// Extended emission poorly described by Gaussians (a flat disc with noise and a
// few bumps, ~700 island pixels): the fitter must finish with finite parameters,
// at most max_components components and a sensible status (robustness; no
// reference value exists, so only invariants are checked).
TEST(FitIsland, ExtendedNonGaussianIsland) {
  const Beam beam{6.0, 5.0, 60.0};
  const TanGrid sky = TanGrid::square(kRa0, kDec0, 40, 40, 1.5);
  const Eigen::Matrix2d bp = fittest::beam_pix(sky, beam, 40, 40);
  skerry::ImageF img = skerry::sim::correlated_noise(80, 80, bp, 1e-4, 9);
  for (int y = 0; y < 80; ++y)
    for (int x = 0; x < 80; ++x)
      if (std::hypot(x - 40.0, y - 40.0) < 15.0) img(y, x) += 2e-3f;
  for (const auto& b : {std::pair{32.0, 35.0}, std::pair{47.0, 44.0}, std::pair{38.0, 50.0}}) {
    double ra, dec;
    sky.pix_to_sky(b.first, b.second, ra, dec);
    fittest::render_sky_gaussian(img, sky, ra, dec, 1.5e-3, skerry::to_ellipse(beam));
  }
  FitOptions opt;
  opt.max_components = 4;
  opt.residual_search = false;
  const IslandCutout cut = fittest::make_cutout(img, 1e-4, 0, 0, 80, 80, 3.0, bp);
  const auto fit = skerry::fit_island(cut, opt);
  ASSERT_GE(fit.components.size(), 1u);
  EXPECT_LE(fit.components.size(), 4u);
  EXPECT_GE(fit.n_fit_pixels, 600);
  for (const auto& c : fit.components) {
    EXPECT_TRUE(std::isfinite(c.amplitude) && std::isfinite(c.x) && std::isfinite(c.y));
    EXPECT_TRUE(c.status == skerry::ComponentStatus::kFitted ||
                c.status == skerry::ComponentStatus::kNotConverged ||
                c.status == skerry::ComponentStatus::kMoments);
    EXPECT_GT(c.sigma_minor_pix, 0.0);
  }
  // A flat disc is badly described by Gaussians: the residuals show it (the
  // island's residual rms exceeds the noise), which is what a structure class
  // "extended, poorly fitted" can be judged from.
  EXPECT_GT(fit.residual_rms, 1.5e-4);
  // The residual search adds components where that residual is significant,
  // up to the cap, and lowers it.
  opt.residual_search = true;
  const auto searched = skerry::fit_island(cut, opt);
  EXPECT_EQ(searched.components.size(), 4u);
  EXPECT_GT(searched.n_added, 0);
  EXPECT_LT(searched.residual_rms, fit.residual_rms);
}

}  // namespace

namespace {

// REF-SINT-01 worked example: S_peak = 2.5 mJy/beam, fitted 8" x 5" (PA 45), beam
// 6" x 4": S_int = 4.166666666666667 mJy (rel 1e-15 for the formula), and the pixel
// sum of the rendered component over the beam area in pixels (REF-GAUSS-04, 1"
// pixels, 201 x 201) gives 4.166666666666665 mJy (rel 1e-12). The shape here goes
// sky -> pixel -> sky through the WCS's local Jacobian, which is formed from
// differences of ICRS degrees (rounding ~1e-10 relative over half a pixel), so the
// tolerances are rel 1e-9.
TEST(RenderComponents, PixelSumMatchesIntegratedFlux) {
  const Beam beam{6.0, 4.0, 0.0};
  const TanGrid sky = TanGrid::square(kRa0, kDec0, 100, 100, 1.0);
  // Pixel-frame component of 8" x 5" at PA 45 on this grid (east = -x, north = +y).
  const auto geo = skerry::local_geometry(sky, 100, 100);
  const Eigen::Matrix2d Cpix = geo->sky_cov_to_pixel(skerry::ellipse_to_cov({8.0, 5.0, 45.0}));
  PixelComponent c;
  c.amplitude = 2.5e-3;
  c.x = 100.0;
  c.y = 100.0;
  const double a = Cpix(0, 0), d = Cpix(1, 1), b = Cpix(0, 1);
  const double mean = 0.5 * (a + d), half = std::hypot(0.5 * (a - d), b);
  c.sigma_major_pix = std::sqrt(mean + half);
  c.sigma_minor_pix = std::sqrt(mean - half);
  c.theta_rad = 0.5 * std::atan2(2 * b, a - d);
  c.local_rms = 1e-4;
  c.cov.setZero();
  const SkyComponent s = skerry::measure_on_sky(c, sky, beam, {});
  EXPECT_NEAR(s.s_int_jy, 4.166666666666667e-3, 1e-9 * 4.17e-3);
  EXPECT_NEAR(s.maj_arcsec, 8.0, 1e-9);
  EXPECT_NEAR(s.min_arcsec, 5.0, 1e-9);
  EXPECT_NEAR(s.pa_deg, 45.0, 1e-7);
  // Float pixels: each holds the component's value rounded to float (relative
  // error <= 6e-8), so the sum agrees to 1e-7.
  const skerry::ImageF model = skerry::render_components(201, 201, {c}, 40.0);
  const double n_beam = skerry::kGaussAreaFactor * 6.0 * 4.0;  // beam area in 1" pixels
  EXPECT_NEAR(model.cast<double>().sum() / n_beam, 4.166666666666665e-3, 1e-7 * 4.17e-3);
  EXPECT_EQ(model(100, 100), static_cast<float>(2.5e-3));
  EXPECT_EQ(model(97, 103), static_cast<float>(skerry::component_value(c, 103, 97)));
}

}  // namespace
