// `skerry stack` end to end, against injected truth: N = 400 point sources of
// flux density S0 = 0.4 rms (each undetected) injected into beam-correlated
// Gaussian noise of known rms (tests/support/correlated_noise.h) in two images of
// the Lanternfish Field on different grids and beams. Checked:
//  - the stacked flux density equals S0 within its stated error (injected truth);
//  - the stated error is the expected one, sqrt(pi/2) sqrt(4/3) rms / sqrt(N):
//    sqrt(pi/2) is the efficiency of the median of normal samples (asymptotic
//    variance of the sample median pi sigma^2 / (2 N); common practice) and
//    sqrt(4/3) the error of a fixed-beam amplitude fitted in beam-correlated
//    noise of unit rms (forced.h, Condon 1997, REF-CONDON-02, applied to a fixed
//    shape); the stack's annulus rms is sqrt(pi/2) rms / sqrt(N);
//  - stacking at empty positions gives a flux density consistent with zero;
//  - the counts n_given = n_no_position + n_off_image + n_stacked, and positions
//    outside the second image are counted off it;
//  - the stacked FITS image has a valid celestial WCS read back with astropy
//    (Debian's python3-astropy): TAN, reference (0, 0) at the centre pixel, the
//    image's pixel size (FITS WCS Papers I-II, REF-FITS-04);
//  - the same bytes for --threads 1 and 2, and from CSV, FITS table and VOTable
//    catalogues whose position columns have other names;
//  - bad inputs: one line on stderr, the documented exit code, nothing written.
#include <gtest/gtest.h>

#include <cmath>
#include <iostream>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "correlated_noise.h"
#include "io/fits_image.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "skerry/table.h"
#include "skerry_test_support.h"

using namespace skerry;
using namespace skerry::test;

namespace {

constexpr int kN = 400;

struct Field {
  std::string dir;
  std::string image_a, image_b;          // FITS images
  std::string sources_csv, empty_csv;    // positions: injected / empty sky
  double rms_a = 20e-6, rms_b = 30e-6;   // Jy/beam
  double s0_a = 0.4 * 20e-6, s0_b = 0.4 * 30e-6;  // Jy (point sources: peak = flux density)
  long inside_b = 0;                     // injected positions on image B's pixels
};

GridSpec grid(long n, double pix_arcsec, double beam_arcsec, double freq_hz) {
  GridSpec g;
  g.nx = g.ny = n;
  g.projection = "TAN";
  g.crval1_deg = 201.25;  // the Lanternfish Field
  g.crval2_deg = -38.6;
  g.crpix1 = 0.5 * (n + 1);
  g.crpix2 = 0.5 * (n + 1);
  g.cdelt1_deg = -pix_arcsec / 3600.0;
  g.cdelt2_deg = pix_arcsec / 3600.0;
  g.beam = Beam{beam_arcsec, beam_arcsec, 0.0};
  g.freq_hz = freq_hz;
  return g;
}

/// A circular Gaussian of peak `peak` [Jy/beam] at 0-based (x0, y0), within 5 FWHM.
void inject(ImageF& img, double x0, double y0, double fwhm_pix, double peak) {
  const double s2 = std::pow(fwhm_pix / (2.0 * std::sqrt(2.0 * std::log(2.0))), 2);
  const long r = static_cast<long>(std::ceil(5 * fwhm_pix));
  for (long y = std::max(0L, static_cast<long>(y0) - r); y <= std::min<long>(img.rows() - 1, static_cast<long>(y0) + r); ++y)
    for (long x = std::max(0L, static_cast<long>(x0) - r); x <= std::min<long>(img.cols() - 1, static_cast<long>(x0) + r); ++x)
      img(y, x) += static_cast<float>(peak * std::exp(-0.5 * ((x - x0) * (x - x0) + (y - y0) * (y - y0)) / s2));
}

Table positions_table(const std::vector<double>& ra, const std::vector<double>& dec, const std::string& ra_name,
                      const std::string& dec_name, bool ucd) {
  Table t;
  t.name = "positions";
  std::vector<std::int64_t> id(ra.size());
  for (std::size_t i = 0; i < id.size(); ++i) id[i] = static_cast<std::int64_t>(i) + 1;
  t.add_i64("id", "", "meta.id", "row", id);
  t.add_f64(ra_name, "deg", ucd ? "pos.eq.ra;meta.main" : "", "Right ascension (ICRS)", ra);
  t.add_f64(dec_name, "deg", ucd ? "pos.eq.dec;meta.main" : "", "Declination (ICRS)", dec);
  return t;
}

/// Removes the shared field's folder after the last test of the program.
class FieldCleanup : public ::testing::Environment {
 public:
  static std::string& dir() {
    static std::string d;
    return d;
  }
  void TearDown() override {
    if (!dir().empty()) fs::remove_all(dir());
  }
};
const auto* const kCleanup = ::testing::AddGlobalTestEnvironment(new FieldCleanup);

const Field& field() {
  static Field* f = [] {
    auto* F = new Field;
    F->dir = (fs::temp_directory_path() / ("skerry_stack_test_" + std::to_string(::getpid()))).string();
    fs::remove_all(F->dir);
    fs::create_directories(F->dir);
    FieldCleanup::dir() = F->dir;
    // Image A: 700 x 700 pixels of 1.5", beam 6" (4 pixels); image B: 480 x 480
    // of 2", beam 9", smaller on the sky so that some positions fall outside it.
    const GridSpec ga = grid(700, 1.5, 6.0, 1.4e9), gb = grid(480, 2.0, 9.0, 0.9e9);
    SkyImage a = make_sky_image(ga, skerry::testing::correlated_noise(700, 700, 4.0, F->rms_a, 11), "Lanternfish");
    SkyImage b = make_sky_image(gb, skerry::testing::correlated_noise(480, 480, 4.5, F->rms_b, 12), "Lanternfish");
    std::mt19937_64 g(2026);
    std::uniform_real_distribution<double> u(20.0, 680.0);
    std::vector<double> ra, dec, xs, ys;
    for (int i = 0; i < kN; ++i) {
      const double x = u(g), y = u(g);
      double r, d;
      a.wcs->pix_to_sky(x, y, r, d);
      ra.push_back(r);
      dec.push_back(d);
      xs.push_back(x);
      ys.push_back(y);
      inject(a.pixels, x, y, 4.0, F->s0_a);
      double xb, yb;
      if (b.wcs->sky_to_pix(r, d, xb, yb)) {
        inject(b.pixels, xb, yb, 4.5, F->s0_b);
        if (xb >= 0.0 && yb >= 0.0 && xb <= 479.0 && yb <= 479.0) ++F->inside_b;
      }
    }
    // Empty positions: at least 3 beams (12 pixels) from every injected source.
    std::vector<double> era, edec;
    while (static_cast<int>(era.size()) < kN) {
      const double x = u(g), y = u(g);
      bool clear = true;
      for (int i = 0; i < kN && clear; ++i) clear = std::hypot(x - xs[i], y - ys[i]) >= 12.0;
      if (!clear) continue;
      double r, d;
      a.wcs->pix_to_sky(x, y, r, d);
      era.push_back(r);
      edec.push_back(d);
    }
    F->image_a = F->dir + "/lanternfish_1400.fits";
    F->image_b = F->dir + "/lanternfish_900.fits";
    write_fits_image(F->image_a, a.pixels, a);
    write_fits_image(F->image_b, b.pixels, b);
    F->sources_csv = F->dir + "/injected.csv";
    F->empty_csv = F->dir + "/empty.csv";
    write_table(positions_table(ra, dec, "ra_deg", "dec_deg", true), F->sources_csv);
    write_table(positions_table(era, edec, "ra_deg", "dec_deg", true), F->empty_csv);
    // The same positions with other column names, no UCDs (found by name).
    write_table(positions_table(ra, dec, "RAJ2000", "DEJ2000", false), F->dir + "/injected.fits");
    write_table(positions_table(ra, dec, "RA", "DEC", false), F->dir + "/injected.vot");
    return F;
  }();
  return *f;
}

double cell(const Table& t, const std::string& col, std::size_t row) {
  const Column* c = t.find(col);
  if (!c) ADD_FAILURE() << "no column " << col;
  if (!c) return NAN;
  return c->type == ColumnType::Int64 ? static_cast<double>(c->i64[row]) : c->f64[row];
}

std::size_t lines(const std::string& s) {
  std::size_t n = 0;
  for (char ch : s) n += ch == '\n';
  return n;
}

}  // namespace

TEST(StackCommand, InjectedFluxDensityRecoveredWithinItsError) {
  const Field& F = field();
  TempDir out("stack-injected");
  const RunResult r = run_skerry({"stack", F.image_a, F.image_b, "--catalogue", F.sources_csv, "--out", out.path()});
  ASSERT_EQ(r.code, 0) << r.err;
  // One summary line per image (stdout, as the other commands print theirs).
  EXPECT_EQ(lines(r.out), 2u) << r.out;
  for (const char* f : {"injected.stack.csv", "injected.stack.fits", "injected.stack.vot", "injected.stack_1.fits",
                        "injected.stack_2.fits", "injected.run.json"})
    EXPECT_TRUE(fs::exists(out / f)) << f;
  const Table t = read_table(out / "injected.stack.csv");
  ASSERT_EQ(t.rows(), 2u);
  const double rms[2] = {F.rms_a, F.rms_b}, s0[2] = {F.s0_a, F.s0_b};
  for (std::size_t k = 0; k < 2; ++k) {
    SCOPED_TRACE("image " + std::to_string(k + 1));
    const double n = cell(t, "n_stacked", k), s = cell(t, "s_stack_jy", k), e = cell(t, "s_stack_err_jy", k);
    EXPECT_EQ(cell(t, "n_given", k), kN);
    EXPECT_EQ(cell(t, "n_no_position", k), 0);
    EXPECT_EQ(cell(t, "n_given", k), cell(t, "n_no_position", k) + cell(t, "n_off_image", k) + n);
    // Injected truth: S0 within 3 stated errors (and the stack is a detection).
    EXPECT_LT(std::abs(s - s0[k]), 3.0 * e) << "S = " << s << ", S0 = " << s0[k] << ", err = " << e;
    EXPECT_GT(s / e, 3.0);
    // The error: sqrt(pi/2) (median, common practice) x sqrt(4/3) (fixed beam in
    // beam-correlated noise, forced.h / REF-CONDON-02) x rms / sqrt(N), within 30 %
    // (the annulus holds a few tens of independent beams).
    const double expected_err = std::sqrt(M_PI / 2.0) * std::sqrt(4.0 / 3.0) * rms[k] / std::sqrt(n);
    std::cout << "image " << k + 1 << ": n " << n << ", S " << s << " Jy, S0 " << s0[k] << " Jy, err " << e
              << " Jy, expected err " << expected_err << " Jy, stack rms " << cell(t, "rms_stack_jy_per_beam", k)
              << " Jy/beam\n";
    EXPECT_NEAR(e / expected_err, 1.0, 0.3) << "err " << e << " expected " << expected_err;
    const double expected_rms = std::sqrt(M_PI / 2.0) * rms[k] / std::sqrt(n);
    EXPECT_NEAR(cell(t, "rms_stack_jy_per_beam", k) / expected_rms, 1.0, 0.3);
    // The rms map of extract's noise stage at the positions: the injected rms (5 %).
    EXPECT_NEAR(cell(t, "rms_map_median_jy_per_beam", k) / rms[k], 1.0, 0.05);
  }
  // Image A holds every position; B (smaller on the sky) only some (positions on
  // its last pixel row/column may count either way: 2 % slack).
  EXPECT_EQ(cell(t, "n_stacked", 0), kN);
  EXPECT_GT(cell(t, "n_off_image", 1), 0);
  EXPECT_NEAR(cell(t, "n_stacked", 1), static_cast<double>(F.inside_b), 0.02 * kN);
  EXPECT_DOUBLE_EQ(cell(t, "freq_mhz", 0), 1400.0);
  EXPECT_DOUBLE_EQ(cell(t, "freq_mhz", 1), 900.0);
  EXPECT_NEAR(cell(t, "annulus_inner_arcsec", 0), 1.5 * 6.0, 1e-6);
  EXPECT_NEAR(cell(t, "annulus_outer_arcsec", 0), 12 * 1.5, 1e-6);  // half size 3 FWHM = 12 pixels

  // The stacked image read back with astropy.
  const std::string script = out / "wcs_check.py";
  write_file(script, R"PY(
import sys, numpy as np
from astropy.io import fits
from astropy.wcs import WCS
from astropy.wcs.utils import proj_plane_pixel_scales
h = fits.open(sys.argv[1])[0]
w = WCS(h.header)
assert w.has_celestial and w.naxis == 2, "no celestial WCS"
ra, dec = w.wcs_pix2world([[12.0, 12.0]], 0)[0]
sc = proj_plane_pixel_scales(w) * 3600.0
print(h.data.shape[0], h.data.shape[1], w.wcs.ctype[0], w.wcs.ctype[1],
      "%.9f" % (((ra + 180.0) % 360.0) - 180.0), "%.9f" % dec, "%.6f" % sc[0], "%.6f" % sc[1],
      h.header["BUNIT"], "%.6e" % h.data[12, 12], "%.6f" % (h.header["BMAJ"] * 3600.0))
)PY");
  const RunResult py = run({python3(), script, out / "injected.stack_1.fits"});
  ASSERT_EQ(py.code, 0) << py.err;
  std::istringstream in(py.out);
  long ny = 0, nx = 0;
  std::string c1, c2, bunit;
  double ra0, dec0, sx, sy, centre, bmaj;
  in >> ny >> nx >> c1 >> c2 >> ra0 >> dec0 >> sx >> sy >> bunit >> centre >> bmaj;
  EXPECT_EQ(ny, 25);
  EXPECT_EQ(nx, 25);
  EXPECT_EQ(c1, "RA---TAN");
  EXPECT_EQ(c2, "DEC--TAN");
  EXPECT_NEAR(ra0, 0.0, 1e-9);
  EXPECT_NEAR(dec0, 0.0, 1e-9);
  EXPECT_NEAR(sx, 1.5, 1e-6);
  EXPECT_NEAR(sy, 1.5, 1e-6);
  EXPECT_EQ(bunit, "JY/BEAM");
  EXPECT_NEAR(bmaj, 6.0, 1e-6);
  // The centre pixel of the median stack is the injected peak within a few stack rms.
  EXPECT_LT(std::abs(centre - F.s0_a), 4.0 * cell(t, "rms_stack_jy_per_beam", 0)) << centre;
}

TEST(StackCommand, EmptyPositionsGiveZero) {
  const Field& F = field();
  TempDir out("stack-empty");
  const RunResult r = run_skerry({"stack", F.image_a, "--catalogue", F.empty_csv, "--out", out.path()});
  ASSERT_EQ(r.code, 0) << r.err;
  const Table t = read_table(out / "empty.stack.csv");
  ASSERT_EQ(t.rows(), 1u);
  EXPECT_EQ(cell(t, "n_stacked", 0), kN);
  const double s = cell(t, "s_stack_jy", 0), e = cell(t, "s_stack_err_jy", 0);
  EXPECT_LT(std::abs(s), 3.0 * e) << "S = " << s << " +- " << e;
  std::cout << "empty positions: S " << s << " +- " << e << " Jy\n";
  EXPECT_GT(e, 0.0);
}

TEST(StackCommand, SameResultForThreadsAndCatalogueFormats) {
  const Field& F = field();
  TempDir out("stack-threads");
  const std::string fits_cat = F.dir + "/injected.fits", vot_cat = F.dir + "/injected.vot";
  const RunResult r1 = run_skerry({"stack", F.image_a, "--catalogue", F.sources_csv, "--out", out / "t1",
                                   "--threads", "1", "--output.formats", "csv"});
  const RunResult r2 = run_skerry({"stack", F.image_a, "--catalogue", fits_cat, "--out", out / "t2", "--threads", "2",
                                   "--output.name", "injected", "--output.formats", "csv"});
  const RunResult r3 = run_skerry({"stack", F.image_a, "--catalogue", vot_cat, "--out", out / "t3", "--threads", "2",
                                   "--output.name", "injected", "--output.formats", "csv"});
  ASSERT_EQ(r1.code, 0) << r1.err;
  ASSERT_EQ(r2.code, 0) << r2.err;
  ASSERT_EQ(r3.code, 0) << r3.err;
  const std::string img1 = slurp(out / "t1/injected.stack_1.fits");
  ASSERT_FALSE(img1.empty());
  EXPECT_EQ(img1, slurp(out / "t2/injected.stack_1.fits"));
  EXPECT_EQ(img1, slurp(out / "t3/injected.stack_1.fits"));
  // The tables differ only in the catalogue's name and columns (meta); the values agree.
  const Table a = read_table(out / "t1/injected.stack.csv"), b = read_table(out / "t2/injected.stack.csv"),
              c = read_table(out / "t3/injected.stack.csv");
  for (const char* col : {"n_stacked", "s_stack_jy", "s_stack_err_jy", "rms_stack_jy_per_beam", "rms_map_median_jy_per_beam"}) {
    EXPECT_EQ(cell(a, col, 0), cell(b, col, 0)) << col;
    EXPECT_EQ(cell(a, col, 0), cell(c, col, 0)) << col;
  }
}

TEST(StackCommand, BadInputsOneLineExitCodeNothingWritten) {
  const Field& F = field();
  TempDir d("stack-bad");
  struct Case {
    std::string what;
    std::vector<std::string> args;
    int code;
    std::string says;
  };
  write_file(d / "nopos.csv", "id,x,y\n1,10.5,20.5\n2,11.5,21.5\n");
  write_file(d / "far.csv", "ra_deg,dec_deg\n30.0,50.0\n31.0,51.0\n");
  write_file(d / "garbage.fits", "this is not a FITS file at all\n");
  write_file(d / "broken.csv", "ra_deg,dec_deg\n201.25,-38.6\n201.2,not-an-angle\n");
  const std::vector<Case> cases{
      {"no position columns", {"stack", F.image_a, "--catalogue", d / "nopos.csv"}, 3, "nopos.csv: no RA"},
      {"no position on the image", {"stack", F.image_a, "--catalogue", d / "far.csv"}, 8, "none of the 2 positions"},
      {"unreadable catalogue", {"stack", F.image_a, "--catalogue", d / "garbage.fits"}, 3, "garbage.fits"},
      {"missing catalogue", {"stack", F.image_a, "--catalogue", d / "missing.csv"}, 3, "missing.csv"},
      {"bad angle", {"stack", F.image_a, "--catalogue", d / "broken.csv"}, 3, "row 2"},
      {"no catalogue", {"stack", F.image_a}, 2, "--catalogue"},
      {"rms maps per image", {"stack", F.image_a, "--catalogue", F.sources_csv, "--noise.rms_map", "a.fits,b.fits"}, 2,
       "noise.rms_map"},
      {"bad frame", {"stack", F.image_a, "--catalogue", F.sources_csv, "--positions.frame", "fk4"}, 2, "positions.frame"},
  };
  for (const Case& c : cases) {
    SCOPED_TRACE(c.what);
    const std::string o = d / ("out_" + std::to_string(&c - cases.data()));
    std::vector<std::string> args = c.args;
    args.insert(args.end(), {"--out", o});
    const RunResult r = run_skerry(args);
    EXPECT_EQ(r.code, c.code) << r.err;
    EXPECT_EQ(lines(r.err), 1u) << r.err;
    EXPECT_EQ(r.err.rfind("skerry stack: error: ", 0), 0u) << r.err;
    EXPECT_NE(r.err.find(c.says), std::string::npos) << r.err;
    EXPECT_TRUE(list_files(o).empty()) << "outputs written for " << c.what;
  }
}
