// The golden band images (independent rendering) and the `skerry bands`
// command end to end, with its bad-input errors.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

#include "io/fits_image.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "skerry/forced.h"
#include "skerry/simulate.h"
#include "skerry/spectra.h"
#include "tan_sky.h"
#include "skerry_test_support.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;

struct TruthRow {
  double ra, dec, s, alpha;
};
std::vector<TruthRow> read_truth(const std::string& path) {
  std::ifstream in(path);
  std::string line;
  std::vector<TruthRow> rows;
  std::getline(in, line);  // "# what the image is"
  std::getline(in, line);  // header
  while (std::getline(in, line)) {
    if (line.empty()) continue;
    std::stringstream ss(line);
    std::vector<double> v;
    std::string cell;
    while (std::getline(ss, cell, ',')) v.push_back(std::stod(cell));
    rows.push_back({v[0], v[1], v[2], v[10]});
  }
  return rows;
}

// Source: golden images rendered through astropy's WCS independently of this
// project (tests/data/golden/README-bands.md): point sources with
// S = 10 mJy (nu/1.4 GHz)^alpha in three bands with different grids, beams and
// reference pixels. Noiseless: alpha recovered to 1e-4, flux densities to 1e-4.
TEST(Golden, AlphaFromThreeNoiselessBands) {
  const std::string dir = std::string(SKERRY_TEST_DATA_DIR) + "/golden/";
  const std::vector<std::string> names{"bands_0900MHz_noiseless", "bands_1400MHz_noiseless", "bands_3000MHz_noiseless"};
  std::vector<std::vector<BandFlux>> per;
  std::vector<TruthRow> truth0;
  for (std::size_t b = 0; b < names.size(); ++b) {
    const SkyImage im = read_sky_image(dir + names[b] + ".fits");
    const auto truth = read_truth(dir + names[b] + ".truth.csv");
    if (b == 0) {
      truth0 = truth;
      per.resize(truth.size());
    }
    std::vector<ForcedSource> pos;
    for (const auto& t : truth) pos.push_back({t.ra, t.dec, {}});
    const auto m = forced_measure(im.pixels, ImageF(), 1e-5, *im.wcs, im.beam, pos);
    for (std::size_t k = 0; k < truth.size(); ++k) {
      EXPECT_NEAR(m[k].flux_jy, truth[k].s, 1e-4 * truth[k].s) << names[b] << " source " << k;
      per[k].push_back({im.freq_hz, m[k].flux_jy, 1e-5, 1e-5, 0.0});
    }
  }
  const auto spec = fit_spectra(per);
  for (std::size_t k = 0; k < spec.size(); ++k) {
    ASSERT_EQ(spec[k].status, SpectrumStatus::Fitted);
    EXPECT_NEAR(spec[k].alpha, truth0[k].alpha, 1e-4) << "source " << k;
  }
}

// ---- the command -------------------------------------------------------------------

struct RunResult {
  int code;
  std::string err;
};
RunResult run_skerry(const std::string& args, const fs::path& dir) {
  const std::string errf = (dir / "stderr.txt").string();
  const std::string cmd = std::string(SKERRY_BINARY) + " " + args + " > " + (dir / "stdout.txt").string() + " 2> " + errf;
  return {test::shell(cmd), test::slurp(errf)};
}

GridSpec band_grid(double freq_hz, const Beam& beam, double pix_arcsec, long n, double ra = 201.25) {
  GridSpec g;
  g.nx = g.ny = n;
  g.projection = "SIN";
  g.crval1_deg = ra;
  g.crval2_deg = -38.6;
  g.crpix1 = 0.5 * (n + 1) + 0.3;
  g.crpix2 = 0.5 * (n + 1) - 0.2;
  g.cdelt1_deg = -pix_arcsec / 3600.0;
  g.cdelt2_deg = pix_arcsec / 3600.0;
  g.beam = beam;
  g.freq_hz = freq_hz;
  return g;
}

class BandsCommand : public ::testing::Test {
 protected:
  void SetUp() override {
    dir_ = fs::temp_directory_path() / ("skerry_bands_test_" + std::to_string(::getpid()));
    fs::remove_all(dir_);
    fs::create_directories(dir_);
  }
  void TearDown() override { fs::remove_all(dir_); }
  // Writes a simulated band of the Lanternfish Field; returns its path.
  std::string write_band(const std::string& name, const GridSpec& g, const sim::SkyModel& model, double rms,
                         std::uint64_t stream) {
    SkyImage like = make_sky_image(g, ImageF::Zero(g.ny, g.nx), "Lanternfish");
    sim::BandOptions bo;
    bo.nx = g.nx;
    bo.ny = g.ny;
    bo.freq_hz = g.freq_hz;
    bo.beam = g.beam.valid() ? g.beam : Beam{8, 8, 0};
    bo.rms_jy_per_beam = rms;
    bo.noise_stream = stream;
    const sim::BandImage img = sim::simulate_band(model, *like.wcs, bo, 7);
    const std::string path = (dir_ / (name + ".fits")).string();
    write_fits_image(path, img.image, like);
    return path;
  }
  sim::SkyModel model(const GridSpec& g) {
    SkyImage like = make_sky_image(g, ImageF::Zero(g.ny, g.nx), "Lanternfish");
    sim::SkyModelOptions so;
    so.footprint = like.wcs.get();
    so.footprint_nx = g.nx;
    so.footprint_ny = g.ny;
    so.footprint_margin_pix = 30;
    so.count = 60;
    so.s_min_jy = 2e-3;
    so.s_max_jy = 2e-2;
    so.alpha_mean = -0.7;
    so.alpha_sigma = 0.2;
    so.resolved_fraction = 0.0;
    so.min_separation_arcsec = 60.0;
    return sim::draw_sky_model(so, 11);
  }
  fs::path dir_;
};

// Source: end-to-end check against the simulator's truth (docs/CONVENTIONS.md
// "Spectra"): three bands, detection by extract on the finest band (the
// default), forced measurement, spectra, maps. The median alpha error of the
// sources detected in all bands is below 0.05 (their SNR is >= 20, so sigma_alpha
// is ~0.05 each and the median of ~50 is good to ~0.01); the spectral index map
// carries the common beam and has values.
TEST_F(BandsCommand, EndToEndWritesSpectraAndMaps) {
  const GridSpec g1 = band_grid(0.9e9, {18, 15, 20}, 4.0, 200), g2 = band_grid(1.4e9, {12, 10, 30}, 2.5, 320),
                 g3 = band_grid(3.0e9, {6, 5, 40}, 1.25, 640);
  const sim::SkyModel m = model(g2);
  const std::string p1 = write_band("lf_0900", g1, m, 1e-4, 1), p2 = write_band("lf_1400", g2, m, 8e-5, 2),
                    p3 = write_band("lf_3000", g3, m, 6e-5, 3);
  const fs::path out = dir_ / "out";
  const RunResult r = run_skerry("bands " + p1 + " " + p2 + " " + p3 + " --out " + out.string() + " --output.name lf", dir_);
  ASSERT_EQ(r.code, 0) << r.err;
  for (const char* f : {"lf.spectra.csv", "lf.spectra.fits", "lf.spectra.vot", "lf.forced.csv", "lf.alpha_map.fits",
                        "lf.alpha_err_map.fits", "lf.run.json"})
    EXPECT_TRUE(fs::exists(out / f)) << f;
  const Table t = read_table((out / "lf.spectra.csv").string());
  const Column& a = t.at("alpha");
  const Column& ra = t.at("ra_deg");
  const Column& dec = t.at("dec_deg");
  std::vector<double> d;
  for (std::size_t i = 0; i < t.rows(); ++i) {
    if (!std::isfinite(a.f64[i])) continue;
    // Nearest truth source.
    double best = 1e9, alpha_true = NAN;
    for (const auto& s : m.sources) {
      const double sep = separation_deg(ra.f64[i], dec.f64[i], s.ra_deg, s.dec_deg) * 3600.0;
      if (sep < best) {
        best = sep;
        alpha_true = s.spectrum.alpha;
      }
    }
    if (best < 3.0) d.push_back(a.f64[i] - alpha_true);
  }
  ASSERT_GE(d.size(), 30u);
  EXPECT_LT(std::abs(testing::median(d)), 0.05);
  const SkyImage am = read_sky_image((out / "lf.alpha_map.fits").string(), [] {
    ImageReadOptions o;
    o.accept_any_bunit = true;
    return o;
  }());
  // Common beam: contains 18"x15" PA 20 and the others, enlarged by 2 %.
  EXPECT_GT(am.beam.maj_arcsec, 18.0);
  EXPECT_GT(am.beam.min_arcsec, 15.0 * 1.01);
  long finite = 0;
  for (long i = 0; i < am.pixels.size(); ++i) finite += std::isfinite(am.pixels.data()[i]);
  EXPECT_GT(finite, 100);
}

// Source: the project's rules on bad input (one clear line naming the file).
TEST_F(BandsCommand, BadInputs) {
  const sim::SkyModel m = model(band_grid(1.4e9, {12, 10, 30}, 2.5, 320));
  const std::string a = write_band("a", band_grid(1.4e9, {12, 10, 30}, 2.5, 200), m, 1e-4, 1);
  const std::string far = write_band("far", band_grid(3.0e9, {6, 5, 0}, 2.5, 200, 150.0), m, 1e-4, 2);
  const std::string same = write_band("same", band_grid(1.4e9, {6, 5, 0}, 2.5, 200), m, 1e-4, 3);
  const std::string nobeam = write_band("nobeam", band_grid(3.0e9, Beam{0, 0, 0}, 2.5, 200), m, 1e-4, 4);
  const fs::path out = dir_ / "bad";
  RunResult r = run_skerry("bands " + a + " " + far + " --out " + out.string(), dir_);
  EXPECT_EQ(r.code, 3);
  EXPECT_NE(r.err.find(far + ": does not overlap " + a), std::string::npos) << r.err;
  r = run_skerry("bands " + a + " " + same + " --out " + out.string(), dir_);
  EXPECT_EQ(r.code, 3);
  EXPECT_NE(r.err.find(same + ": has the same frequency (1400.0 MHz) as " + a), std::string::npos) << r.err;
  r = run_skerry("bands " + a + " " + nobeam + " --out " + out.string(), dir_);
  EXPECT_EQ(r.code, 3);
  EXPECT_NE(r.err.find(nobeam + ":"), std::string::npos) << r.err;
  EXPECT_NE(r.err.find("beam"), std::string::npos) << r.err;
  r = run_skerry("bands " + a + " --out " + out.string(), dir_);
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("at least two images"), std::string::npos) << r.err;
  r = run_skerry("bands " + a + " " + nobeam + " --detect.mode both --out " + out.string(), dir_);
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("detect.mode = both breaks 'band or combined'"), std::string::npos) << r.err;
  r = run_skerry("bands " + a + " " + same + " --bands.freq_mhz 1400,1400,5 --out " + out.string(), dir_);
  EXPECT_EQ(r.code, 2);
  EXPECT_FALSE(fs::exists(out / "a.spectra.csv"));
}

// ---- combined detection (detect.mode combined) --------------------------------------

// A lattice of point sources 60" apart on the Lanternfish Field, S ~ nu^-0.7;
// every third one bright (SNR 30 in every band), the others faint: SNR 4 in
// every band (the noise of band b is rms0 (nu_b / 1.4 GHz)^-0.7, so S_b / rms_b
// is the same in all bands). Three bands on three grids with nearly equal beams.
struct CombinedField {
  std::vector<GridSpec> grids;
  std::vector<double> rms;
  sim::SkyModel model;
  std::vector<bool> faint;
};
CombinedField combined_field() {
  CombinedField f;
  const double rms0 = 1e-4;
  const double fr[3] = {0.9e9, 1.4e9, 3.0e9};
  const Beam bm[3] = {{10, 9, 20}, {10.4, 8.8, 35}, {9.6, 9.2, 0}};
  const double pix[3] = {3.0, 2.5, 2.0};
  const long np[3] = {230, 276, 345};
  for (int b = 0; b < 3; ++b) {
    f.grids.push_back(band_grid(fr[b], bm[b], pix[b], np[b]));
    f.rms.push_back(rms0 * std::pow(fr[b] / 1.4e9, -0.7));
  }
  const double cosd = std::cos(-38.6 * kDegToRad);
  int k = 0;
  for (int j = -5; j <= 5; ++j)
    for (int i = -5; i <= 5; ++i, ++k) {
      const bool faint = k % 3 != 0;
      sim::SkySource s;
      s.id = k;
      s.ra_deg = 201.25 + (60.0 * i + 0.37 * j) / 3600.0 / cosd;
      s.dec_deg = -38.6 + (60.0 * j - 0.29 * i) / 3600.0;
      s.spectrum = {(faint ? 4.0 : 30.0) * rms0, 1.4e9, -0.7, 0.0};
      f.model.sources.push_back(s);
      f.faint.push_back(faint);
    }
  return f;
}

// Source: truth known by construction (combined_field). (1) Every faint
// source has a true peak SNR of 4 in every band, below the detection threshold
// 5 of extract in each; on the combined image (matched to alpha = -0.7) its SNR
// is sqrt(3) x 4 = 6.9 less the small loss of convolving to the common beam, so
// at least 90 % of the 80 faint sources are found there (expected ~97 %: a
// 5-sigma threshold at 6.7 misses with P(z < -1.7) = 4 %; the binomial sd of the
// fraction is 2 %), against at most half by the default single-band detection
// (expected about a quarter: noise lifts a 4-sigma peak over 5 with P(z > 1)
// = 16 %, plus the peak-pixel bias). (2) No more than 3 detections away from
// every truth source: the combined image's per-pixel false-detection
// probability at 5 is erfc(5/sqrt 2)/2 = 2.9e-7, ~0.02 expected here. (3)
// Positions: offsets from the truth normalised by Condon's (1997, PASP 109, 166;
// REF-CONDON-02) point-source position errors for noise correlated on the beam
// scale, sigma_axis = sqrt(2) sigma_b / rho with rho^2 = (theta_M theta_m /
// 4 theta_N^2) (1 + theta_N^2/theta_M^2)^(3/2) (1 + theta_N^2/theta_m^2)^(3/2)
// SNR^2 (eqs. 21 and 41), theta_N = sqrt(theta_M theta_m) of the common beam,
// sigma_b the Gaussian sigma of the beam along RA or Dec, SNR = the fitted peak
// of D: the robust standard deviation over both axes lies in 0.7..1.4 (N ~ 230:
// 1.166/sqrt(N) = 7.7 % standard error, from memory, plus the approximation of
// Condon's formula) and the median within 3 x 1.2533/sqrt(N) of zero. (4) The
// outputs do not depend on the thread count (byte-identical catalogues).
TEST_F(BandsCommand, CombinedDetectionFindsSourcesBelowEveryBandsThreshold) {
  const CombinedField f = combined_field();
  std::vector<std::string> p;
  for (int b = 0; b < 3; ++b)
    p.push_back(write_band("cf_" + std::to_string(b), f.grids[b], f.model, f.rms[b], 20 + static_cast<std::uint64_t>(b)));
  const std::string imgs = p[0] + " " + p[1] + " " + p[2];
  const fs::path out_c = dir_ / "comb", out_c1 = dir_ / "comb1", out_s = dir_ / "single";
  RunResult r = run_skerry("bands " + imgs + " --detect.mode combined --out " + out_c.string() + " --output.name cf --threads 2", dir_);
  ASSERT_EQ(r.code, 0) << r.err;
  r = run_skerry("bands " + imgs + " --detect.mode combined --out " + out_c1.string() + " --output.name cf --threads 1", dir_);
  ASSERT_EQ(r.code, 0) << r.err;
  r = run_skerry("bands " + imgs + " --out " + out_s.string() + " --output.name cf", dir_);
  ASSERT_EQ(r.code, 0) << r.err;
  EXPECT_TRUE(fs::exists(out_c / "cf.detect" / "cf.detect_snr_map.fits"));

  const Table det = read_table((out_c / "cf.detect" / "cf.detect.components.csv").string());
  const Table single = read_table((out_s / "cf.detect" / "cf.detect.components.csv").string());
  auto nearest = [&](const Table& t, std::size_t row, double& sep_arcsec) {
    long best = -1;
    sep_arcsec = 1e9;
    for (std::size_t k = 0; k < f.model.sources.size(); ++k) {
      const double d = separation_deg(t.at("ra_deg").f64[row], t.at("dec_deg").f64[row], f.model.sources[k].ra_deg,
                                      f.model.sources[k].dec_deg) * 3600.0;
      if (d < sep_arcsec) {
        sep_arcsec = d;
        best = static_cast<long>(k);
      }
    }
    return best;
  };
  auto faint_found = [&](const Table& t, long& spurious) {
    std::vector<char> hit(f.model.sources.size(), 0);
    spurious = 0;
    for (std::size_t i = 0; i < t.rows(); ++i) {
      double sep;
      const long k = nearest(t, i, sep);
      if (sep < 5.0) hit[static_cast<std::size_t>(k)] = 1;
      else ++spurious;
    }
    long n = 0;
    for (std::size_t k = 0; k < hit.size(); ++k) n += hit[k] && f.faint[k];
    return n;
  };
  long n_faint = 0;
  for (bool b : f.faint) n_faint += b;
  long spur_c = 0, spur_s = 0;
  const long found_c = faint_found(det, spur_c), found_s = faint_found(single, spur_s);
  std::printf("faint sources (%ld): combined found %ld (%ld spurious), single band found %ld (%ld spurious)\n", n_faint,
              found_c, spur_c, found_s, spur_s);
  EXPECT_GE(found_c, (9 * n_faint) / 10);
  EXPECT_LE(found_s, n_faint / 2);
  EXPECT_LE(spur_c, 3);

  // (3) positions against Condon's errors at the common beam.
  const SkyImage snr = read_sky_image((out_c / "cf.detect" / "cf.detect_snr_map.fits").string(), [] {
    ImageReadOptions o;
    o.accept_any_bunit = true;
    return o;
  }());
  const Beam cb = snr.beam;
  const double tM = cb.maj_arcsec, tm = cb.min_arcsec, tN2 = tM * tm;
  const Eigen::Matrix2d C = ellipse_to_cov(to_ellipse(cb));  // (east, north) arcsec^2
  std::vector<double> z;
  for (std::size_t i = 0; i < det.rows(); ++i) {
    double sep;
    const long k = nearest(det, i, sep);
    if (sep > 5.0) continue;
    const double sn = det.at("s_peak_jy_per_beam").f64[i];  // D's units: rms 1
    const double rho2 = (tM * tm / (4.0 * tN2)) * std::pow(1.0 + tN2 / (tM * tM), 1.5) *
                        std::pow(1.0 + tN2 / (tm * tm), 1.5) * sn * sn;
    const double se = std::sqrt(2.0 * C(0, 0) / rho2), sno = std::sqrt(2.0 * C(1, 1) / rho2);
    const auto& s = f.model.sources[static_cast<std::size_t>(k)];
    const double de = (det.at("ra_deg").f64[i] - s.ra_deg) * 3600.0 * std::cos(s.dec_deg * kDegToRad);
    const double dn = (det.at("dec_deg").f64[i] - s.dec_deg) * 3600.0;
    z.push_back(de / se);
    z.push_back(dn / sno);
  }
  ASSERT_GE(z.size(), 150u);
  std::vector<double> ze, zn;
  for (std::size_t i = 0; i < z.size(); i += 2) {
    ze.push_back(z[i]);
    zn.push_back(z[i + 1]);
  }
  std::printf("median east %.3f north %.3f\n", testing::median(ze), testing::median(zn));
  const double rs = testing::robust_std(z), md = testing::median(z);
  std::printf("combined positions: %zu offsets, robust std %.3f median %.3f (Condon units)\n", z.size(), rs, md);
  EXPECT_GT(rs, 0.7);
  EXPECT_LT(rs, 1.4);
  EXPECT_LT(std::abs(md), 3.0 * 1.2533 / std::sqrt(static_cast<double>(z.size())));

  // (4) thread-count independence.
  auto bytes = [](const fs::path& path) {
    std::ifstream in(path, std::ios::binary);
    std::stringstream ss;
    ss << in.rdbuf();
    return ss.str();
  };
  for (const char* name : {"cf.spectra.csv", "cf.forced.csv", "cf.detect/cf.detect_snr_map.fits", "cf.detect/cf.detect.components.csv"})
    EXPECT_EQ(bytes(out_c / name), bytes(out_c1 / name)) << name;
}

// Source: the forced fit's definition (forced.h): forced.max_shift_arcsec = 0 is
// the fixed-position fit, so the catalogues are byte-identical to a run
// without the option; with a shift allowed the spectral catalogue gains the
// per-band shift columns and the forced table the shift and its error.
TEST_F(BandsCommand, ShiftOptionColumnsAndZeroShiftIdentity) {
  const CombinedField f = combined_field();
  std::vector<std::string> p;
  for (int b = 0; b < 2; ++b)
    p.push_back(write_band("sh_" + std::to_string(b), f.grids[b], f.model, f.rms[b], 40 + static_cast<std::uint64_t>(b)));
  const std::string base = "bands " + p[0] + " " + p[1] + " --maps.enabled false --output.formats csv --output.name sh";
  ASSERT_EQ(run_skerry(base + " --out " + (dir_ / "a").string(), dir_).code, 0);
  ASSERT_EQ(run_skerry(base + " --forced.max_shift_arcsec 0 --out " + (dir_ / "b").string(), dir_).code, 0);
  const RunResult r = run_skerry(base + " --forced.max_shift_arcsec 1.5 --out " + (dir_ / "c").string(), dir_);
  ASSERT_EQ(r.code, 0) << r.err;
  auto bytes = [](const fs::path& path) {
    std::ifstream in(path, std::ios::binary);
    std::stringstream ss;
    ss << in.rdbuf();
    return ss.str();
  };
  EXPECT_EQ(bytes(dir_ / "a" / "sh.spectra.csv"), bytes(dir_ / "b" / "sh.spectra.csv"));
  EXPECT_EQ(bytes(dir_ / "a" / "sh.forced.csv"), bytes(dir_ / "b" / "sh.forced.csv"));
  const Table t = read_table((dir_ / "c" / "sh.spectra.csv").string());
  ASSERT_NE(t.find("shift_1400mhz_east_arcsec"), nullptr);
  ASSERT_NE(t.find("shift_900mhz_north_err_arcsec"), nullptr);
  ASSERT_NE(t.find("shift_1400mhz_at_bound"), nullptr);
  const Table fo = read_table((dir_ / "c" / "sh.forced.csv").string());
  const Column& e = fo.at("shift_east_arcsec");
  const Column& ee = fo.at("shift_east_err_arcsec");
  long fitted = 0;
  for (std::size_t i = 0; i < fo.rows(); ++i) {
    if (!std::isfinite(ee.f64[i])) continue;
    ++fitted;
    EXPECT_LE(std::abs(e.f64[i]), 1.5 * std::sqrt(2.0) + 1e-9);  // within the box
  }
  EXPECT_GT(fitted, 20);
  const RunResult bad = run_skerry(base + " --forced.max_shift_arcsec -1 --out " + (dir_ / "d").string(), dir_);
  EXPECT_EQ(bad.code, 2);
  EXPECT_NE(bad.err.find("forced.max_shift_arcsec"), std::string::npos) << bad.err;
}

}  // namespace
}  // namespace skerry
