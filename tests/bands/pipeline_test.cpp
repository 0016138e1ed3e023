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
  const int rc = std::system(cmd.c_str());
  std::ifstream in(errf);
  std::stringstream ss;
  ss << in.rdbuf();
  return {WIFEXITED(rc) ? WEXITSTATUS(rc) : -1, ss.str()};
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

// Source: end-to-end check against the simulator's truth (CONVENTIONS.md
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
  for (const char* f : {"lf.spectra.csv", "lf.spectra.fits", "lf.spectra.vot", "lf.forced.csv", "lf.alpha.fits",
                        "lf.alpha_err.fits", "lf.run.json"})
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
  const SkyImage am = read_sky_image((out / "lf.alpha.fits").string(), [] {
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
  r = run_skerry("bands " + a + " " + same + " --bands.freq_mhz 1400,1400,5 --out " + out.string(), dir_);
  EXPECT_EQ(r.code, 2);
  EXPECT_FALSE(fs::exists(out / "a.spectra.csv"));
}

}  // namespace
}  // namespace skerry
