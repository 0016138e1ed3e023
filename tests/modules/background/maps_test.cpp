// Background and rms maps on simulated correlated noise of known level.
#include <gtest/gtest.h>
#include <tbb/global_control.h>

#include <cmath>
#include <limits>
#include <random>
#include <stdexcept>

#include "correlated_noise.h"
#include "skerry/background.h"
#include "skerry/constants.h"

using namespace skerry;
using skerry::testing::add_gaussian;
using skerry::testing::correlated_noise;

namespace {
constexpr double kBeamPix = 4.0;  // beam FWHM [pixels]
// Beam area in pixels, Omega = pi bmaj bmin / (4 ln 2) (REF-GAUSS-03).
const double kBeamAreaPix = kGaussAreaFactor * kBeamPix * kBeamPix;

BackgroundOptions default_options() {
  BackgroundOptions o;
  o.beam_fwhm_pix = kBeamPix;
  return o;
}

// Independent samples in a box of n pixels: n / Omega_beam_pix (docs/CONVENTIONS.md
// "Noise"). Sample standard deviation: relative scatter 1 / sqrt(2 N_ind);
// median: 1.2533 sigma / sqrt(N_ind) (asymptotic efficiency of the median,
// common practice). Iterated 3-sigma clipping loses a little efficiency: x1.25.
// N / Omega is the conservative count for the variance (for a Gaussian
// autocorrelation the exact effective number for a variance is 2 N / Omega).
double rms_rel_scatter(double npix) { return 1.25 / std::sqrt(2.0 * npix / kBeamAreaPix); }
double median_scatter(double npix, double sigma) { return 1.2533 * sigma / std::sqrt(npix / kBeamAreaPix); }
}  // namespace

// Pure correlated Gaussian noise of rms sigma on a constant background: every
// node recovers both within 4 of its own statistical scatter, and the mean over
// nodes within 4 of the scatter of the mean.
TEST(NoiseMaps, RecoverKnownRmsOfCorrelatedNoise) {
  const double sigma = 2.5e-5, bg = 1.0e-5;  // [Jy/beam]
  ImageF img = correlated_noise(600, 480, kBeamPix, sigma, 2024);
  img += static_cast<float>(bg);
  const BackgroundResult r = estimate_background(img, default_options());
  ASSERT_EQ(r.status, BackgroundStatus::ok);
  const BackgroundGrid* g = r.maps.grid();
  ASSERT_NE(g, nullptr);
  EXPECT_EQ(g->box_pixels, 120);  // 30 beams of 4 pixels
  EXPECT_EQ(g->nx(), 5);
  EXPECT_EQ(g->ny(), 4);
  double mean_rms = 0.0;
  for (int j = 0; j < g->ny(); ++j)
    for (int i = 0; i < g->nx(); ++i) {
      const double npix = g->valid_pixels(j, i);
      EXPECT_EQ(npix, 120.0 * 120.0);
      EXPECT_NEAR(g->rms(j, i) / sigma, 1.0, 4.0 * rms_rel_scatter(npix)) << i << "," << j;
      EXPECT_NEAR(g->background(j, i), bg, 4.0 * median_scatter(npix, sigma)) << i << "," << j;
      mean_rms += g->rms(j, i);
    }
  const int nodes = g->nx() * g->ny();
  mean_rms /= nodes;
  // Nodes of this grid tile the image (spacing 120, 120 / box): independent.
  EXPECT_NEAR(mean_rms / sigma, 1.0, 4.0 * rms_rel_scatter(120.0 * 120.0 * nodes));
  EXPECT_EQ(r.boxes_filled, 0);
}

// Sizes in beams from the beam area alone: FWHM = sqrt(Omega / 1.1331) (REF-GAUSS-03).
TEST(NoiseMaps, BoxSizeFromBeamArea) {
  BackgroundOptions o;
  o.beam_area_pix = kBeamAreaPix;
  o.box_beams = 20.0;
  o.step_beams = 10.0;
  ImageF img = correlated_noise(200, 160, kBeamPix, 1.0, 5);
  const BackgroundResult r = estimate_background(img, o);
  ASSERT_EQ(r.status, BackgroundStatus::ok);
  EXPECT_EQ(r.maps.grid()->box_pixels, 80);
  EXPECT_EQ(r.maps.grid()->step_pixels, 40);
  EXPECT_EQ(r.maps.grid()->nx(), 5);  // ceil(200 / 40)
  EXPECT_EQ(r.maps.grid()->ny(), 4);
}

// The full-resolution evaluation: bilinear between node centres (a convex
// combination), equal to the nodes at their centres, identical whichever way it
// is asked for (row, single pixel, whole image).
TEST(NoiseMaps, FullResolutionEvaluationIsConsistent) {
  ImageF img = correlated_noise(333, 211, kBeamPix, 1.0, 9);
  BackgroundOptions o = default_options();
  o.box_pixels = 64;
  const BackgroundResult r = estimate_background(img, o);
  ASSERT_EQ(r.status, BackgroundStatus::ok);
  const NoiseMaps& m = r.maps;
  const BackgroundGrid& g = *m.grid();
  const ImageF rms = m.rms_image();
  const ImageF bgi = m.background_image();
  std::vector<float> b(333), s(333);
  for (int y = 0; y < 211; y += 7) {
    m.row(y, b.data(), s.data());
    for (int x = 0; x < 333; ++x) {
      ASSERT_EQ(s[x], rms(y, x));
      ASSERT_EQ(b[x], bgi(y, x));
      ASSERT_EQ(m.rms_at(x, y), rms(y, x));
      ASSERT_EQ(m.background_at(x, y), bgi(y, x));
    }
  }
  float lo = std::numeric_limits<float>::max(), hi = 0.0f;
  for (int j = 0; j < g.ny(); ++j)
    for (int i = 0; i < g.nx(); ++i) {
      lo = std::min(lo, g.rms(j, i));
      hi = std::max(hi, g.rms(j, i));
    }
  EXPECT_GE(rms.minCoeff(), lo * (1 - 1e-6f));
  EXPECT_LE(rms.maxCoeff(), hi * (1 + 1e-6f));
  // Bilinear interpolation written out (common practice): weights from the two
  // bracketing node centres along each axis; constant beyond the outer centres.
  auto bracket = [](const std::vector<double>& c, double t, int& i0, double& w) {
    if (t <= c.front()) { i0 = 0; w = 0.0; return; }
    if (t >= c.back()) { i0 = static_cast<int>(c.size()) - 1; w = 0.0; return; }
    i0 = 0;
    while (c[i0 + 1] <= t) ++i0;
    w = (t - c[i0]) / (c[i0 + 1] - c[i0]);
  };
  for (int y = 0; y < 211; y += 5)
    for (int x = 0; x < 333; x += 3) {
      int i0, j0;
      double wx, wy;
      bracket(g.node_x, x, i0, wx);
      bracket(g.node_y, y, j0, wy);
      const int i1 = std::min(i0 + 1, g.nx() - 1), j1 = std::min(j0 + 1, g.ny() - 1);
      const double want = (1 - wy) * ((1 - wx) * g.rms(j0, i0) + wx * g.rms(j0, i1)) +
                          wy * ((1 - wx) * g.rms(j1, i0) + wx * g.rms(j1, i1));
      ASSERT_NEAR(rms(y, x), want, 1e-6 * want) << x << "," << y;
    }
}

// Same grid, bit for bit, for any number of threads (each box is computed by
// one thread with a fixed algorithm).
TEST(NoiseMaps, IndependentOfThreadCount) {
  ImageF img = correlated_noise(517, 389, kBeamPix, 1.0, 77);
  add_gaussian(img, 200, 150, 12.0, 50.0);
  BackgroundOptions o = default_options();
  o.box_pixels = 48;
  o.step_pixels = 24;
  BackgroundGrid ref;
  for (int threads : {1, 2, 3, 8}) {
    tbb::global_control gc(tbb::global_control::max_allowed_parallelism, threads);
    const BackgroundResult r = estimate_background(img, o);
    ASSERT_EQ(r.status, BackgroundStatus::ok);
    if (threads == 1) {
      ref = *r.maps.grid();
      continue;
    }
    EXPECT_TRUE((r.maps.grid()->rms == ref.rms).all()) << threads;
    EXPECT_TRUE((r.maps.grid()->background == ref.background).all()) << threads;
  }
}

// NaN-aware: blank pixels are left out; boxes with too few valid pixels are
// filled from their neighbours and flagged; the values stay right.
TEST(NoiseMaps, BlankRegionsAreFilledFromNeighbours) {
  const double sigma = 1.0;
  ImageF img = correlated_noise(480, 480, kBeamPix, sigma, 31);
  // Blank the left third entirely (boxes there have no data) and scatter NaNs.
  for (int y = 0; y < 480; ++y)
    for (int x = 0; x < 160; ++x) img(y, x) = std::numeric_limits<float>::quiet_NaN();
  for (int y = 0; y < 480; y += 3) img(y, 300) = std::numeric_limits<float>::quiet_NaN();
  const BackgroundResult r = estimate_background(img, default_options());
  ASSERT_EQ(r.status, BackgroundStatus::ok);
  const BackgroundGrid& g = *r.maps.grid();
  ASSERT_EQ(g.nx(), 4);
  EXPECT_EQ(r.boxes_filled, 4);  // the first node column (boxes in x 0..119)
  for (int j = 0; j < g.ny(); ++j) {
    EXPECT_EQ(g.filled(j, 0), 1);
    EXPECT_EQ(g.valid_pixels(j, 0), 0);
    EXPECT_EQ(g.filled(j, 1), 0);
    for (int i = 0; i < g.nx(); ++i) {
      EXPECT_TRUE(std::isfinite(g.rms(j, i)));
      // Filled nodes average valid neighbours; those have >= 40 x 120 pixels.
      EXPECT_NEAR(g.rms(j, i), sigma, 4.0 * rms_rel_scatter(40.0 * 120.0)) << i << "," << j;
    }
  }
}

// All-NaN image: defined result, status no_data, empty maps.
TEST(NoiseMaps, AllBlankImageIsNoData) {
  ImageF img = ImageF::Constant(100, 90, std::numeric_limits<float>::quiet_NaN());
  const BackgroundResult r = estimate_background(img, default_options());
  EXPECT_EQ(r.status, BackgroundStatus::no_data);
  EXPECT_TRUE(r.maps.empty());
  EXPECT_FALSE(r.message.empty());
  EXPECT_STREQ(to_string(r.status), "no_data");
}

// Constant image: background = the constant, rms = 0 everywhere, status
// zero_rms (the pipeline turns it into an error).
TEST(NoiseMaps, ConstantImageIsZeroRms) {
  ImageF img = ImageF::Constant(150, 170, 0.25f);
  const BackgroundResult r = estimate_background(img, default_options());
  EXPECT_EQ(r.status, BackgroundStatus::zero_rms);
  EXPECT_FALSE(r.maps.empty());
  EXPECT_EQ(r.maps.background_at(10, 10), 0.25f);
  EXPECT_EQ(r.maps.rms_at(10, 10), 0.0f);
  EXPECT_FALSE(r.message.empty());
}

// An image smaller than one box: one node, the statistics of the whole image.
TEST(NoiseMaps, ImageSmallerThanOneBox) {
  ImageF img = correlated_noise(50, 37, kBeamPix, 3.0, 8);
  const BackgroundResult r = estimate_background(img, default_options());
  ASSERT_EQ(r.status, BackgroundStatus::ok);
  const BackgroundGrid& g = *r.maps.grid();
  EXPECT_EQ(g.nx(), 1);
  EXPECT_EQ(g.ny(), 1);
  EXPECT_EQ(g.valid_pixels(0, 0), 50 * 37);
  std::vector<float> v(img.data(), img.data() + img.size());
  const ClipResult c = sigma_clip(v, 3.0);
  EXPECT_FLOAT_EQ(g.rms(0, 0), static_cast<float>(c.sigma));
  EXPECT_EQ(r.maps.rms_at(0, 0), r.maps.rms_at(49, 36));
  EXPECT_NEAR(g.rms(0, 0), 3.0, 4.0 * 3.0 * rms_rel_scatter(50 * 37));
}

// Options are checked before work, naming the field and the rule.
TEST(NoiseMaps, OptionsValidation) {
  BackgroundOptions o;
  EXPECT_NE(o.validate().find("beam_fwhm_pix"), std::string::npos);  // sizes in beams need a beam
  o.box_pixels = 64;
  EXPECT_EQ(o.validate(), "");
  o.clip_sigma = 1.0;
  EXPECT_EQ(o.validate(), "clip_sigma = 1 breaks clip_sigma >= 2");
  o.clip_sigma = 3.0;
  o.box_pixels = 2;
  EXPECT_EQ(o.validate(), "box size = 2 pixels breaks box >= 4 pixels");
  ImageF img = ImageF::Zero(10, 10);
  EXPECT_THROW(estimate_background(img, o), std::invalid_argument);
  o.box_pixels = 8;
  MaskU8 wrong = MaskU8::Zero(5, 5);
  EXPECT_THROW(estimate_background(img, o, &wrong), std::invalid_argument);
}

// Supplied maps: positive and finite wherever the image has data.
TEST(SuppliedMaps, Checks) {
  ImageF img = ImageF::Ones(4, 5);
  img(0, 0) = std::numeric_limits<float>::quiet_NaN();
  ImageF rms = ImageF::Constant(4, 5, 0.1f);
  rms(0, 0) = std::numeric_limits<float>::quiet_NaN();  // fine: no data there
  EXPECT_EQ(check_rms_map(img, rms), "");
  rms(2, 3) = 0.0f;
  EXPECT_EQ(check_rms_map(img, rms),
            "rms at pixel (x, y) = (3, 2) [0-based] is 0 where the image has data (must be finite and > 0)");
  rms(2, 3) = -1.0f;
  EXPECT_NE(check_rms_map(img, rms).find("is -1"), std::string::npos);
  EXPECT_NE(check_rms_map(img, ImageF::Ones(3, 5)).find("rms map is 5 x 3 pixels but the image is 5 x 4"),
            std::string::npos);
  ImageF bg = ImageF::Zero(4, 5);
  EXPECT_EQ(check_background_map(img, bg), "");
  bg(1, 1) = std::numeric_limits<float>::infinity();
  EXPECT_NE(check_background_map(img, bg).find("(1, 1)"), std::string::npos);
}
