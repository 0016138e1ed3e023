// Band images: several bands on their own grids, spectra, beams, primary beam,
// blanks, background, determinism.
#include <gtest/gtest.h>
#include <tbb/global_control.h>

#include <Eigen/LU>
#include <cmath>
#include <cstring>

#include "skerry/constants.h"
#include "skerry/gaussian.h"
#include "skerry/simulate.h"
#include "erfa_geometry.h"

using namespace skerry;
using namespace skerry::sim;

namespace {

constexpr double kRa0 = 201.25, kDec0 = -38.6;

struct BandGrid {
  double freq_hz, pixel_arcsec, ref_x, ref_y;
  long n;
};

// Sum of pixels within a radius around (x, y).
double window_sum(const ImageF& img, double x, double y, double radius) {
  double s = 0;
  for (long py = std::max(0L, long(y - radius)); py <= std::min(img.rows() - 1, long(y + radius)); ++py)
    for (long px = std::max(0L, long(x - radius)); px <= std::min(img.cols() - 1, long(x + radius)); ++px)
      if (std::hypot(px - x, py - y) <= radius) s += img(py, px);
  return s;
}

// Three bands of one field, each with its own pixel size and reference pixel, beams
// scaling as 1/frequency; noiseless. For every isolated source, the pixel sum over
// the beam area in pixels (REF-GAUSS-04) equals S(nu) of the drawn law
// (log-parabola in base 10, recomputed here with natural logarithms), and the
// second moments of point sources give the band's beam.
TEST(SimulateBand, SeveralBandsSpectraAndBeams) {
  const BandGrid grids[] = {{0.9e9, 2.2, 150.3, 149.8, 300},
                            {1.4e9, 1.5, 219.5, 220.5, 440},
                            {3.0e9, 0.75, 440.25, 439.0, 880}};
  const TanGrid footprint = TanGrid::square(kRa0, kDec0, 219.5, 220.5, 1.5);
  SkyModelOptions so;
  so.count = 20;  // isolated by 80" in a 660" field
  so.radius_deg = 0.13;
  so.footprint = &footprint;
  so.footprint_nx = so.footprint_ny = 440;
  so.footprint_margin_pix = 30.0;
  so.s_min_jy = 1e-3;
  so.s_max_jy = 1e-2;
  so.resolved_fraction = 0.3;
  so.size_max_arcsec = 6.0;
  so.curved_fraction = 0.5;
  so.alpha_sigma = 0.3;
  so.min_separation_arcsec = 80.0;
  const SkyModel m = draw_sky_model(so, 31);
  const Beam beam_ref{6.0, 5.0, 25.0};
  for (const BandGrid& g : grids) {
    const TanGrid grid = TanGrid::square(kRa0, kDec0, g.ref_x, g.ref_y, g.pixel_arcsec);
    BandOptions bo;
    bo.nx = bo.ny = g.n;
    bo.freq_hz = g.freq_hz;
    bo.beam = beam_at_frequency(beam_ref, 1.4e9, g.freq_hz);
    bo.rms_jy_per_beam = 0.0;
    const BandImage b = simulate_band(m, grid, bo, 31);
    ASSERT_EQ(b.sources.size(), m.sources.size());
    const double omega_pix = kGaussAreaFactor * bo.beam.maj_arcsec * bo.beam.min_arcsec /
                             (g.pixel_arcsec * g.pixel_arcsec);
    int checked = 0, points = 0;
    for (std::size_t i = 0; i < m.sources.size(); ++i) {
      const SkySource& s = m.sources[i];
      const BandSource& t = b.sources[i];
      if (t.flags & (kSimOutsideImage | kSimNearEdge)) continue;
      const double tt = std::log10(g.freq_hz / s.spectrum.ref_freq_hz);
      const double want = s.spectrum.s_ref_jy * std::pow(g.freq_hz / s.spectrum.ref_freq_hz, s.spectrum.alpha) *
                          std::exp(s.spectrum.curvature * std::log(10.0) * tt * tt);
      EXPECT_NEAR(t.s_true_jy, want, want * 1e-12);
      // 80" radius window (isolated by 80"; 8 sigma of the largest convolved size).
      const double sum = window_sum(b.image, t.x, t.y, 40.0 / g.pixel_arcsec);
      EXPECT_NEAR(sum / omega_pix, want, want * 1e-5) << g.freq_hz << " source " << i;
      ++checked;
      if (s.intrinsic.maj == 0.0) {
        // Second moments of the point source -> beam.
        const long r = long(30.0 / g.pixel_arcsec);
        double w = 0, mx = 0, my = 0;
        for (long py = long(t.y) - r; py <= long(t.y) + r; ++py)
          for (long px = long(t.x) - r; px <= long(t.x) + r; ++px) {
            const double v = b.image(py, px);
            w += v;
            mx += v * px;
            my += v * py;
          }
        mx /= w;
        my /= w;
        Eigen::Matrix2d c = Eigen::Matrix2d::Zero();
        for (long py = long(t.y) - r; py <= long(t.y) + r; ++py)
          for (long px = long(t.x) - r; px <= long(t.x) + r; ++px) {
            const Eigen::Vector2d d(px - mx, py - my);
            c += b.image(py, px) * d * d.transpose() / w;
          }
        Eigen::Matrix2d cd;
        cd << -g.pixel_arcsec / 3600.0, 0, 0, g.pixel_arcsec / 3600.0;  // east left, north up
        const Eigen::Matrix2d j = skerry::testing::erfa_jacobian(cd, g.ref_x, g.ref_y, kRa0, kDec0, t.x, t.y);
        const Ellipse e = cov_to_ellipse(j * c * j.transpose());
        EXPECT_NEAR(e.maj, 6.0 * 1.4e9 / g.freq_hz, 1e-3);
        EXPECT_NEAR(e.min, 5.0 * 1.4e9 / g.freq_hz, 1e-3);
        EXPECT_NEAR(e.pa_deg, 25.0, 1e-3);
        ++points;
      }
    }
    EXPECT_EQ(checked, 20);
    EXPECT_GE(points, 5);
  }
}

TEST(SimulateBand, PrimaryBeamNoiseRisesAndBlanks) {
  const long n = 512;
  const double pix = 6.0;  // 0.85 deg field
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 255.5, 255.5, pix);
  SkyModel empty;
  BandOptions bo;
  bo.nx = bo.ny = n;
  bo.freq_hz = 1.4e9;
  bo.beam = Beam{24.0, 20.0, 0.0};
  bo.rms_jy_per_beam = 1e-4;
  bo.pb_fwhm_deg = 0.8;
  bo.blank_below_pb = 0.2;
  bo.blank_border_pix = 3;
  const BandImage b = simulate_band(empty, grid, bo, 9);
  ASSERT_EQ(b.primary_beam.rows(), n);
  // pb against exp(-4 ln 2 r^2 / fwhm^2) with r from Vincenty's formula (sky.h),
  // at a few pixels; the pointing centre is the grid centre.
  double ra_c, dec_c;
  grid.pix_to_sky(255.5, 255.5, ra_c, dec_c);
  for (auto [x, y] : {std::pair{255L, 255L}, {100L, 300L}, {40L, 480L}, {500L, 10L}}) {
    double ra, dec;
    grid.pix_to_sky(x, y, ra, dec);
    const double r = separation_deg(ra_c, dec_c, ra, dec);
    const double want = std::exp(-4.0 * kLn2 * r * r / (0.8 * 0.8));
    EXPECT_NEAR(b.primary_beam(y, x), want, 2e-6) << x << "," << y;
    const bool blank = want < 0.2 || x < 3 || y < 3 || x >= n - 3 || y >= n - 3;
    EXPECT_EQ(std::isnan(b.image(y, x)), blank) << x << "," << y;
  }
  EXPECT_TRUE(std::isnan(b.image(1, 255)));  // border
  // Noise rms / pb: image x pb has the target rms everywhere. Compare the centre
  // (pb > 0.9) and an annulus where pb ~ 0.3-0.5: each holds > 25,000 pixels, about
  // 1,800 independent beams (beam area 15 pixels), so the relative error of the rms
  // is 0.5 sqrt(Omega / N) ~ 1.2 % (docs/CONVENTIONS.md "Noise"); tolerance 5 % (4 sigma).
  double s_in = 0, n_in = 0, s_out = 0, n_out = 0, raw_out = 0;
  for (long y = 0; y < n; ++y)
    for (long x = 0; x < n; ++x) {
      const float v = b.image(y, x);
      if (std::isnan(v)) continue;
      const double p = b.primary_beam(y, x);
      if (p > 0.9) {
        s_in += (v * p) * (v * p);
        n_in += 1;
      } else if (p > 0.3 && p < 0.5) {
        s_out += (v * p) * (v * p);
        raw_out += v * v;
        n_out += 1;
      }
    }
  ASSERT_GT(n_in, 1000);
  ASSERT_GT(n_out, 1000);
  EXPECT_NEAR(std::sqrt(s_in / n_in), 1e-4, 5e-6);
  EXPECT_NEAR(std::sqrt(s_out / n_out), 1e-4, 5e-6);
  EXPECT_GT(std::sqrt(raw_out / n_out), 2e-4);  // the corrected noise has risen
}

TEST(SimulateBand, ApparentImageScalesSourcesByThePrimaryBeam) {
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 127.5, 127.5, 4.0);
  SkyModel m;
  double ra, dec;
  grid.pix_to_sky(200.3, 60.7, ra, dec);
  m.sources.push_back(make_source(ra, dec, 0.01));
  BandOptions bo;
  bo.nx = bo.ny = 256;
  bo.beam = Beam{16.0, 14.0, 40.0};
  bo.rms_jy_per_beam = 0.0;
  bo.pb_fwhm_deg = 0.5;
  for (bool corrected : {true, false}) {
    bo.pb_corrected = corrected;
    const BandImage b = simulate_band(m, grid, bo, 1);
    const BandSource& t = b.sources[0];
    double ra_c, dec_c;
    grid.pix_to_sky(127.5, 127.5, ra_c, dec_c);
    const double r = separation_deg(ra_c, dec_c, ra, dec);
    const double pb = std::exp(-4.0 * kLn2 * r * r / 0.25);
    EXPECT_NEAR(t.pb, pb, 2e-6);
    const double want = corrected ? 0.01 : 0.01 * pb;
    EXPECT_NEAR(t.s_int_jy, want, 1e-7);
    const double omega_pix = kGaussAreaFactor * 16.0 * 14.0 / 16.0;
    EXPECT_NEAR(window_sum(b.image, t.x, t.y, 40.0) / omega_pix, want, want * 1e-5);
  }
}

TEST(SimulateBand, BackgroundIsSmoothAndAdditive) {
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 200.0, 150.0, 1.5);
  SkyModelOptions so;
  so.count = 40;
  so.footprint = &grid;
  so.footprint_nx = 400;
  so.footprint_ny = 300;
  const SkyModel m = draw_sky_model(so, 4);
  BandOptions bo;
  bo.nx = 400;
  bo.ny = 300;
  bo.rms_jy_per_beam = 0.0;
  bo.background_amplitude_jy_per_beam = 5e-5;
  bo.background_scale_arcsec = 300.0;
  bo.keep_background = true;
  bo.keep_model = true;
  const BandImage b = simulate_band(m, grid, bo, 4);
  double sum2 = 0, max_step = 0;
  for (long y = 0; y < 300; ++y)
    for (long x = 0; x < 400; ++x) {
      EXPECT_NEAR(b.image(y, x), b.background(y, x) + b.model(y, x), 1e-9);
      sum2 += double(b.background(y, x)) * b.background(y, x);
      if (x > 0) max_step = std::max(max_step, std::abs(double(b.background(y, x)) - b.background(y, x - 1)));
    }
  const double rms = std::sqrt(sum2 / (400.0 * 300.0));
  EXPECT_GT(rms, 1e-5);
  EXPECT_LT(rms, 1.5e-4);
  // A wave of wavelength >= 300" changes by at most 2 pi A sqrt(2/n) n per
  // 1.5" pixel / 300": a smooth background.
  EXPECT_LT(max_step, 2 * kPi * 5e-5 * std::sqrt(2.0 / 4.0) * 4.0 * 1.5 / 300.0);
}

TEST(SimulateBand, SameSeedSameBytesForAnyThreadCount) {
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 150.0, 120.0, 1.5, 12.0);
  SkyModelOptions so;
  so.count = 500;
  so.radius_deg = 0.1;
  so.resolved_fraction = 0.3;
  so.double_fraction = 0.2;
  BandImage ref;
  for (int threads : {1, 2, 8}) {
    tbb::global_control gc(tbb::global_control::max_allowed_parallelism, threads);
    const SkyModel m = draw_sky_model(so, 77);
    BandOptions bo;
    bo.nx = 301;
    bo.ny = 257;
    bo.pb_fwhm_deg = 0.3;
    bo.blank_below_pb = 0.1;
    bo.background_amplitude_jy_per_beam = 1e-5;
    const BandImage b = simulate_band(m, grid, bo, 77);
    if (ref.image.size() == 0) {
      ref = b;
      continue;
    }
    EXPECT_EQ(std::memcmp(b.image.data(), ref.image.data(), sizeof(float) * b.image.size()), 0) << threads;
    EXPECT_EQ(std::memcmp(b.primary_beam.data(), ref.primary_beam.data(),
                          sizeof(float) * b.primary_beam.size()), 0) << threads;
    ASSERT_EQ(b.sources.size(), ref.sources.size());
    for (std::size_t i = 0; i < b.sources.size(); ++i) {
      EXPECT_EQ(b.sources[i].x, ref.sources[i].x);
      EXPECT_EQ(b.sources[i].peak_jy_per_beam, ref.sources[i].peak_jy_per_beam);
      EXPECT_EQ(b.sources[i].flags, ref.sources[i].flags);
    }
  }
  BandOptions bo;
  bo.nx = 301;
  bo.ny = 257;
  bo.pb_fwhm_deg = 0.3;
  bo.blank_below_pb = 0.1;
  bo.background_amplitude_jy_per_beam = 1e-5;
  const BandImage other = simulate_band(draw_sky_model(so, 78), grid, bo, 78);
  EXPECT_NE(std::memcmp(other.image.data(), ref.image.data(), sizeof(float) * ref.image.size()), 0);
}

TEST(SimulateBand, TruthTablesCarryUnitsAndRows) {
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 100.0, 100.0, 1.5);
  SkyModelOptions so;
  so.count = 30;
  so.double_fraction = 0.3;
  const SkyModel m = draw_sky_model(so, 2);
  BandOptions bo;
  bo.nx = bo.ny = 201;
  const BandImage b = simulate_band(m, grid, bo, 2);
  const Table sky = sky_truth_table(m);
  EXPECT_EQ(sky.rows(), m.sources.size());
  EXPECT_EQ(sky.at("ra_deg").unit, "deg");
  EXPECT_EQ(sky.at("ra_deg").ucd, "pos.eq.ra;meta.main");
  const Table band = band_truth_table(m.sources, b.sources, bo.freq_hz, bo.beam);
  EXPECT_EQ(band.rows(), m.sources.size());
  EXPECT_EQ(band.at("peak_jy_per_beam").unit, "Jy/beam");
  EXPECT_NEAR(band.at("x_pix1").f64[0], b.sources[0].x + 1.0, 1e-12);
  EXPECT_NEAR(band.at("snr_true").f64[3], b.sources[3].peak_jy_per_beam / 2e-5, 1e-9);
  ASSERT_NE(band.get_meta("freq_mhz"), nullptr);
}

TEST(SimulateBand, BadOptionsNameTheOption) {
  const TanGrid grid = TanGrid::square(kRa0, kDec0, 10.0, 10.0, 1.5);
  BandOptions bo;
  bo.nx = bo.ny = 21;
  bo.beam = Beam{4.0, 5.0, 0.0};
  EXPECT_THROW(simulate_band({}, grid, bo, 1), std::invalid_argument);
  bo.beam = Beam{6.0, 5.0, 0.0};
  bo.blank_below_pb = 0.5;
  try {
    simulate_band({}, grid, bo, 1);
    FAIL();
  } catch (const std::invalid_argument& e) {
    EXPECT_NE(std::string(e.what()).find("blank_below_pb"), std::string::npos);
  }
}

}  // namespace
