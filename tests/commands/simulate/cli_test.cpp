// `skerry simulate` end to end: files, headers, WCS of the truth, determinism
// across thread counts, configuration file, bad options.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

#include "io/fits_image.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "skerry_test_support.h"

namespace fs = std::filesystem;
using namespace skerry;

namespace {

struct CmdResult {
  int code;
  std::string err;
};

CmdResult run(const std::string& args, const fs::path& dir) {
  const fs::path err = dir.parent_path() / (dir.filename().string() + ".stderr");
  const std::string cmd = std::string(SKERRY_BINARY) + " simulate --out " + dir.string() + " " +
                          args + " > /dev/null 2> " + err.string();
  const int status = skerry::test::shell(cmd);
  return {status, skerry::test::slurp(err)};
}

using skerry::test::slurp;

fs::path fresh_dir(const std::string& name) {
  const fs::path d = fs::temp_directory_path() / ("skerry_sim_cli_" + std::to_string(::getpid()) + "_" + name);
  fs::remove_all(d);
  return d;
}

const std::string kSmall =
    "--field.size_pix 256 --bands.freq_mhz 1000,2000 --sources.count 40 "
    "--sources.double_fraction 0.2 --primary_beam.fwhm_deg 0.15 --primary_beam.blank_below 0.1";

TEST(SimulateCli, WritesImagesWithWcsBeamAndTruthThatAgree) {
  const fs::path d = fresh_dir("files");
  const CmdResult r = run(kSmall, d);
  ASSERT_EQ(r.code, 0) << r.err;
  for (const char* f : {"lanternfish_1000MHz.fits", "lanternfish_2000MHz.fits", "lanternfish_1000MHz.pb_map.fits",
                        "lanternfish_2000MHz.pb_map.fits", "lanternfish.truth.csv", "lanternfish_1000MHz.truth.csv",
                        "lanternfish_2000MHz.truth.csv"})
    EXPECT_TRUE(fs::exists(d / f)) << f;
  for (auto [f, mhz] : {std::pair{"lanternfish_1000MHz", 1000.0}, {"lanternfish_2000MHz", 2000.0}}) {
    const SkyImage img = read_sky_image((d / (std::string(f) + ".fits")).string());
    EXPECT_NEAR(img.freq_hz, mhz * 1e6, 1e-3);
    // Beam 6" x 5" at 1400 MHz scaled as 1/frequency (defaults).
    EXPECT_NEAR(img.beam.maj_arcsec, 6.0 * 1400.0 / mhz, 1e-9);
    EXPECT_NEAR(img.beam.min_arcsec, 5.0 * 1400.0 / mhz, 1e-9);
    EXPECT_NEAR(img.beam.pa_deg, 20.0, 1e-9);
    // Pixels scale as 1/frequency over the same field: n = 256 x (nu / 1400 MHz).
    const long n = std::lround(256 * mhz / 1400.0);
    EXPECT_EQ(img.pixels.cols(), n);
    // Truth pixel positions are the image WCS's pixels of the truth sky positions.
    const Table t = read_table((d / (std::string(f) + ".truth.csv")).string());
    ASSERT_GT(t.rows(), 40u);
    std::size_t inside = 0;
    for (std::size_t i = 0; i < t.rows(); ++i) {
      double x, y;
      ASSERT_TRUE(img.wcs->sky_to_pix(t.at("ra_deg").f64[i], t.at("dec_deg").f64[i], x, y));
      EXPECT_NEAR(x + 1.0, t.at("x_pix1").f64[i], 1e-8);
      EXPECT_NEAR(y + 1.0, t.at("y_pix1").f64[i], 1e-8);
      if (x > 0 && y > 0 && x < n - 1 && y < n - 1) ++inside;
    }
    EXPECT_GE(inside, 40u);
    const ImageF pb = read_primary_beam((d / (std::string(f) + ".pb_map.fits")).string(), img);
    EXPECT_NEAR(pb(n / 2, n / 2), 1.0, 1e-3);
  }
  fs::remove_all(d);
}

TEST(SimulateCli, SameBytesForOneAndTwoThreadsAndOtherSeedsDiffer) {
  const fs::path a = fresh_dir("t1"), b = fresh_dir("t2"), c = fresh_dir("seed");
  ASSERT_EQ(run(kSmall + " --threads 1", a).code, 0);
  ASSERT_EQ(run(kSmall + " --threads 2", b).code, 0);
  ASSERT_EQ(run(kSmall + " --seed 5", c).code, 0);
  std::size_t files = 0;
  for (const auto& e : fs::directory_iterator(a)) {
    ++files;
    EXPECT_EQ(slurp(e.path()), slurp(b / e.path().filename())) << e.path().filename();
  }
  EXPECT_EQ(files, 7u);
  EXPECT_NE(slurp(a / "lanternfish_1000MHz.fits"), slurp(c / "lanternfish_1000MHz.fits"));
  EXPECT_NE(slurp(a / "lanternfish.truth.csv"), slurp(c / "lanternfish.truth.csv"));
  fs::remove_all(a);
  fs::remove_all(b);
  fs::remove_all(c);
}

TEST(SimulateCli, DemoConfigurationFileRuns) {
  const fs::path d = fresh_dir("config");
  const CmdResult r = run(std::string("--config ") + SKERRY_SOURCE_DIR +
                        "/configs/simulate_demo.ini --field.size_pix 128 --sources.count 10 "
                        "--output.truth_format vot --output.model_images true",
                    d);
  ASSERT_EQ(r.code, 0) << r.err;
  EXPECT_TRUE(fs::exists(d / "lanternfish_3000MHz.fits"));
  EXPECT_TRUE(fs::exists(d / "lanternfish_900MHz.model_map.fits"));
  EXPECT_TRUE(fs::exists(d / "lanternfish.truth.vot"));
  fs::remove_all(d);
}

TEST(SimulateCli, BadOptionsAreUsageErrorsNamingTheOptionAndWriteNothing) {
  const fs::path d = fresh_dir("bad");
  CmdResult r = run("--sources.cout 3", d);
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("sources.cout"), std::string::npos) << r.err;
  r = run("--noise.rms_jy_per_beam -1", d);
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("noise.rms_jy_per_beam"), std::string::npos) << r.err;
  r = run("--bands.freq_mhz 1400,1400", d);
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("distinct"), std::string::npos) << r.err;
  r = run("--sources.s_min_jy 0", d);
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("s_min_jy"), std::string::npos) << r.err;
  r = run("--bands.crpix_shift_pix 0,1 --bands.freq_mhz 1400", d);
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("bands.crpix_shift_pix"), std::string::npos) << r.err;
  EXPECT_FALSE(fs::exists(d) && !fs::is_empty(d));
  fs::remove_all(d);
}

TEST(SimulateCli, CounterpartCatalogueIsDeterministicAndBadOptionsWriteNothing) {
  // counterparts.density_deg2 adds NAME.counterparts.csv: the background count
  // is density x area of the image plus 2 arcmin on every side (equal-area
  // box), the same bytes for 1 and 2 threads; a bad counterparts.* option is a
  // usage error before any file is written.
  const std::string args = "--field.size_pix 256 --bands.freq_mhz 1400 --bands.crpix_shift_pix 0 "
                           "--noise.rms_jy_per_beam 2e-5 --sources.count 40 --counterparts.density_deg2 1e5";
  const fs::path a = fresh_dir("cp1"), b = fresh_dir("cp2"), bad = fresh_dir("cpbad");
  ASSERT_EQ(run(args + " --threads 1", a).code, 0);
  ASSERT_EQ(run(args + " --threads 2", b).code, 0);
  const std::string ca = slurp(a / "lanternfish.counterparts.csv");
  EXPECT_EQ(ca, slurp(b / "lanternfish.counterparts.csv"));
  std::size_t rows = 0, background = 0;
  std::istringstream in(ca);
  std::string line;
  std::getline(in, line);
  EXPECT_NE(line.find("true_source_id"), std::string::npos) << line;
  while (std::getline(in, line)) {
    if (line.empty() || line[0] == '#') continue;
    ++rows;
    background += line.size() >= 3 && line.compare(line.size() - 3, 3, ",-1") == 0;
  }
  // Box half-size 0.5 x 256 x 1.5" + 120" = 312" = 0.08667 deg: area (2 x 0.08667)^2 = 0.030044 deg^2
  // (the equal-area box differs from the flat square by < 1e-4): 3004 objects.
  EXPECT_NEAR(static_cast<double>(background), 3004.4, 2.0);
  EXPECT_GT(rows - background, 15u);  // about 75 % of 40 sources
  CmdResult r = run(args + " --counterparts.fraction 1.5", bad);
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("counterparts: fraction"), std::string::npos) << r.err;
  EXPECT_FALSE(fs::exists(bad) && !fs::is_empty(bad));
  fs::remove_all(a);
  fs::remove_all(b);
  fs::remove_all(bad);
}

}  // namespace
