// The golden images (tests/data/golden, see README-extract.md there: sources
// defined on the sky and rendered pixel by pixel through astropy's WCS,
// independently of this project): every truth position must land on the pixel
// where the image peaks, and the local north angle and pixel area must agree with
// the geometry derived here from the header cards and the closed-form
// projections of Calabretta & Greisen 2002 (Paper II; io_test_util.h). The
// Galactic image's truth follows Murray 1989's FK5 J2000 Galactic axes converted
// to ICRS with the FK5 -> ICRS rotation (as the pipeline does, see wcs.cpp); ERFA's
// eraG2icrs would put its sources ~0.012 pixel (25 mas) away.
#include <erfa.h>
#include <fitsio.h>
#include <gtest/gtest.h>

#include <Eigen/Dense>
#include <cmath>
#include <fstream>
#include <sstream>
#include <string>
#include <vector>

#include "io/fits_image.h"
#include "io_test_util.h"
#include "skerry/sky.h"

namespace skerry {
namespace {

using namespace iotest;

struct Truth {
  double ra, dec, s_peak, maj, min, pa;
};

std::vector<Truth> read_truth(const std::string& path) {
  std::ifstream in(path);
  std::string line;
  std::vector<Truth> out;
  std::getline(in, line);  // '# what the image is'
  std::getline(in, line);  // column names
  while (std::getline(in, line)) {
    if (line.empty()) continue;
    std::stringstream ss(line);
    std::vector<double> v;
    std::string cell;
    while (std::getline(ss, cell, ',')) v.push_back(std::stod(cell));
    out.push_back({v.at(0), v.at(1), v.at(3), v.at(4), v.at(5), v.at(6)});
  }
  return out;
}

/// Header geometry read with CFITSIO directly (not through the code under test).
struct HeaderGeometry {
  double crpix1, crpix2, crval1, crval2, cd[2][2];
  std::string ctype1;
};

HeaderGeometry read_geometry(const std::string& path) {
  fitsfile* f = nullptr;
  int st = 0;
  HeaderGeometry g{};
  fits_open_file(&f, path.c_str(), READONLY, &st);
  fits_read_key(f, TDOUBLE, "CRPIX1", &g.crpix1, nullptr, &st);
  fits_read_key(f, TDOUBLE, "CRPIX2", &g.crpix2, nullptr, &st);
  fits_read_key(f, TDOUBLE, "CRVAL1", &g.crval1, nullptr, &st);
  fits_read_key(f, TDOUBLE, "CRVAL2", &g.crval2, nullptr, &st);
  fits_read_key(f, TDOUBLE, "CD1_1", &g.cd[0][0], nullptr, &st);
  fits_read_key(f, TDOUBLE, "CD1_2", &g.cd[0][1], nullptr, &st);
  fits_read_key(f, TDOUBLE, "CD2_1", &g.cd[1][0], nullptr, &st);
  fits_read_key(f, TDOUBLE, "CD2_2", &g.cd[1][1], nullptr, &st);
  char ctype[FLEN_VALUE];
  fits_read_key(f, TSTRING, "CTYPE1", ctype, nullptr, &st);
  g.ctype1 = ctype;
  fits_close_file(f, &st);
  EXPECT_EQ(st, 0) << path;
  return g;
}

/// Peak of a sampled Gaussian: ln(value) is exactly quadratic in (x, y), so a
/// least-squares quadratic through the 3 x 3 pixels around the brightest pixel
/// gives the sub-pixel peak and its value (common practice).
bool gaussian_peak(const ImageF& im, long x0, long y0, double& px, double& py, double& peak) {
  if (x0 < 1 || y0 < 1 || x0 + 1 >= im.cols() || y0 + 1 >= im.rows()) return false;
  Eigen::Matrix<double, 9, 6> A;
  Eigen::Matrix<double, 9, 1> b;
  int k = 0;
  for (int dy = -1; dy <= 1; ++dy)
    for (int dx = -1; dx <= 1; ++dx, ++k) {
      const double v = im(y0 + dy, x0 + dx);
      if (!(v > 0)) return false;
      A.row(k) << 1, dx, dy, dx * dx, dx * dy, dy * dy;
      b(k) = std::log(v);
    }
  const Eigen::Matrix<double, 6, 1> c = A.colPivHouseholderQr().solve(b);
  Eigen::Matrix2d H;
  H << 2 * c(3), c(4), c(4), 2 * c(5);
  const Eigen::Vector2d d = H.ldlt().solve(-Eigen::Vector2d(c(1), c(2)));
  px = x0 + d(0);
  py = y0 + d(1);
  peak = std::exp(c(0) + c(1) * d(0) + c(2) * d(1) + c(3) * d(0) * d(0) + c(4) * d(0) * d(1) +
                  c(5) * d(1) * d(1));
  return true;
}

struct Golden {
  const char* name;
  Zen proj;
  bool galactic;
  double pos_tol_pix;   // peak vs truth pixel
  double peak_rel_tol;  // peak value vs truth
};

class GoldenImages : public ::testing::TestWithParam<Golden> {};

TEST_P(GoldenImages, TruthLandsOnThePeakAndGeometryAgrees) {
  const Golden& gd = GetParam();
  const std::string dir = std::string(SKERRY_TEST_DATA_DIR) + "/golden/";
  const std::string path = dir + gd.name + ".fits";
  const SkyImage im = read_sky_image(path);
  const auto truth = read_truth(dir + gd.name + ".truth.csv");
  ASSERT_FALSE(truth.empty());
  const HeaderGeometry h = read_geometry(path);
  EXPECT_EQ(im.frame, gd.galactic ? "GALACTIC" : "ICRS");
  EXPECT_EQ(im.freq_hz > 0, true);

  // Reference-free geometry of the header (Paper I linear part + Paper II projection).
  const Linear lin{h.crpix1, h.crpix2, {{h.cd[0][0], h.cd[0][1]}, {h.cd[1][0], h.cd[1][1]}}};
  const Zenithal zen{gd.proj, h.crval1, h.crval2};
  auto sky_closed_form = [&](double x0, double y0, double& ra, double& dec) {
    double u, v, lon, lat;
    lin.p2x(x0 + 1.0, y0 + 1.0, u, v);  // 0-based -> FITS 1-based
    zen.x2s(u, v, lon, lat);
    if (!gd.galactic) {
      ra = lon;
      dec = lat;
      return;
    }
    galactic_to_icrs_reference(lon, lat, ra, dec);  // Murray 1989 pole + eraFk52h
  };
  double ra_ref, dec_ref;
  sky_closed_form(h.crpix1 - 1.0, h.crpix2 - 1.0, ra_ref, dec_ref);
  const double det_cd = h.cd[0][0] * h.cd[1][1] - h.cd[0][1] * h.cd[1][0];
  const double area0 = std::abs(det_cd) * 3600.0 * 3600.0;  // arcsec^2 at the reference point

  for (const Truth& t : truth) {
    double x, y;
    ASSERT_TRUE(im.wcs->sky_to_pix(t.ra, t.dec, x, y));
    // The brightest pixel near the truth position, then its sub-pixel peak.
    long bx = std::lround(x), by = std::lround(y);
    for (long yy = std::lround(y) - 3; yy <= std::lround(y) + 3; ++yy)
      for (long xx = std::lround(x) - 3; xx <= std::lround(x) + 3; ++xx)
        if (xx >= 0 && yy >= 0 && xx < im.pixels.cols() && yy < im.pixels.rows() &&
            im.pixels(yy, xx) > im.pixels(by, bx))
          bx = xx, by = yy;
    double px, py, peak;
    ASSERT_TRUE(gaussian_peak(im.pixels, bx, by, px, py, peak)) << gd.name;
    EXPECT_NEAR(px, x, gd.pos_tol_pix) << gd.name << " source at " << t.ra << ", " << t.dec;
    EXPECT_NEAR(py, y, gd.pos_tol_pix) << gd.name << " source at " << t.ra << ", " << t.dec;
    EXPECT_NEAR(peak / t.s_peak, 1.0, gd.peak_rel_tol) << gd.name;
    // pix -> sky -> pix round trip, and the truth position from its pixel.
    double ra, dec, x2, y2;
    ASSERT_TRUE(im.wcs->pix_to_sky(x, y, ra, dec));
    EXPECT_LT(sep_deg(ra, dec, t.ra, t.dec), 0.01 * kMas);
    ASSERT_TRUE(im.wcs->sky_to_pix(ra, dec, x2, y2));
    EXPECT_NEAR(x2, x, 1e-8);
    EXPECT_NEAR(y2, y, 1e-8);
    // The closed-form projection of the header puts the source on the same pixel.
    double rc, dc;
    sky_closed_form(x, y, rc, dc);
    EXPECT_LT(sep_deg(rc, dc, t.ra, t.dec), 0.01 * kMas) << gd.name;

    // Local geometry at the source.
    auto g = local_geometry(*im.wcs, x, y);
    ASSERT_TRUE(g);
    //  North angle: PA (ERFA eraPas) of the closed-form positions a small step up
    //  and down in y.
    double ru, du, rd, dd;
    sky_closed_form(x, y + 1e-2, ru, du);
    sky_closed_form(x, y - 1e-2, rd, dd);
    const double pa = central_pa_deg(rc, dc, ru, du, rd, dd);
    EXPECT_LT(std::abs(std::remainder(g->plus_y_pa_deg - pa, 360.0)), 1e-5) << gd.name;
    //  Pixel solid angle = plane area x dOmega/dA at angular distance rho from the
    //  reference point (derived here from the projections' radial laws, Paper II
    //  sect. 5.1): SIN r = sin rho -> 1/cos rho; TAN r = tan rho -> cos^3 rho;
    //  ZEA is equal-area -> 1.
    const double rho = sep_deg(t.ra, t.dec, ra_ref, dec_ref) * kD2R;
    double factor = 1.0;
    if (gd.proj == Zen::SIN) factor = 1.0 / std::cos(rho);
    if (gd.proj == Zen::TAN) factor = std::pow(std::cos(rho), 3);
    EXPECT_NEAR(g->pixel_area_arcsec2 / (area0 * factor), 1.0, 1e-6) << gd.name;
    EXPECT_EQ(g->usual_parity, det_cd < 0) << gd.name;
  }

  // At the reference pixel: +y PA from the CD matrix (east and north components of
  // the +y step, Paper I), plus for Galactic axes the PA of Galactic north seen in
  // ICRS (the Galactic -> ICRS reference of points 1e-6 deg up and down in b).
  auto g0 = local_geometry(*im.wcs, h.crpix1 - 1.0, h.crpix2 - 1.0);
  ASSERT_TRUE(g0);
  double expect_pa = std::atan2(h.cd[0][1], h.cd[1][1]) * kR2D;
  if (gd.galactic) {
    double a1, d1, a2, d2, a3, d3;
    galactic_to_icrs_reference(h.crval1, h.crval2, a1, d1);
    galactic_to_icrs_reference(h.crval1, h.crval2 + 1e-6, a2, d2);
    galactic_to_icrs_reference(h.crval1, h.crval2 - 1e-6, a3, d3);
    expect_pa += central_pa_deg(a1, d1, a2, d2, a3, d3);
  }
  EXPECT_LT(std::abs(std::remainder(g0->plus_y_pa_deg - expect_pa, 360.0)), 1e-5) << gd.name;
  EXPECT_NEAR(g0->pixel_area_arcsec2 / area0, 1.0, 1e-9) << gd.name;
}

INSTANTIATE_TEST_SUITE_P(
    Golden, GoldenImages,
    ::testing::Values(Golden{"parity_rotated_noiseless", Zen::SIN, false, 1e-4, 1e-5},
                      // noise rms 1e-4 Jy/beam, peaks >= 0.016 (SNR >= 160): a few hundredths of a pixel
                      Golden{"parity_rotated_noisy", Zen::SIN, false, 0.2, 0.05},
                      Golden{"galactic_tan_noiseless", Zen::TAN, true, 1e-4, 1e-5},
                      Golden{"pole_zea_noiseless", Zen::ZEA, false, 1e-4, 1e-5},
                      Golden{"bands_0900MHz_noiseless", Zen::SIN, false, 1e-4, 1e-5},
                      Golden{"bands_1400MHz_noiseless", Zen::SIN, false, 1e-4, 1e-5},
                      Golden{"bands_3000MHz_noiseless", Zen::SIN, false, 1e-4, 1e-5}),
    [](const ::testing::TestParamInfo<Golden>& p) { return std::string(p.param.name); });

TEST(GoldenImages, HeaderFacts) {
  // Facts stated with the golden images (README-extract.md in tests/data/golden).
  const std::string dir = std::string(SKERRY_TEST_DATA_DIR) + "/golden/";
  const SkyImage par = read_sky_image(dir + "parity_rotated_noiseless.fits");
  auto g = local_geometry(*par.wcs, 99.5, 79.5);
  ASSERT_TRUE(g);
  EXPECT_FALSE(g->usual_parity);                    // east to the right
  EXPECT_NEAR(g->pixel_area_arcsec2, 3.0, 1e-6);    // 1.5 x 2.0 arcsec pixels
  EXPECT_NEAR(std::remainder(g->plus_y_pa_deg, 360.0), -20.0, 1e-6);  // rotated 20 deg
  EXPECT_NEAR(par.beam.maj_arcsec, 12.0, 1e-9);
  EXPECT_NEAR(par.beam.min_arcsec, 6.0, 1e-9);
  EXPECT_NEAR(par.beam.pa_deg, 30.0, 1e-9);
  EXPECT_EQ(par.freq_hz, 1.4e9);  // RESTFRQ
  const SkyImage b9 = read_sky_image(dir + "bands_0900MHz_noiseless.fits");
  EXPECT_EQ(b9.freq_hz, 9e8);
  EXPECT_NEAR(b9.beam.maj_arcsec, 15.0, 1e-9);
  const SkyImage gal = read_sky_image(dir + "galactic_tan_noiseless.fits");
  EXPECT_EQ(gal.frame, "GALACTIC");
  EXPECT_NEAR(gal.beam.pa_deg, 75.0, 1e-12);  // as in the header: east of Galactic north
}

}  // namespace
}  // namespace skerry
