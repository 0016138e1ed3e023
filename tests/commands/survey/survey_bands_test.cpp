// `skerry survey` with multi-band tiles ([survey] bands): each tile's band
// images go through `skerry bands` after the detection band's extract; every
// band file is an input of the tile; the merged catalogue carries the spectral
// columns of the kept components. Small simulated three-band survey (four
// overlapping tiles of the invented Lanternfish Field).
#include <fcntl.h>
#include <gtest/gtest.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <map>
#include <nlohmann/json.hpp>
#include <set>

#include "io/table_io.h"
#include "survey_fixture.h"

using namespace skerry::testing;
namespace fs = std::filesystem;
using nlohmann::json;

namespace {


bool same_value(double a, double b) { return (std::isnan(a) && std::isnan(b)) || a == b; }

const skerry::Column& col(const skerry::Table& t, const std::string& name) {
  const skerry::Column* c = t.find(name);
  if (!c) throw std::runtime_error("no column " + name);
  return *c;
}

}  // namespace

TEST(SurveyBands, SpectraJoinedAndEveryBandFileIsAnInput) {
  const std::string d = fresh_dir("bands3");
  const std::string cfg = make_multiband_survey(d);
  auto r = run_skerry({"survey", cfg});
  ASSERT_EQ(r.code, 0) << r.err << r.out;
  // Tiles are named without the band suffix; only the detection-band files are tiles.
  EXPECT_EQ(tiles_of(last_run_events(d + "/out", "tile")),
            (std::set<std::string>{"tile_00", "tile_01", "tile_10", "tile_11"}));
  const std::string catpath = d + "/out/lanternfish.components.csv";
  const skerry::Table cat = skerry::read_table(catpath);
  ASSERT_GT(cat.rows(), 30u);
  // Every kept row's spectral columns are its own tile's spectra row for the
  // same component (spectra component_id = 1-based component table row).
  std::map<std::string, skerry::Table> spectra;
  for (const char* t : {"tile_00", "tile_01", "tile_10", "tile_11"})
    spectra.emplace(t, skerry::read_table(d + "/out/tiles/" + t + "/bands/" + t + ".spectra.csv"));
  const auto& tile = col(cat, "tile");
  const auto& row = col(cat, "tile_row");
  const auto& alpha = col(cat, "alpha");
  const auto& alpha_err = col(cat, "alpha_err");
  const auto& nd = col(cat, "n_detected");
  std::size_t fitted = 0;
  for (std::size_t i = 0; i < cat.rows(); ++i) {
    const skerry::Table& sp = spectra.at(tile.text[i]);
    const auto& id = col(sp, "component_id");
    std::size_t k = 0;
    while (k < sp.rows() && id.i64[k] != row.i64[i]) ++k;
    ASSERT_LT(k, sp.rows()) << tile.text[i] << " row " << row.i64[i];
    EXPECT_TRUE(same_value(alpha.f64[i], col(sp, "alpha").f64[k]));
    EXPECT_TRUE(same_value(alpha_err.f64[i], col(sp, "alpha_err").f64[k]));
    EXPECT_EQ(nd.i64[i], col(sp, "n_detected").i64[k]);
    if (std::isfinite(alpha.f64[i])) ++fitted;
  }
  // Components detected at 1400 MHz at >= 5 sigma are measured in all three
  // bands: most have a fitted spectral index.
  EXPECT_GT(fitted, cat.rows() / 2);

  // Unchanged: nothing to do; a touch of a non-detection band file neither.
  EXPECT_EQ(run_skerry({"survey", cfg}).code, 5);
  const std::string band3 = d + "/tiles/tile_01_3000MHz.fits";
  struct stat st {};
  ASSERT_EQ(::stat(band3.c_str(), &st), 0);
  struct timespec ts[2] = {st.st_atim, st.st_mtim};
  ts[1].tv_sec += 60;
  ASSERT_EQ(::utimensat(AT_FDCWD, band3.c_str(), ts, 0), 0);
  EXPECT_EQ(run_skerry({"survey", cfg}).code, 5);

  // Editing one band file (not the detection band) reprocesses that tile alone.
  edit_first_pixel(band3);
  r = run_skerry({"survey", cfg});
  ASSERT_EQ(r.code, 0) << r.err;
  auto ev = last_run_events(d + "/out", "tile");
  ASSERT_EQ(tiles_of(ev), std::set<std::string>{"tile_01"});
  EXPECT_EQ(json::parse(ev[0]).at("reason").get<std::string>(), "content changed");
  EXPECT_EQ(run_skerry({"survey", cfg}).code, 5);

  // A missing band file fails that tile alone (exit 6) and names the file.
  fs::remove(d + "/tiles/tile_11_900MHz.fits");
  r = run_skerry({"survey", cfg, "--force"});
  EXPECT_EQ(r.code, 6) << r.err;
  ev = last_run_events(d + "/out", "tile");
  bool named = false;
  for (const auto& e : ev) {
    auto j = json::parse(e);
    if (j.at("tile") == "tile_11") named = j.dump().find("tile_11_900MHz.fits") != std::string::npos;
  }
  EXPECT_TRUE(named) << read_file(d + "/out/survey.log");
}

// Band settings without bands, or a detection band not among them, are bad
// configurations (exit 2) naming the option.
TEST(SurveyBands, BadBandSettingsExitTwo) {
  const std::string d = fresh_dir("bands-bad");
  std::string cfg = make_survey(d, "[forced]\ndetect_snr = 4\n");
  auto r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("forced.detect_snr"), std::string::npos) << r.err;
  cfg = make_survey(d, "");
  write_file(cfg, read_file(cfg) + "");
  std::string text = read_file(cfg);
  text.insert(text.find("[output]"), "bands = _900MHz,_1400MHz\ndetection_band = _3000MHz\n");
  write_file(cfg, text);
  r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("survey.detection_band"), std::string::npos) << r.err;
}

// Multi-band tiles through `--engine slurm` (a task per tile runs extract and
// bands): the same merged catalogue, spectra columns included, as the local engine.
TEST(SurveyBands, SlurmEngineMatchesLocal) {
  if (std::system("sinfo -h >/dev/null 2>&1") != 0) {
    const char* req = std::getenv("SKERRY_REQUIRE_SLURM");
    if (req && std::string(req) == "1") FAIL() << "SKERRY_REQUIRE_SLURM=1 but no Slurm cluster answers (sinfo)";
    GTEST_SKIP() << "no Slurm cluster (start one with tests/cluster/slurm-cluster.sh start)";
  }
  const std::string slurm_opts = "[slurm]\npoll_seconds = 0.2\nmem = 500M\nmerge_mem = 500M\ntime = 00:10:00\n";
  const std::string dl = fresh_dir("bands-slurm-local");
  ASSERT_EQ(run_skerry({"survey", make_multiband_survey(dl, slurm_opts)}).code, 0);
  const std::string ds = fresh_dir("bands-slurm");
  auto r = run_skerry({"survey", make_multiband_survey(ds, slurm_opts), "--engine", "slurm"});
  ASSERT_EQ(r.code, 0) << r.err;
  const std::string cat = "/out/lanternfish.components.csv";
  EXPECT_EQ(read_file(ds + cat), read_file(dl + cat));
  EXPECT_NE(read_file(ds + cat).find(",alpha,alpha_err,"), std::string::npos);
  auto merges = last_run_events(ds + "/out", "merge");
  ASSERT_EQ(merges.size(), 1u);
  EXPECT_EQ(json::parse(merges[0]).at("where"), "slurm");
}
