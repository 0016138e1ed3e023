// Rendering of beam-convolved Gaussians: flux, peak, position, shape, parity.
#include <erfa.h>
#include <gtest/gtest.h>

#include <Eigen/LU>
#include <cmath>

#include "skerry/constants.h"
#include "skerry/gaussian.h"
#include "skerry/simulate.h"
#include "erfa_geometry.h"

using namespace skerry;
using namespace skerry::sim;

namespace {

constexpr double kRa0 = 201.25, kDec0 = -38.6;  // Lanternfish Field centre

double pixel_sum(const ImageD& img) {
  double s = 0.0;
  for (long i = 0; i < img.size(); ++i) s += img.data()[i];
  return s;
}

/// Beam area in pixels: (pi / (4 ln 2)) BMAJ BMIN / |CDELT1 CDELT2| (REF-GAUSS-04).
double beam_area_pix(const Beam& b, double pixel_arcsec) {
  return kGaussAreaFactor * b.maj_arcsec * b.min_arcsec / (pixel_arcsec * pixel_arcsec);
}

// REF-GAUSS-04 worked table: a sampled Gaussian equal to the beam (6" x 4", PA 30),
// peak 1 Jy/beam, on a 201 x 201 grid centred on it; pixel sum / N_beam.
TEST(AddSources, PixelSumOverBeamAreaMatchesWorkedTable) {
  struct Row {
    double pixel_arcsec, n_beam, sum_over_n, rel_tol;
  };
  // The table's 1e-12 is met by a sum in exact pixel geometry; here the pixel-frame
  // shape goes through local_geometry(), whose Jacobian is a finite difference of
  // double-precision degrees (ulp(201 deg) = 2.8e-14 deg = 1e-10 arcsec over a
  // half-pixel step): that limits the relative accuracy to a few 1e-10.
  const Row rows[] = {{1.0, 27.194160850963165, 1.0000000000000002, 5e-10},
                      {0.5, 108.77664340385266, 1.0000000000000002, 5e-10},
                      {2.0, 6.798540212740791, 1.0000000153036472, 1e-7}};
  const Beam beam{6.0, 4.0, 30.0};
  for (const Row& r : rows) {
    EXPECT_NEAR(beam_area_pix(beam, r.pixel_arcsec), r.n_beam, 1e-14 * r.n_beam);
    const TanGrid grid = TanGrid::square(kRa0, kDec0, 100.0, 100.0, r.pixel_arcsec);
    ImageD img = ImageD::Zero(201, 201);
    RenderOptions ro;
    ro.beam = beam;
    const auto truth = add_sources(img, grid, {make_source(kRa0, kDec0, 1.0)}, ro);
    ASSERT_EQ(truth.size(), 1u);
    EXPECT_NEAR(truth[0].peak_jy_per_beam, 1.0, 1e-14);  // unresolved: S_int = S_peak
    EXPECT_NEAR(img(100, 100), 1.0, 1e-12);               // sampled at its centre
    EXPECT_NEAR(pixel_sum(img) / r.n_beam, r.sum_over_n, r.rel_tol) << r.pixel_arcsec;
  }
}

// REF-SINT-01 worked example: S_peak 2.5 mJy/beam, fitted (convolved) 8" x 5",
// beam 6" x 4" -> S_int = 4.166666666666667 mJy; its pixel sum (PA 45, 1" pixels,
// 201 x 201) gives 4.166666666666665 mJy (rel 1e-12). The intrinsic shape that
// convolves to 8 x 5 with a 6 x 4 beam of the same PA is sqrt(64-36) x sqrt(25-16).
TEST(AddSources, ResolvedSourceMatchesWorkedIntegratedFlux) {
  const Beam beam{6.0, 4.0, 45.0};
  const Ellipse intrinsic{std::sqrt(28.0), 3.0, 45.0};
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 100.0, 100.0, 1.0);
  ImageD img = ImageD::Zero(201, 201);
  RenderOptions ro;
  ro.beam = beam;
  const auto t = add_sources(img, grid, {make_source(kRa0, kDec0, 4.166666666666667e-3, intrinsic)}, ro);
  EXPECT_NEAR(t[0].convolved.maj, 8.0, 1e-12);
  EXPECT_NEAR(t[0].convolved.min, 5.0, 1e-12);
  EXPECT_NEAR(t[0].convolved.pa_deg, 45.0, 1e-9);
  EXPECT_NEAR(t[0].peak_jy_per_beam, 2.5e-3, 2.5e-3 * 1e-12);
  // 5e-10 rather than the table's 1e-12: see PixelSumOverBeamAreaMatchesWorkedTable.
  EXPECT_NEAR(pixel_sum(img) / beam_area_pix(beam, 1.0), 4.166666666666665e-3, 4.17e-3 * 5e-10);
}

/// Pixel of (ra, dec) on a TAN grid through ERFA's gnomonic projection
/// (eraTpxes; IAU SOFA), independent of the project's own projection code.
Eigen::Vector2d erfa_pixel(double ra, double dec, const Eigen::Matrix2d& cd_deg, double x0,
                           double y0) {
  double xi, eta;
  const int j = eraTpxes(ra * kDegToRad, dec * kDegToRad, kRa0 * kDegToRad, kDec0 * kDegToRad, &xi, &eta);
  EXPECT_EQ(j, 0);
  const Eigen::Vector2d p = cd_deg.inverse() * Eigen::Vector2d(xi, eta) * kRadToDeg;
  return {p(0) + x0, p(1) + y0};
}

struct GridCase {
  const char* name;
  double rotation_deg;
  bool east_right;
};

// Each source in its own image: flux, centroid, second moments. The centroid and
// covariance of a Gaussian sampled at >= 1.5 pixels sigma equal the continuous
// ones to far below 1e-6 (Poisson summation: the error falls as exp(-2 pi^2 sigma^2)).
// Positions come from ERFA, the sky shape from the grid's CD matrix (the Jacobian
// J = d(east, north)/d(x, y)): C_sky = J C_pix J^T; so parity and rotation are
// checked against outside arithmetic.
class RenderOnGrids : public ::testing::TestWithParam<GridCase> {};

TEST_P(RenderOnGrids, FluxPositionShapeAndPaOnTheSky) {
  const GridCase gc = GetParam();
  const double pix = 1.25;
  const double x0 = 120.0, y0 = 100.0;
  const TanGrid grid = TanGrid::square(kRa0, kDec0, x0, y0, pix, gc.rotation_deg, gc.east_right);
  // The same CD matrix, rebuilt here from the definition (+y towards PA rot).
  const double s = pix / 3600.0, r = gc.rotation_deg * kDegToRad, px = gc.east_right ? 1.0 : -1.0;
  Eigen::Matrix2d cd;
  cd << px * s * std::cos(r), s * std::sin(r), -px * s * std::sin(r), s * std::cos(r);
  const Beam beam{6.0, 4.5, 110.0};
  RenderOptions ro;
  ro.beam = beam;
  const double omega_pix = beam_area_pix(beam, pix);

  const double offsets[][2] = {{0.0, 0.0}, {31.37, -12.81}, {-22.6, 40.05}, {5.5, 5.5}};
  const Ellipse shapes[] = {{0, 0, 0}, {5.0, 2.0, 100.0}, {9.0, 4.0, 170.0}, {3.0, 1.0, 95.0}};
  for (int k = 0; k < 4; ++k) {
    double ra, dec;
    ASSERT_TRUE(grid.pix_to_sky(x0 + offsets[k][0], y0 + offsets[k][1], ra, dec));
    ImageD img = ImageD::Zero(220, 250);
    const SkySource src = make_source(ra, dec, 0.0123, shapes[k]);
    const auto t = add_sources(img, grid, {src}, ro)[0];
    const Eigen::Vector2d want = erfa_pixel(ra, dec, cd, x0, y0);
    EXPECT_NEAR(t.x, want(0), 1e-7) << gc.name << " source " << k;
    EXPECT_NEAR(t.y, want(1), 1e-7) << gc.name << " source " << k;

    double sum = 0, mx = 0, my = 0;
    long best_x = -1, best_y = -1;
    double best = -1;
    for (long y = 0; y < img.rows(); ++y)
      for (long x = 0; x < img.cols(); ++x) {
        const double v = img(y, x);
        sum += v;
        mx += v * x;
        my += v * y;
        if (v > best) {
          best = v;
          best_x = x;
          best_y = y;
        }
      }
    mx /= sum;
    my /= sum;
    Eigen::Matrix2d c = Eigen::Matrix2d::Zero();
    for (long y = 0; y < img.rows(); ++y)
      for (long x = 0; x < img.cols(); ++x) {
        const Eigen::Vector2d d(x - mx, y - my);
        c += img(y, x) * d * d.transpose();
      }
    c /= sum;
    // Flux: pixel sum / beam area in pixels = S_int (REF-GAUSS-04); the pixel area
    // off the tangent point differs from |CDELT|^2 by < 1e-7 here.
    EXPECT_NEAR(sum / omega_pix, 0.0123, 0.0123 * 2e-7) << gc.name << " source " << k;
    EXPECT_NEAR(mx, want(0), 1e-5) << gc.name << " source " << k;
    EXPECT_NEAR(my, want(1), 1e-5) << gc.name << " source " << k;
    // The brightest pixel lies next to the true position.
    EXPECT_LE(std::abs(best_x - want(0)), 1.0);
    EXPECT_LE(std::abs(best_y - want(1)), 1.0);
    // Shape on the sky from the measured pixel moments and the local Jacobian at the
    // source from ERFA (erfa_geometry.h).
    const Eigen::Matrix2d j = skerry::testing::erfa_jacobian(cd, x0, y0, kRa0, kDec0, t.x, t.y);
    const Eigen::Matrix2d c_sky = j * c * j.transpose();
    const Ellipse measured = cov_to_ellipse(c_sky);
    const Ellipse want_shape = shapes[k].maj > 0 ? convolve(shapes[k], to_ellipse(beam)) : to_ellipse(beam);
    // Rounding in the moments and the finite-difference Jacobian: 1e-6 of the trace.
    const Eigen::Matrix2d want_c = ellipse_to_cov(want_shape);
    EXPECT_LT((c_sky - want_c).cwiseAbs().maxCoeff(), 1e-6 * want_c.trace()) << gc.name << " " << k;
    EXPECT_NEAR(measured.maj, want_shape.maj, 1e-5) << gc.name << " source " << k;
    EXPECT_NEAR(measured.min, want_shape.min, 1e-5) << gc.name << " source " << k;
    EXPECT_NEAR(measured.pa_deg, want_shape.pa_deg, 1e-3) << gc.name << " source " << k;
    EXPECT_NEAR(t.convolved.pa_deg, want_shape.pa_deg, 1e-6);
    EXPECT_NEAR(t.s_int_jy, 0.0123, 1e-15);
  }
}

INSTANTIATE_TEST_SUITE_P(Grids, RenderOnGrids,
                         ::testing::Values(GridCase{"north_up_east_left", 0.0, false},
                                           GridCase{"rotated_37", 37.0, false},
                                           GridCase{"east_right", 0.0, true},
                                           GridCase{"east_right_rotated_minus115", -115.0, true}),
                         [](const auto& p) { return std::string(p.param.name); });

// The brightest pixel of a noiseless point source is the pixel nearest its true
// position when the beam is round (pixel and beam metric then agree).
TEST(AddSources, TruthPositionLandsOnThePixelMaximum) {
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 63.0, 40.0, 1.0, 23.0, true);
  RenderOptions ro;
  ro.beam = Beam{5.0, 5.0, 0.0};
  const double subpix[][2] = {{0.2, -0.3}, {-0.41, 0.12}, {0.0, 0.45}, {-0.33, -0.44}};
  for (auto& d : subpix) {
    double ra, dec;
    grid.pix_to_sky(50.0 + d[0], 30.0 + d[1], ra, dec);
    ImageF img = ImageF::Zero(64, 96);
    const auto t = add_sources(img, grid, {make_source(ra, dec, 1e-3)}, ro)[0];
    Eigen::Index by, bx;
    img.maxCoeff(&by, &bx);
    EXPECT_EQ(bx, std::lround(t.x));
    EXPECT_EQ(by, std::lround(t.y));
    EXPECT_EQ(bx, 50);
    EXPECT_EQ(by, 30);
  }
}

TEST(AddSources, FloatImagesKeepFluxToFloatPrecisionAndNaNsStayNaN) {
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 50.0, 50.0, 1.5);
  ImageF img = ImageF::Zero(101, 101);
  img(55, 52) = std::numeric_limits<float>::quiet_NaN();
  RenderOptions ro;
  ro.beam = Beam{6.0, 5.0, 0.0};
  double ra, dec;
  grid.pix_to_sky(20.3, 70.6, ra, dec);
  std::vector<SkySource> src{make_source(kRa0, kDec0, 2e-3), make_source(ra, dec, 1e-3)};
  const auto t = add_sources(img, grid, src, ro);
  EXPECT_TRUE(std::isnan(img(55, 52)));
  EXPECT_TRUE(t[0].flags & kSimNearEdge);  // its cutoff ellipse covers the NaN
  EXPECT_FALSE(t[1].flags & kSimNearEdge);
  double sum = 0;
  for (long y = 0; y < 101; ++y)
    for (long x = 0; x < 101; ++x)
      if (x < 40 && std::isfinite(img(y, x))) sum += img(y, x);
  EXPECT_NEAR(sum / beam_area_pix(ro.beam, 1.5), 1e-3, 1e-3 * 1e-6);
}

TEST(AddSources, SourcesOffTheGridAreFlaggedAndTheirWingsKept) {
  // Tangent point at the source (2 pixels left of the grid), so that pixel
  // distances are exact arcsec there.
  const TanGrid grid = TanGrid::square(kRa0, kDec0, -2.0, 30.0, 1.0);
  ImageD img = ImageD::Zero(61, 61);
  RenderOptions ro;
  ro.beam = Beam{6.0, 6.0, 0.0};
  double ra, dec;
  grid.pix_to_sky(-2.0, 30.0, ra, dec);
  const auto t = add_sources(img, grid, {make_source(ra, dec, 1.0)}, ro)[0];
  EXPECT_TRUE(t.flags & kSimOutsideImage);
  EXPECT_TRUE(t.flags & kSimNearEdge);
  EXPECT_GT(img(30, 0), 0.5);  // exp(-4 ln2 4/36) = 0.735 of the peak
  EXPECT_NEAR(img(30, 0), std::exp(-4.0 * kLn2 * 4.0 / 36.0), 1e-9);
}

TEST(AddSources, AttenuationScalesTheApparentFlux) {
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 30.0, 30.0, 1.0);
  ImageD img = ImageD::Zero(61, 61);
  ImageF pb = ImageF::Constant(61, 61, 0.25f);
  RenderOptions ro;
  ro.beam = Beam{6.0, 5.0, 10.0};
  ro.attenuation = &pb;
  const auto t = add_sources(img, grid, {make_source(kRa0, kDec0, 0.01)}, ro)[0];
  EXPECT_NEAR(t.pb, 0.25, 1e-7);
  EXPECT_NEAR(t.s_int_jy, 0.0025, 1e-9);
  EXPECT_NEAR(t.s_true_jy, 0.01, 1e-15);
  EXPECT_NEAR(pixel_sum(img) / beam_area_pix(ro.beam, 1.0), 0.0025, 1e-12);
}

// Beams scale as 1/frequency (diffraction, common practice).
TEST(Beams, ScaleInverselyWithFrequency) {
  const Beam b = beam_at_frequency(Beam{6.0, 5.0, 33.0}, 1.4e9, 2.8e9);
  EXPECT_DOUBLE_EQ(b.maj_arcsec, 3.0);
  EXPECT_DOUBLE_EQ(b.min_arcsec, 2.5);
  EXPECT_DOUBLE_EQ(b.pa_deg, 33.0);
  const Beam c = beam_at_frequency(Beam{6.0, 5.0, 33.0}, 1.4e9, 0.9e9);
  EXPECT_NEAR(c.maj_arcsec * 0.9e9, 6.0 * 1.4e9, 1e-3);
}

}  // namespace
