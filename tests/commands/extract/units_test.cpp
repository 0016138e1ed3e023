// End to end through the command line: an image in K (brightness temperature)
// and the same image in Jy/pixel give the catalogue of the equivalent Jy/beam
// image. The conversion factors were computed independently with astropy 5.2.1
// (astropy.units brightness_temperature for K, REF-UNIT-04; the beam area in
// pixels pi maj min / (4 ln 2) / pixel^2 with astropy.units for Jy/pixel,
// REF-UNIT-06, REF-GAUSS-03), not with skerry's own code.
#include <gtest/gtest.h>

#include <cmath>
#include <string>
#include <vector>

#include "extract_helpers.h"

namespace skerry::test {
namespace {

// Beam 6" x 5" at PA 20 deg, 2" pixels, 1.4 GHz (lanternfish_grid).
constexpr double kJyPerBeamPerKelvin = 4.811310138197378e-05;  // astropy.units brightness_temperature
constexpr double kBeamPixels = 8.498175265925987;              // astropy.units: Omega_beam / (2")^2

std::string run_record(const std::string& p) { return slurp(p); }

// The K and Jy/pixel images hold the Jy/beam image's float32 values divided by
// the factor and rounded to float32 again; read back they are multiplied in
// float32: each pixel differs from the Jy/beam image by at most ~3 float32
// roundings (rel 2^-24 each, ~2e-7). The fit is a smooth function of the pixels,
// so the flux densities must agree to well within rel 1e-5 (common practice for
// float32 data: 50x the per-pixel rounding), and far inside their 1-sigma errors.
TEST(ExtractUnits, KelvinAndJyPerPixelImagesGiveTheJyPerBeamCatalogue) {
  TempDir tmp("units");
  const Beam beam{6.0, 5.0, 20.0};
  const std::string jyb = tmp / "field_jyb.fits";
  const auto truth = write_point_field(jyb, 160, 2.0, beam, 1e-4, 40, 5.0, 10, 11,
                                       [](std::size_t i, auto&) { return 15.0 + 10.0 * static_cast<double>(i); });
  ASSERT_GE(truth.size(), 9u);
  const SkyImage im = read_sky_image(jyb);
  const ImageF k_pixels = im.pixels / static_cast<float>(kJyPerBeamPerKelvin);
  const ImageF pix_pixels = im.pixels / static_cast<float>(kBeamPixels);
  const std::string k = tmp / "field_k.fits", jypix = tmp / "field_jypix.fits";
  write_fits_image(k, k_pixels, im, "K");
  write_fits_image(jypix, pix_pixels, im, "Jy/pixel");

  auto extract = [&](const std::string& img, const std::string& out) {
    const RunResult r = run_skerry({"extract", img, "--out", tmp / out, "--threads", "1", "--output.formats", "csv"},
                                   tmp.path());
    EXPECT_EQ(r.code, 0) << r.err;
    return read_table(tmp / (out + "/" + fs::path(img).stem().string() + ".components.csv"));
  };
  const Table ref = extract(jyb, "jyb");
  ASSERT_GE(ref.rows(), truth.size());
  for (const auto& [img, out] : {std::pair<std::string, std::string>{k, "k"}, {jypix, "jypix"}}) {
    SCOPED_TRACE(out);
    const Table t = extract(img, out);
    ASSERT_EQ(t.rows(), ref.rows());
    for (const char* col : {"s_int_jy", "s_peak_jy_per_beam", "rms_jy_per_beam"}) {
      const auto& a = ref.at(col).f64;
      const auto& b = t.at(col).f64;
      for (std::size_t i = 0; i < a.size(); ++i) EXPECT_NEAR(b[i], a[i], 1e-5 * std::abs(a[i])) << col << " row " << i;
    }
    const auto& err = ref.at("s_int_err_jy").f64;
    for (std::size_t i = 0; i < err.size(); ++i)
      EXPECT_LT(std::abs(t.at("s_int_jy").f64[i] - ref.at("s_int_jy").f64[i]), 1e-3 * err[i]) << "row " << i;
  }
  // The run records say how the values were converted.
  const std::string rk = run_record(tmp / "k/field_k.run.json");
  EXPECT_NE(rk.find("\"image_bunit\": \"K\""), std::string::npos);
  EXPECT_NE(rk.find("Rayleigh-Jeans"), std::string::npos);
  EXPECT_NE(rk.find("\"beam_origin\": \"keywords\""), std::string::npos);
  const std::string rp = run_record(tmp / "jypix/field_jypix.run.json");
  EXPECT_NE(rp.find("pixels per beam at the image centre"), std::string::npos);
  const std::string rj = run_record(tmp / "jyb/field_jyb.run.json");
  EXPECT_NE(rj.find("\"image_bunit_conversion\": \"Jy/beam: as stored\""), std::string::npos);
}

// IMAGE[HDU], the extended file name of the FITS world (CFITSIO's syntax; [0]
// is the primary HDU, as astropy counts): the image in an extension named SKY
// behind an empty primary HDU (written by astropy) gives the catalogue of the
// plain file whether it is named by number, by EXTNAME or with --image.hdu.
TEST(ExtractFiles, HduInBracketsAsTheFitsWorldWritesIt) {
  TempDir tmp("hdu");
  const Beam beam{6.0, 5.0, 20.0};
  const std::string plain = tmp / "plain.fits", ext = tmp / "ext.fits";
  write_point_field(plain, 120, 2.0, beam, 1e-4, 30, 5.0, 8, 12, [](std::size_t i, auto&) { return 20.0 + 5.0 * static_cast<double>(i); });
  const RunResult py = run_args({python3(), "-c",
                            "import sys\nfrom astropy.io import fits\n"
                            "h = fits.open(sys.argv[1])[0]\n"
                            "fits.HDUList([fits.PrimaryHDU(), fits.ImageHDU(h.data, h.header, name='SKY')]).writeto(sys.argv[2])\n",
                            plain, ext},
                           tmp.path());
  ASSERT_EQ(py.code, 0) << py.err;
  auto rows = [&](const std::vector<std::string>& image_args, const std::string& out) {
    std::vector<std::string> a{"extract"};
    a.insert(a.end(), image_args.begin(), image_args.end());
    for (const std::string& x : std::vector<std::string>{"--out", tmp / out, "--threads", "1", "--output.formats", "csv"}) a.push_back(x);
    const RunResult r = run_skerry(a, tmp.path());
    EXPECT_EQ(r.code, 0) << r.err;
    return slurp(fs::path(tmp / out) / (fs::path(image_args[0].substr(0, image_args[0].find('['))).stem().string() + ".components.csv"));
  };
  const std::string ref = rows({plain}, "p");
  ASSERT_GT(ref.size(), 200u);
  EXPECT_EQ(rows({ext + "[1]"}, "n"), ref);
  EXPECT_EQ(rows({ext + "[SKY]"}, "s"), ref);
  EXPECT_EQ(rows({ext, "--image.hdu", "2"}, "h"), ref);
  // [0] is the empty primary HDU; both forms at once are refused; a missing file is named.
  RunResult r = run_skerry({"extract", ext + "[0]", "--out", tmp / "z"}, tmp.path());
  EXPECT_EQ(r.code, 3) << r.err;
  r = run_skerry({"extract", ext + "[1]", "--image.hdu", "2", "--out", tmp / "z"}, tmp.path());
  EXPECT_EQ(r.code, 2) << r.err;
  EXPECT_NE(r.err.find("given twice"), std::string::npos) << r.err;
  r = run_skerry({"extract", tmp / "nothere.fits" + "[1]", "--out", tmp / "z"}, tmp.path());
  EXPECT_EQ(r.code, 3) << r.err;
  EXPECT_NE(r.err.find("nothere.fits"), std::string::npos) << r.err;
}

}  // namespace
}  // namespace skerry::test
