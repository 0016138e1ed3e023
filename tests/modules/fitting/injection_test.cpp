// Injection statistics: point sources and close doubles injected into beam-correlated
// noise with the simulator (modules/simulate: analytic sky rendering, noise with the
// beam's autocorrelation), then cut into stamps, fitted and measured on the sky.
// Truth is known by construction; sources are selected by their TRUE SNR
// (docs/CONVENTIONS.md "Signal-to-noise": measured values are Eddington-biased).
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <random>

#include "skerry/constants.h"
#include "skerry/fitting.h"
#include "skerry/simulate.h"
#include "test_helpers.h"

namespace {

using skerry::Beam;
using skerry::sim::TanGrid;

constexpr double kRa0 = 201.25, kDec0 = -38.6;  // Lanternfish Field centre
constexpr double kRms = 1e-4;                   // Jy/beam
constexpr double kPixArcsec = 2.0;
const Beam kBeam{12.0, 8.0, 30.0};  // 6 x 4 pixels FWHM

struct Truth {
  double ra, dec, s_int, snr;
  int stamp_x0, stamp_y0;
};

// Normalised residuals (measured - true) / error in true-SNR bins.
// Expectation: Condon (1997, PASP 109, 166) errors describe the scatter, so the
// normalised residuals have unit standard deviation. The robust std (1.4826 MAD,
// REF-ROBUST-01) of N = 1200 normal values has a standard error of about
// 1.17 / sqrt(2 N) ~ 0.024 (asymptotic efficiency of the MAD, from memory), so the
// window [0.9, 1.1] is about 4 standard errors wide on each side.
TEST(Injection, PointSourceNormalisedResidualsAndFluxScale) {
  const int stamp = 40, per_side = 60, n = stamp * per_side;
  const TanGrid sky = TanGrid::square(kRa0, kDec0, n / 2.0, n / 2.0, kPixArcsec);
  const Eigen::Matrix2d bp_centre = fittest::beam_pix(sky, kBeam, n / 2.0, n / 2.0);
  skerry::ImageF img = skerry::sim::correlated_noise(n, n, bp_centre, kRms, 20261201);
  const double bins[][2] = {{10.0, 20.0}, {20.0, 50.0}, {50.0, 200.0}};
  std::mt19937_64 rng(424242);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  std::vector<skerry::sim::SkySource> sources;
  std::vector<Truth> truth;
  for (int k = 0; k < per_side * per_side; ++k) {
    const int b = k % 3;
    const double snr = bins[b][0] * std::pow(bins[b][1] / bins[b][0], u(rng));
    const int x0 = stamp * (k % per_side), y0 = stamp * (k / per_side);
    const double xs = x0 + stamp / 2 + u(rng) - 0.5, ys = y0 + stamp / 2 + u(rng) - 0.5;
    double ra, dec;
    sky.pix_to_sky(xs, ys, ra, dec);
    sources.push_back(skerry::sim::make_source(ra, dec, snr * kRms));  // point: S_int = peak
    truth.push_back({ra, dec, snr * kRms, snr, x0, y0});
  }
  skerry::sim::RenderOptions ro;
  ro.beam = kBeam;
  skerry::sim::add_sources(img, sky, sources, ro);

  std::vector<skerry::IslandCutout> cutouts;
  for (std::size_t k = 0; k < truth.size(); ++k) {
    const Eigen::Matrix2d bp =
        fittest::beam_pix(sky, kBeam, truth[k].stamp_x0 + stamp / 2, truth[k].stamp_y0 + stamp / 2);
    cutouts.push_back(fittest::make_cutout(img, kRms, truth[k].stamp_x0, truth[k].stamp_y0, stamp,
                                           stamp, 3.0, bp, static_cast<std::int64_t>(k)));
  }
  const auto fits = skerry::fit_islands(cutouts, {});
  ASSERT_EQ(fits.size(), truth.size());
  // Model selection (BIC with effective independent pixels, fit_island): with no
  // prominence cut every noise bump on a source is a candidate maximum; the
  // information criterion must still keep isolated singles single (<= 1%), while
  // without it every multi-maximum island would be split.
  {
    skerry::FitOptions o;
    o.prominence_snr = 0.0;
    const auto with_ic = skerry::fit_islands(cutouts, o);
    o.use_information_criterion = false;
    const auto without_ic = skerry::fit_islands(cutouts, o);
    int multi_max = 0, split_ic = 0, split_no_ic = 0;
    for (std::size_t k = 0; k < cutouts.size(); ++k) {
      multi_max += with_ic[k].n_maxima > 1;
      split_ic += with_ic[k].components.size() > 1;
      split_no_ic += without_ic[k].components.size() > 1;
    }
    std::printf("no prominence cut: %d islands with several maxima; split %d with BIC, %d without\n",
                multi_max, split_ic, split_no_ic);
    EXPECT_GE(multi_max, 10);  // the criterion is exercised
    EXPECT_EQ(split_no_ic, multi_max);
    EXPECT_LE(split_ic, static_cast<int>(0.01 * cutouts.size()));
  }

  // Shape fixed to the beam (the mode for unresolved sources): position and peak
  // errors describe the scatter too (same window and reasoning as below).
  {
    skerry::FitOptions o;
    o.fix_shape_to_beam = true;
    const auto fixed_fits = skerry::fit_islands(cutouts, o);
    std::vector<double> fp[3][3];
    for (std::size_t k = 0; k < fixed_fits.size(); ++k) {
      if (fixed_fits[k].components.size() != 1) continue;
      const skerry::SkyComponent s = skerry::measure_on_sky(fixed_fits[k].components[0], sky, kBeam, {});
      const Eigen::Vector2d off = fittest::sky_offset_arcsec(truth[k].ra, truth[k].dec, s.ra_deg, s.dec_deg);
      const int b = static_cast<int>(k % 3);
      fp[b][0].push_back(off(0) / s.ra_err_arcsec);
      fp[b][1].push_back(off(1) / s.dec_err_arcsec);
      fp[b][2].push_back((s.peak_jy_per_beam - truth[k].s_int) / s.peak_err_jy_per_beam);
    }
    for (int b = 0; b < 3; ++b)
      for (int p = 0; p < 3; ++p) {
        ASSERT_GE(fp[b][p].size(), 1000u);
        const double rs = fittest::robust_std(fp[b][p]);
        std::printf("shape fixed, true SNR [%g, %g): %s robust std %.3f\n", bins[b][0], bins[b][1],
                    p == 0 ? "ra" : p == 1 ? "dec" : "peak", rs);
        EXPECT_GE(rs, 0.9);
        EXPECT_LE(rs, 1.1);
      }
  }

  enum { kRa, kDec, kPeak, kSint, kMaj, kMin, kNPar };
  const char* names[kNPar] = {"ra", "dec", "peak", "s_int", "maj", "min"};
  std::vector<double> pulls[3][kNPar], condon[3][kNPar];
  std::vector<double> ratio_bright;
  int split = 0, failed = 0;
  for (std::size_t k = 0; k < fits.size(); ++k) {
    const auto& f = fits[k];
    ASSERT_EQ(f.island_id, static_cast<std::int64_t>(k));
    if (f.components.size() != 1) {
      ++split;
      continue;
    }
    const auto& c = f.components[0];
    if (c.status != skerry::ComponentStatus::kFitted) {
      ++failed;
      continue;
    }
    const skerry::SkyComponent s = skerry::measure_on_sky(c, sky, kBeam, {});
    const Truth& t = truth[k];
    const int b = static_cast<int>(k % 3);
    const Eigen::Vector2d off = fittest::sky_offset_arcsec(t.ra, t.dec, s.ra_deg, s.dec_deg);
    pulls[b][kRa].push_back(off(0) / s.ra_err_arcsec);
    pulls[b][kDec].push_back(off(1) / s.dec_err_arcsec);
    pulls[b][kPeak].push_back((s.peak_jy_per_beam - t.s_int) / s.peak_err_jy_per_beam);
    pulls[b][kSint].push_back((s.s_int_jy - t.s_int) / s.s_int_err_jy);
    pulls[b][kMaj].push_back((s.maj_arcsec - kBeam.maj_arcsec) / s.maj_err_arcsec);
    pulls[b][kMin].push_back((s.min_arcsec - kBeam.min_arcsec) / s.min_err_arcsec);
    if (t.snr > 20.0) ratio_bright.push_back(s.s_int_jy / t.s_int);
    {  // Condon (1997) expected errors, for information (not the reported default)
      skerry::SkyOptions co;
      co.use_condon_errors = true;
      const auto sc = skerry::measure_on_sky(c, sky, kBeam, co);
      const Eigen::Vector2d o2 = fittest::sky_offset_arcsec(t.ra, t.dec, sc.ra_deg, sc.dec_deg);
      condon[b][kRa].push_back(o2(0) / sc.ra_err_arcsec);
      condon[b][kDec].push_back(o2(1) / sc.dec_err_arcsec);
      condon[b][kPeak].push_back((sc.peak_jy_per_beam - t.s_int) / sc.peak_err_jy_per_beam);
      condon[b][kSint].push_back((sc.s_int_jy - t.s_int) / sc.s_int_err_jy);
      condon[b][kMaj].push_back((sc.maj_arcsec - kBeam.maj_arcsec) / sc.maj_err_arcsec);
      condon[b][kMin].push_back((sc.min_arcsec - kBeam.min_arcsec) / sc.min_err_arcsec);
    }
  }
  for (int b = 0; b < 3; ++b) {
    ASSERT_GE(pulls[b][kRa].size(), 1000u) << "bin " << b;
    for (int p = 0; p < kNPar; ++p) {
      const double rs = fittest::robust_std(pulls[b][p]);
      std::printf("true SNR [%g, %g): %-5s robust std of normalised residuals %.3f (median %+.3f, "
                  "n %zu); with Condon's errors %.3f\n",
                  bins[b][0], bins[b][1], names[p], rs, fittest::median(pulls[b][p]),
                  pulls[b][p].size(), fittest::robust_std(condon[b][p]));
      EXPECT_GE(rs, 0.9) << names[p] << " bin " << b;
      EXPECT_LE(rs, 1.1) << names[p] << " bin " << b;
    }
  }
  // Flux scale: median measured / true S_int within 1% for true SNR > 20 (issue
  // requirement; for unbiased estimates the median's standard error here is about
  // 1.25 sigma_S / sqrt(N) < 0.1%).
  const double med = fittest::median(ratio_bright);
  std::printf("median S_int measured / true (true SNR > 20): %.5f over %zu sources\n", med,
              ratio_bright.size());
  EXPECT_NEAR(med, 1.0, 0.01);
  // Isolated single sources split into several components in at most 1% of cases.
  std::printf("isolated singles split: %d of %zu; not converged: %d\n", split, fits.size(), failed);
  EXPECT_LE(split, static_cast<int>(0.01 * fits.size()));
  EXPECT_LE(failed, static_cast<int>(0.01 * fits.size()));
}

// Close doubles (issue requirement): 1.5 beams apart (1.5 x the beam's major FWHM,
// random direction), each component SNR >= 20, flux ratio 1 to 2: split into two
// components in >= 90% of cases with both positions within 0.2 beam (major FWHM)
// and both S_int within 3 of their errors.
TEST(Injection, CloseDoublesAreSplit) {
  const int stamp = 56, per_side = 20, n = stamp * per_side;
  const TanGrid sky = TanGrid::square(kRa0, kDec0, n / 2.0, n / 2.0, kPixArcsec);
  const Eigen::Matrix2d bp_centre = fittest::beam_pix(sky, kBeam, n / 2.0, n / 2.0);
  skerry::ImageF img = skerry::sim::correlated_noise(n, n, bp_centre, kRms, 777);
  std::mt19937_64 rng(99);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  struct Pair {
    double ra[2], dec[2], s[2];
  };
  std::vector<Pair> pairs;
  std::vector<skerry::sim::SkySource> sources;
  const double sep_pix = 1.5 * kBeam.maj_arcsec / kPixArcsec;
  for (int k = 0; k < per_side * per_side; ++k) {
    const int x0 = stamp * (k % per_side), y0 = stamp * (k / per_side);
    const double ang = 2 * skerry::kPi * u(rng);
    const double cx = x0 + stamp / 2 + u(rng) - 0.5, cy = y0 + stamp / 2 + u(rng) - 0.5;
    const double faint = (20.0 + 30.0 * u(rng)) * kRms, ratio = 1.0 + u(rng);
    Pair p;
    for (int j = 0; j < 2; ++j) {
      const double sgn = j == 0 ? 0.5 : -0.5;
      sky.pix_to_sky(cx + sgn * sep_pix * std::cos(ang), cy + sgn * sep_pix * std::sin(ang), p.ra[j],
                     p.dec[j]);
      p.s[j] = j == 0 ? faint * ratio : faint;
      sources.push_back(skerry::sim::make_source(p.ra[j], p.dec[j], p.s[j]));
    }
    pairs.push_back(p);
  }
  skerry::sim::RenderOptions ro;
  ro.beam = kBeam;
  skerry::sim::add_sources(img, sky, sources, ro);
  // Each true position seeds an island (pixels >= 3 sigma connected to the
  // brightest pixel within 2 pixels of it). Pairs separated across the beam's
  // minor axis often fall into two islands; those are fitted separately, as the
  // pipeline fits each island on its own, and their components are pooled.
  std::vector<skerry::IslandCutout> cutouts;
  for (int k = 0; k < per_side * per_side; ++k) {
    const int x0 = stamp * (k % per_side), y0 = stamp * (k / per_side);
    const Eigen::Matrix2d bp = fittest::beam_pix(sky, kBeam, x0 + stamp / 2, y0 + stamp / 2);
    double xs[2], ys[2];
    for (int j = 0; j < 2; ++j) sky.sky_to_pix(pairs[k].ra[j], pairs[k].dec[j], xs[j], ys[j]);
    auto first = fittest::make_cutout(img, kRms, x0, y0, stamp, stamp, 3.0, bp, 2 * k, 2,
                                      static_cast<int>(std::lround(xs[0])) - x0,
                                      static_cast<int>(std::lround(ys[0])) - y0);
    auto second = fittest::make_cutout(img, kRms, x0, y0, stamp, stamp, 3.0, bp, 2 * k + 1, 2,
                                       static_cast<int>(std::lround(xs[1])) - x0,
                                       static_cast<int>(std::lround(ys[1])) - y0);
    const bool same = ((first.mask == skerry::kCutoutIsland) && (second.mask == skerry::kCutoutIsland)).any();
    cutouts.push_back(std::move(first));
    if (!same) cutouts.push_back(std::move(second));
  }
  const auto fits = skerry::fit_islands(cutouts, {});
  std::vector<std::vector<skerry::PixelComponent>> comps(pairs.size());
  for (const auto& f : fits)
    for (const auto& c : f.components) comps[f.island_id / 2].push_back(c);
  int two = 0, good = 0, single_island = 0;
  for (const auto& c : cutouts) single_island += c.island_id % 2 == 0 ? 1 : -1;
  const double max_off = 0.2 * kBeam.maj_arcsec;
  for (std::size_t k = 0; k < pairs.size(); ++k) {
    if (comps[k].size() != 2) continue;
    ++two;
    skerry::SkyComponent s[2];
    for (int j = 0; j < 2; ++j) s[j] = skerry::measure_on_sky(comps[k][j], sky, kBeam, {});
    const Pair& p = pairs[k];
    // Assign fitted components to the true ones by the smaller total offset.
    double best_cost = INFINITY;
    bool ok_best = false;
    for (int perm = 0; perm < 2; ++perm) {
      double cost = 0.0;
      bool ok = true;
      for (int j = 0; j < 2; ++j) {
        const int t = perm == 0 ? j : 1 - j;
        const double off = fittest::sky_offset_arcsec(p.ra[t], p.dec[t], s[j].ra_deg, s[j].dec_deg).norm();
        cost += off;
        ok = ok && off <= max_off && std::abs(s[j].s_int_jy - p.s[t]) <= 3.0 * s[j].s_int_err_jy;
      }
      if (cost < best_cost) {
        best_cost = cost;
        ok_best = ok;
      }
    }
    good += ok_best ? 1 : 0;
  }
  std::printf("close doubles: %d of %zu split in two (%d in one island), %d also within 0.2 beam and 3 sigma\n",
              two, pairs.size(), single_island, good);
  EXPECT_GE(good, static_cast<int>(std::ceil(0.9 * pairs.size())));
}

}  // namespace

namespace {

// Resolved Gaussians (issue requirement "deconvolved sizes recovered within their
// errors"): intrinsic 9" x 5" at random PA, beam 12" x 8" PA 30, integrated SNR
// log-uniform in [40, 200]; deconvolution by REF-DECONV-01 (Wild 1970). The
// normalised residuals of the deconvolved FWHMs and of S_int have a robust std
// within [0.85, 1.15] (N = 900: standard error ~0.03; the deconvolution is
// nonlinear near the beam, so the window is a little wider than for the fitted
// parameters) and the deconvolved PA lies within 3 of its errors in >= 97% of cases.
TEST(Injection, ResolvedSourcesDeconvolvedWithinErrors) {
  const int stamp = 48, per_side = 30, n = stamp * per_side;
  const TanGrid sky = TanGrid::square(kRa0, kDec0, n / 2.0, n / 2.0, kPixArcsec, 25.0, true);
  const Eigen::Matrix2d bp_centre = fittest::beam_pix(sky, kBeam, n / 2.0, n / 2.0);
  skerry::ImageF img = skerry::sim::correlated_noise(n, n, bp_centre, kRms, 5150);
  std::mt19937_64 rng(8080);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  std::vector<skerry::sim::SkySource> sources;
  std::vector<skerry::Ellipse> shapes;
  for (int k = 0; k < per_side * per_side; ++k) {
    const int x0 = stamp * (k % per_side), y0 = stamp * (k / per_side);
    double ra, dec;
    sky.pix_to_sky(x0 + stamp / 2 + u(rng) - 0.5, y0 + stamp / 2 + u(rng) - 0.5, ra, dec);
    const skerry::Ellipse shape{9.0, 5.0, 180.0 * u(rng)};
    shapes.push_back(shape);
    sources.push_back(skerry::sim::make_source(ra, dec, 40.0 * std::pow(5.0, u(rng)) * kRms, shape));
  }
  skerry::sim::RenderOptions ro;
  ro.beam = kBeam;
  skerry::sim::add_sources(img, sky, sources, ro);
  std::vector<skerry::IslandCutout> cutouts;
  for (int k = 0; k < per_side * per_side; ++k) {
    const int x0 = stamp * (k % per_side), y0 = stamp * (k / per_side);
    cutouts.push_back(fittest::make_cutout(img, kRms, x0, y0, stamp, stamp, 3.0,
                                           fittest::beam_pix(sky, kBeam, x0 + stamp / 2, y0 + stamp / 2), k));
  }
  const auto fits = skerry::fit_islands(cutouts, {});
  std::vector<double> pmaj, pmin, psint;
  int pa_ok = 0, n_ok = 0;
  for (std::size_t k = 0; k < fits.size(); ++k) {
    if (fits[k].components.size() != 1) continue;
    const auto s = skerry::measure_on_sky(fits[k].components[0], sky, kBeam, {});
    if (s.deconv_maj_upper_limit || s.deconv_min_upper_limit) continue;
    ++n_ok;
    pmaj.push_back((s.deconv_maj_arcsec - shapes[k].maj) / s.deconv_maj_err_arcsec);
    pmin.push_back((s.deconv_min_arcsec - shapes[k].min) / s.deconv_min_err_arcsec);
    psint.push_back((s.s_int_jy - sources[k].spectrum.s_ref_jy) / s.s_int_err_jy);
    double dpa = std::fmod(s.deconv_pa_deg - shapes[k].pa_deg + 270.0, 180.0) - 90.0;
    pa_ok += std::abs(dpa) <= 3.0 * s.deconv_pa_err_deg;
  }
  const double rmaj = fittest::robust_std(pmaj), rmin = fittest::robust_std(pmin),
               rs = fittest::robust_std(psint);
  std::printf("resolved: %d of %zu resolved on both axes; deconvolved maj robust std %.3f (median %+.3f), "
              "min %.3f (median %+.3f), S_int %.3f (median %+.3f); PA within 3 sigma %d\n",
              n_ok, fits.size(), rmaj, fittest::median(pmaj), rmin, fittest::median(pmin), rs,
              fittest::median(psint), pa_ok);
  EXPECT_GE(n_ok, static_cast<int>(0.95 * fits.size()));
  for (double r : {rmaj, rmin, rs}) {
    EXPECT_GE(r, 0.85);
    EXPECT_LE(r, 1.15);
  }
  EXPECT_GE(pa_ok, static_cast<int>(0.97 * n_ok));
}

}  // namespace
