// `skerry survey` faults (issue 17): a tile that disappears, is renamed, is
// replaced by a truncated copy, a tile list that matches nothing, a damaged
// state record, an unknown stage key, a file-size limit. Each keeps the previous
// catalogue's rows (marked stale until retired) or refuses with a named reason
// and a documented exit code. On the four-tile survey of survey_fixture.
#include <fcntl.h>
#include <gtest/gtest.h>
#include <unistd.h>

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

const char* kCatalogue = "/out/lanternfish.components.csv";
const char* kSummary = "/out/lanternfish.components.merge.json";

std::size_t rows_of(const skerry::Table& t, const std::string& tile, std::int64_t bit_set = -1) {
  std::size_t n = 0;
  for (std::size_t i = 0; i < t.rows(); ++i)
    if (t.at("tile").text[i] == tile && (bit_set < 0 || (t.at("merge_flags").i64[i] & bit_set))) ++n;
  return n;
}

std::size_t lines(const std::string& s) { return static_cast<std::size_t>(std::count(s.begin(), s.end(), '\n')); }

/// A survey run once, successfully.
std::string done_survey(const std::string& d) {
  const std::string cfg = make_survey(d);
  const auto r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 0) << r.err;
  return cfg;
}

}  // namespace

// A deleted tile keeps its last good rows, marked stale (merge_flags bit 1, the
// merge summary, the state record), every run exits 6 with one line naming it,
// until survey.retired_tiles drops it.
TEST(SurveyFaults, DeletedTileKeepsItsRowsUntilRetired) {
  const std::string d = fresh_dir("f-deleted");
  const std::string cfg = done_survey(d);
  const auto before = skerry::read_table(d + kCatalogue);
  const std::size_t n10 = rows_of(before, "tile_10");
  ASSERT_GT(n10, 5u);
  fs::remove(d + "/tiles/tile_10.fits");
  for (int run = 0; run < 2; ++run) {
    const auto r = run_skerry({"survey", cfg});
    EXPECT_EQ(r.code, 6) << r.err;
    EXPECT_EQ(lines(r.err), 1u) << r.err;
    EXPECT_NE(r.err.find("tile_10 (missing)"), std::string::npos) << r.err;
    EXPECT_NE(r.err.find("survey.retired_tiles"), std::string::npos) << r.err;
    const auto after = skerry::read_table(d + kCatalogue);
    EXPECT_EQ(after.rows(), before.rows());
    EXPECT_EQ(rows_of(after, "tile_10", 1), n10);
    EXPECT_EQ(rows_of(after, "tile_00", 1), 0u);
    const auto m = json::parse(read_file(d + kSummary));
    EXPECT_EQ(m.at("stale_rows").get<std::size_t>(), n10);
    EXPECT_EQ(m.at("stale_tiles"), json::array({"tile_10"}));
  }
  // Retired: its rows leave the catalogue, the run is clean again.
  write_file(cfg, read_file(cfg) + "[survey]\nretired_tiles = tile_10\n");
  const auto r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 0) << r.err;
  const auto retired = skerry::read_table(d + kCatalogue);
  EXPECT_EQ(rows_of(retired, "tile_10"), 0u);
  EXPECT_EQ(json::parse(read_file(d + kSummary)).at("stale_rows").get<std::size_t>(), 0u);
  EXPECT_EQ(run_skerry({"survey", cfg}).code, 5);
  // A scheduler that wants 0 for a routine no-op asks for it; other codes are refused.
  EXPECT_EQ(run_skerry({"survey", cfg, "--up_to_date_exit", "0"}).code, 0);
  const auto bad = run_skerry({"survey", cfg, "--up_to_date_exit", "3"});
  EXPECT_EQ(bad.code, 2);
  EXPECT_NE(bad.err.find("up_to_date_exit"), std::string::npos) << bad.err;
}

// A renamed tile: the new name is processed, the old one is stale; no source is
// lost and none is duplicated.
TEST(SurveyFaults, RenamedTileLosesNothingAndDuplicatesNothing) {
  const std::string d = fresh_dir("f-renamed");
  const std::string cfg = done_survey(d);
  const auto before = skerry::read_table(d + kCatalogue);
  fs::rename(d + "/tiles/tile_01.fits", d + "/tiles/tile_01_moved.fits");
  const auto r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 6) << r.err;
  EXPECT_EQ(lines(r.err), 1u) << r.err;
  EXPECT_NE(r.err.find("tile_01 (missing)"), std::string::npos) << r.err;
  const auto after = skerry::read_table(d + kCatalogue);
  EXPECT_EQ(after.rows(), before.rows());
  const auto& ra = after.at("ra_deg").f64;
  const auto& dec = after.at("dec_deg").f64;
  std::size_t close_pairs = 0;
  for (std::size_t a = 0; a < after.rows(); ++a)
    for (std::size_t b = a + 1; b < after.rows(); ++b) {
      const double dx = (ra[a] - ra[b]) * std::cos(dec[a] * M_PI / 180.0), dy = dec[a] - dec[b];
      if (std::hypot(dx, dy) * 3600.0 < 5.0 && after.at("tile").text[a] != after.at("tile").text[b]) ++close_pairs;
    }
  EXPECT_EQ(close_pairs, 0u);
}

// A half-copied replacement of a tile fails; its last good rows stay, stale.
TEST(SurveyFaults, TruncatedReplacementKeepsLastGoodRows) {
  const std::string d = fresh_dir("f-truncated");
  const std::string cfg = done_survey(d);
  const auto before = skerry::read_table(d + kCatalogue);
  const std::size_t n11 = rows_of(before, "tile_11");
  const std::string tile = d + "/tiles/tile_11.fits";
  ASSERT_EQ(::truncate(tile.c_str(), static_cast<off_t>(fs::file_size(tile) / 3)), 0);
  const auto r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 6) << r.err;
  EXPECT_EQ(lines(r.err), 1u) << r.err;
  EXPECT_NE(r.err.find("1 of 1 tiles failed (tile_11;"), std::string::npos) << r.err;
  EXPECT_NE(r.err.find("tile_11 (failed)"), std::string::npos) << r.err;
  const auto after = skerry::read_table(d + kCatalogue);
  EXPECT_EQ(after.rows(), before.rows());
  EXPECT_EQ(rows_of(after, "tile_11", 1), n11);
}

// A tile list that matches nothing (a renamed folder, an unmounted disk) is a
// configuration error that writes nothing: the catalogue and the log stay.
TEST(SurveyFaults, EmptyGlobIsAConfigurationErrorThatWritesNothing) {
  const std::string d = fresh_dir("f-emptyglob");
  const std::string cfg = done_survey(d);
  const std::string cat = read_file(d + kCatalogue), log = read_file(d + "/out/survey.log");
  fs::rename(d + "/tiles", d + "/tiles-elsewhere");
  const auto r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 2);
  EXPECT_EQ(r.err, "skerry survey: error: " + cfg + ": survey.tiles pattern 'tiles/*.fits' matches no tile image (" +
                       d + "/tiles/*.fits)\n");
  EXPECT_EQ(read_file(d + kCatalogue), cat);
  EXPECT_EQ(read_file(d + "/out/survey.log"), log);
  // A new survey: not even the output folder is made.
  const std::string d2 = fresh_dir("f-emptyglob-new");
  write_file(d2 + "/survey.ini", "[survey]\ntiles = none/*.fits\noutput = out\n");
  EXPECT_EQ(run_skerry({"survey", d2 + "/survey.ini"}).code, 2);
  EXPECT_FALSE(fs::exists(d2 + "/out"));
}

// A damaged state record (header overwritten, a page overwritten, truncated) is
// moved aside and rebuilt from the tile folders' run records, with a message;
// the catalogue comes out the same and nothing is reprocessed.
TEST(SurveyFaults, DamagedStateRecordIsRebuilt) {
  const std::string d = fresh_dir("f-state");
  const std::string cfg = done_survey(d);
  const std::string cat = read_file(d + kCatalogue);
  const std::string db = d + "/out/survey.sqlite";
  const std::string good = read_file(db);
  ASSERT_GE(good.size(), 8192u);
  struct Damage {
    const char* what;
    std::string bytes;
  };
  std::string header = good, page = good;
  for (std::size_t i = 0; i < 100; ++i) header[i] = static_cast<char>(0xA5);
  for (std::size_t i = 4096; i < 8192; ++i) page[i] = static_cast<char>(i * 7);
  const std::vector<Damage> cases{{"header", header}, {"page 2", page}, {"truncated", good.substr(0, good.size() / 2 + 17)}};
  int k = 0;
  for (const auto& c : cases) {
    SCOPED_TRACE(c.what);
    write_file(db, c.bytes);
    auto r = run_skerry({"survey", cfg});
    EXPECT_TRUE(r.code == 0 || r.code == 5) << r.code << " " << r.err;
    EXPECT_NE(r.err.find("was damaged"), std::string::npos) << r.err;
    EXPECT_NE(r.err.find("rebuilt from the run records of 4 tile folders"), std::string::npos) << r.err;
    EXPECT_TRUE(last_run_events(d + "/out", "tile").empty()) << "no tile is reprocessed";
    EXPECT_EQ(read_file(d + kCatalogue), cat);
    std::size_t aside = 0;
    for (const auto& e : fs::directory_iterator(d + "/out"))
      aside += e.path().filename().string().rfind("survey.sqlite.damaged-", 0) == 0;
    EXPECT_EQ(aside, static_cast<std::size_t>(++k));
    r = run_skerry({"survey", cfg});
    EXPECT_EQ(r.code, 5) << r.err;  // sound again
  }
}

// An unknown stage key fails at once (exit 2, naming it), before any tile runs
// and before anything is written.
TEST(SurveyFaults, UnknownStageKeyFailsBeforeAnyWork) {
  const std::string d = fresh_dir("f-stagekey");
  const std::string cfg = make_survey(d, "[detect]\nbogus_threshold = 4\n");
  const auto r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 2);
  EXPECT_EQ(lines(r.err), 1u) << r.err;
  EXPECT_NE(r.err.find(cfg), std::string::npos) << r.err;
  EXPECT_NE(r.err.find("detect.bogus_threshold"), std::string::npos) << r.err;
  EXPECT_FALSE(fs::exists(d + "/out"));
}

// A file-size limit (ulimit -f): no death by SIGXFSZ; the documented exit 4 with
// a message naming the file; a survey names the tiles that failed.
TEST(SurveyFaults, FileSizeLimitGivesExitFour) {
  const std::string d = fresh_dir("f-fsize");
  // The tiles' rms maps stored plain (in the [output] section make_survey opens):
  // larger than the limit, where the default compressed maps would fit under it.
  const std::string cfg = make_survey(d, "map_storage = rms:plain\n");
  auto r = run_skerry_limited({"extract", d + "/tiles/tile_00.fits", "--out", d + "/x"}, 64 * 1024);
  EXPECT_EQ(r.code, 4) << r.err;
  EXPECT_EQ(lines(r.err), 1u) << r.err;
  EXPECT_NE(r.err.find(d + "/x/"), std::string::npos) << r.err;
  r = run_skerry_limited({"simulate", "--out", d + "/sim", "--field.size_pix", "512", "--bands.freq_mhz", "1400"},
                         64 * 1024);
  EXPECT_EQ(r.code, 4) << r.err;
  EXPECT_NE(r.err.find(d + "/sim/"), std::string::npos) << r.err;
  r = run_skerry_limited({"survey", cfg}, 64 * 1024);
  EXPECT_TRUE(r.code == 4 || r.code == 6) << r.code << " " << r.err;
  EXPECT_NE(r.err.find("tile_00"), std::string::npos) << r.err;
  EXPECT_NE(r.err.find("tile_11"), std::string::npos) << r.err;
}
