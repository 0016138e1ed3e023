// `skerry survey` end to end on a small simulated survey (four overlapping
// tiles of the invented Lanternfish Field, made with `skerry simulate`):
// incremental runs, the lock, failures, kill -9, determinism, Slurm. Each test
// works in its own folder.
#include <erfa.h>
#include <erfam.h>
#include <fcntl.h>
#include <fitsio.h>
#include <gtest/gtest.h>
#include <signal.h>
#include <sys/file.h>
#include <sys/stat.h>
#include <unistd.h>

#include <atomic>
#include <chrono>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <map>
#include <mutex>
#include <nlohmann/json.hpp>
#include <set>
#include <thread>

#include "io/atomic_file.h"
#include "io/table_io.h"
#include "survey_fixture.h"

using namespace skerry::testing;
namespace fs = std::filesystem;
using nlohmann::json;

namespace {

const char* kCatalogue = "/out/lanternfish.components.csv";


void touch_later(const std::string& path) {
  struct stat st {};
  ASSERT_EQ(::stat(path.c_str(), &st), 0);
  struct timespec ts[2];
  ts[0] = st.st_atim;
  ts[1] = st.st_mtim;
  ts[1].tv_sec += 60;
  ts[1].tv_nsec = (ts[1].tv_nsec + 123456) % 1000000000;
  ASSERT_EQ(::utimensat(AT_FDCWD, path.c_str(), ts, 0), 0);
}

}  // namespace

// (c) A cold run processes every tile, quietly; an unchanged rerun does nothing
// (exit 5) in well under 2 s; so does a rerun after `touch` of a tile.
TEST(SurveyPipeline, ColdRunThenNoOpAndTouch) {
  const std::string d = fresh_dir("cold");
  const std::string cfg = make_survey(d);
  auto r = run_skerry({"survey", cfg});
  ASSERT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(r.err, "");  // quiet when not on a terminal
  EXPECT_EQ(r.out, "");
  EXPECT_EQ(tiles_of(last_run_events(d + "/out", "tile")),
            (std::set<std::string>{"tile_00", "tile_01", "tile_10", "tile_11"}));
  const std::string cat = read_file(d + kCatalogue);
  EXPECT_GT(skerry::read_table(d + kCatalogue).rows(), 50u);
  // Plain log: one line per tile with its time.
  const std::string log = read_file(d + "/out/survey.log");
  for (const char* t : {"tile_00", "tile_01", "tile_10", "tile_11"})
    EXPECT_NE(log.find(std::string("tile ") + t + " ok "), std::string::npos) << log;

  auto again = run_skerry({"survey", cfg});
  EXPECT_EQ(again.code, 5) << again.err;
  EXPECT_EQ(again.err, "");
  // No tile was processed again (correctness, not time: the speed of an unchanged
  // rerun is bench_survey's figure).
  EXPECT_TRUE(tiles_of(last_run_events(d + "/out", "tile")).empty());
  touch_later(d + "/tiles/tile_01.fits");
  auto touched = run_skerry({"survey", cfg});
  EXPECT_EQ(touched.code, 5) << touched.err;
  EXPECT_TRUE(tiles_of(last_run_events(d + "/out", "tile")).empty());
  EXPECT_EQ(read_file(d + kCatalogue), cat);
}

// (c) Editing one tile's content reprocesses just that tile; changing the stage
// configuration reprocesses all; --only and --force reprocess by hand.
TEST(SurveyPipeline, ContentAndConfigurationChanges) {
  const std::string d = fresh_dir("changes");
  const std::string cfg = make_survey(d);
  ASSERT_EQ(run_skerry({"survey", cfg}).code, 0);
  edit_first_pixel(d + "/tiles/tile_10.fits");
  auto r = run_skerry({"survey", cfg});
  ASSERT_EQ(r.code, 0) << r.err;
  auto ev = last_run_events(d + "/out", "tile");
  ASSERT_EQ(tiles_of(ev), std::set<std::string>{"tile_10"});
  EXPECT_EQ(json::parse(ev[0]).at("reason").get<std::string>(), "content changed");

  write_file(cfg, read_file(cfg) + "[detect]\npeak_snr = 5.5\n");
  r = run_skerry({"survey", cfg});
  ASSERT_EQ(r.code, 0) << r.err;
  ev = last_run_events(d + "/out", "tile");
  EXPECT_EQ(ev.size(), 4u);
  for (const auto& e : ev) EXPECT_EQ(json::parse(e).at("reason").get<std::string>(), "configuration changed");
  EXPECT_EQ(run_skerry({"survey", cfg}).code, 5);

  r = run_skerry({"survey", cfg, "--only", "tile_01"});
  ASSERT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(tiles_of(last_run_events(d + "/out", "tile")), std::set<std::string>{"tile_01"});
  r = run_skerry({"survey", cfg, "--force"});
  ASSERT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(last_run_events(d + "/out", "tile").size(), 4u);
  r = run_skerry({"survey", cfg, "--only", "tile_99"});
  EXPECT_EQ(r.code, 2);
  EXPECT_EQ(r.err.find("--only tile_99: no tile of that name"), r.err.find("--only"));
}

// (b) A second run while one holds the lock exits at once with the busy code
// (7) and one line on stderr; the first run is not disturbed.
TEST(SurveyPipeline, OverlappingRunIsBusy) {
  const std::string d = fresh_dir("busy");
  const std::string cfg = make_survey(d);
  fs::create_directories(d + "/out");
  {
    // Another process holding the lock.
    int fd = ::open((d + "/out/survey.lock").c_str(), O_RDWR | O_CREAT, 0644);
    ASSERT_EQ(::flock(fd, LOCK_EX | LOCK_NB), 0);
    auto r = run_skerry({"survey", cfg});
    EXPECT_EQ(r.code, 7);
    EXPECT_EQ(r.err, "skerry survey: busy: another survey run holds " + d + "/out/survey.lock\n");
    // Refused before any work: the output folder holds the lock file alone (no
    // log, no state record, no tile folder).
    std::vector<std::string> in_out;
    for (const auto& e : fs::directory_iterator(d + "/out")) in_out.push_back(e.path().filename().string());
    EXPECT_EQ(in_out, std::vector<std::string>{"survey.lock"});
    ::close(fd);
  }
  // A real overlapping run: start one (tiles one at a time), start a second
  // once the first has logged its start.
  const int pid = start_skerry({"survey", cfg, "--threads", "1"}, d);
  bool started = false;
  for (int i = 0; i < 2000 && !started; ++i) {
    started = read_file(d + "/out/survey.jsonl").find("run_start") != std::string::npos;
    if (!started) std::this_thread::sleep_for(std::chrono::milliseconds(5));
  }
  ASSERT_TRUE(started);
  auto second = run_skerry({"survey", cfg});
  EXPECT_EQ(second.code, 7) << second.err;
  EXPECT_EQ(wait_skerry(pid), 0);
  EXPECT_TRUE(fs::exists(d + kCatalogue));
}

// (d) A truncated tile is reported, the other tiles are processed and merged,
// the exit code says "some failed" (6); it is retried on the next run and
// processed once repaired.
TEST(SurveyPipeline, TruncatedTileFailsAloneAndIsRetried) {
  const std::string d = fresh_dir("truncated");
  const std::string cfg = make_survey(d);
  const std::string tile = d + "/tiles/tile_10.fits";
  const std::string good = read_file(tile);
  ASSERT_EQ(::truncate(tile.c_str(), static_cast<off_t>(good.size() / 2)), 0);
  auto r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 6) << r.err;
  EXPECT_EQ(r.err, "skerry survey: 1 of 4 tiles failed (tile_10; retried next run); see " + d + "/out/survey.log\n");
  auto ev = last_run_events(d + "/out", "tile");
  ASSERT_EQ(ev.size(), 4u);
  std::size_t failed = 0;
  for (const auto& e : ev) {
    auto j = json::parse(e);
    if (j.at("status") == "failed") {
      ++failed;
      EXPECT_EQ(j.at("tile"), "tile_10");
      EXPECT_NE(j.at("message").get<std::string>().find("tile_10.fits"), std::string::npos) << e;
    }
  }
  EXPECT_EQ(failed, 1u);
  const auto merged = skerry::read_table(d + kCatalogue);
  std::set<std::string> from;
  for (const auto& t : merged.at("tile").text) from.insert(t);
  EXPECT_EQ(from, (std::set<std::string>{"tile_00", "tile_01", "tile_11"}));
  // Retried on the next run (and still failing).
  r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 6);
  EXPECT_EQ(tiles_of(last_run_events(d + "/out", "tile")), std::set<std::string>{"tile_10"});
  // Repaired: processed, merged with the others.
  write_file(tile, good);
  r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(tiles_of(last_run_events(d + "/out", "tile")), std::set<std::string>{"tile_10"});
}

namespace {

/// Parses a file completely; "" when it parses, else the reason. A file that
/// vanishes meanwhile (renamed away) counts as parsed.
std::string parse_completely(const fs::path& p) {
  const std::string ext = p.extension().string();
  try {
    if (ext == ".csv" || ext == ".vot") {
      skerry::read_table(p.string());
    } else if (ext == ".json") {
      std::ifstream in(p);
      if (!in) return "";
      const json j = json::parse(in);
      (void)j;
    } else if (ext == ".jsonl") {
      const std::string s = read_file(p.string());
      if (!s.empty() && s.back() != '\n') return "last line not complete";
      std::istringstream in(s);
      std::string line;
      while (std::getline(in, line)) {
        const json j = json::parse(line);
        (void)j;
      }
    } else if (ext == ".fits") {
      fitsfile* f = nullptr;
      int status = 0;
      if (fits_open_file(&f, p.c_str(), READONLY, &status)) {
        if (!fs::exists(p)) return "";
        return "CFITSIO cannot open it (status " + std::to_string(status) + ")";
      }
      int nhdu = 0;
      fits_get_num_hdus(f, &nhdu, &status);
      for (int h = 1; h <= nhdu && status == 0; ++h) {
        int type = 0;
        fits_movabs_hdu(f, h, &type, &status);
        if (type == IMAGE_HDU) {
          int naxis = 0;
          long nax[9] = {0};
          fits_get_img_dim(f, &naxis, &status);
          fits_get_img_size(f, 9, nax, &status);
          long n = naxis > 0 ? 1 : 0;
          for (int a = 0; a < naxis; ++a) n *= nax[a];
          std::vector<double> buf(static_cast<std::size_t>(n));
          int anynul = 0;
          if (n > 0) fits_read_img(f, TDOUBLE, 1, n, nullptr, buf.data(), &anynul, &status);
        }
      }
      int s2 = 0;
      fits_close_file(f, &s2);
      if (status != 0) return "CFITSIO read error (status " + std::to_string(status) + ")";
    }
  } catch (const std::exception& e) {
    if (!fs::exists(p)) return "";
    return e.what();
  }
  return "";
}

/// Polls a folder while a run works: every visible non-temporary file must
/// parse completely.
class Watcher {
 public:
  explicit Watcher(std::string root) : root_(std::move(root)), th_([this] { loop(); }) {}
  ~Watcher() { stop(); }
  void stop() {
    stop_ = true;
    if (th_.joinable()) th_.join();
  }
  std::vector<std::string> problems() {
    std::lock_guard g(mu_);
    return problems_;
  }
  std::size_t parsed() const { return parsed_; }

 private:
  void loop() {
    while (!stop_) {
      std::error_code ec;
      fs::recursive_directory_iterator it(root_, ec), end;
      for (; !ec && it != end; it.increment(ec)) {
        const std::string n = it->path().filename().string();
        if (skerry::is_temporary_name(n)) {
          if (it->is_directory(ec)) it.disable_recursion_pending();
          continue;
        }
        if (!it->is_regular_file(ec)) continue;
        const std::string why = parse_completely(it->path());
        ++parsed_;
        if (!why.empty()) {
          std::lock_guard g(mu_);
          problems_.push_back(it->path().string() + ": " + why);
        }
      }
      std::this_thread::sleep_for(std::chrono::milliseconds(2));
    }
  }
  std::string root_;
  std::atomic<bool> stop_{false};
  std::atomic<std::size_t> parsed_{0};
  std::mutex mu_;
  std::vector<std::string> problems_;
  std::thread th_;
};

bool any_temporary_left(const std::string& root) {
  for (const auto& e : fs::recursive_directory_iterator(root))
    if (skerry::is_temporary_name(e.path().filename().string())) return true;
  return false;
}

}  // namespace

// (a) kill -9 at several moments of a run, then rerun: the merged catalogue is
// byte-identical to an uninterrupted run's, nothing temporary is left, and a
// watcher polling the output folder during the runs finds that every visible
// non-temporary file (FITS maps, CSV tables, JSON records, JSON-lines log)
// parses completely.
TEST(SurveyPipeline, KillNineAnywhereThenRerunGivesTheSameCatalogue) {
  const std::string extra = "[output]\n";  // (maps on: FITS outputs for the watcher)
  const std::string ref_dir = fresh_dir("kill-ref");
  const std::string ref_cfg = make_survey(ref_dir);
  write_file(ref_cfg, read_file(ref_cfg) + "[survey]\n");
  std::string base = read_file(ref_cfg);
  auto enable_maps = [](std::string s) { return s; };  // maps are on in every survey (the merge reads rms maps)
  write_file(ref_cfg, enable_maps(base));
  auto ref = run_skerry({"survey", ref_cfg});
  ASSERT_EQ(ref.code, 0) << ref.err;
  const std::string want = read_file(ref_dir + kCatalogue);
  const double full = ref.seconds;
  std::size_t parsed_total = 0;
  for (double frac : {0.02, 0.15, 0.35, 0.55, 0.75, 0.95}) {
    const std::string d = fresh_dir("kill-" + std::to_string(static_cast<int>(frac * 100)));
    const std::string cfg = make_survey(d);
    write_file(cfg, enable_maps(read_file(cfg)));
    fs::create_directories(d + "/out");
    Watcher w(d + "/out");
    const int pid = start_skerry({"survey", cfg}, d);
    std::this_thread::sleep_for(std::chrono::duration<double>(frac * full));
    ::kill(pid, SIGKILL);
    wait_skerry(pid);
    auto r = run_skerry({"survey", cfg});
    w.stop();
    EXPECT_TRUE(r.code == 0 || r.code == 5) << "killed at " << frac << ": " << r.err;
    EXPECT_EQ(read_file(d + kCatalogue), want) << "killed at " << frac * full << " s";
    EXPECT_FALSE(any_temporary_left(d + "/out")) << frac;
    EXPECT_EQ(w.problems(), std::vector<std::string>{}) << "killed at " << frac;
    parsed_total += w.parsed();
  }
  EXPECT_GT(parsed_total, 100u);  // the watcher did look
}

// Determinism: 1 or 2 workers, and HEALPix partition orders 0 and 9, give
// byte-identical merged catalogues.
TEST(SurveyPipeline, CatalogueIndependentOfWorkersAndPartitions) {
  const std::string d1 = fresh_dir("det-1");
  const std::string c1 = make_survey(d1);
  ASSERT_EQ(run_skerry({"survey", c1, "--threads", "1"}).code, 0);
  const std::string d2 = fresh_dir("det-2");
  const std::string c2 = make_survey(d2, "[survey]\npartition_order = 9\n");
  ASSERT_EQ(run_skerry({"survey", c2, "--threads", "2"}).code, 0);
  const std::string d3 = fresh_dir("det-3");
  const std::string c3 = make_survey(d3, "[survey]\npartition_order = 0\n");
  ASSERT_EQ(run_skerry({"survey", c3, "--threads", "2"}).code, 0);
  const std::string a = read_file(d1 + kCatalogue);
  EXPECT_FALSE(a.empty());
  EXPECT_EQ(a, read_file(d2 + kCatalogue));
  EXPECT_EQ(a, read_file(d3 + kCatalogue));
  auto m2 = json::parse(read_file(d2 + "/out/lanternfish.components.merge.json"));
  EXPECT_GT(m2.at("partitions").get<int>(), 1);
}

// The overlap rule checked from outside: every merged row not marked rescued
// comes from the tile with the lowest local noise at its position among the
// tiles with data there, the noise taken from each tile's rms map
// (NAME.rms_map.fits, read with astropy) at the row's pixel in that tile (its
// FITS WCS, by astropy); the noise cells the merge uses are medians over cells of
// a few beams, so a tile may lose to one within 10 % of it (flat noise here:
// the tiles' rms estimates differ by a few per cent). Separations from ERFA's
// eraSeps (IAU SOFA): no two merged rows from different tiles lie within the
// self-match radius.
TEST(SurveyPipeline, MergedRowsComeFromTheLowestNoiseTile) {
  const std::string d = fresh_dir("cells");
  const std::string cfg = make_survey(d);
  ASSERT_EQ(run_skerry({"survey", cfg}).code, 0);
  const auto t = skerry::read_table(d + kCatalogue);
  const auto& ra = t.at("ra_deg").f64;
  const auto& dec = t.at("dec_deg").f64;
  const auto& tile = t.at("tile").text;
  ASSERT_GT(t.rows(), 30u);
  std::string pos;
  for (std::size_t i = 0; i < t.rows(); ++i) pos += std::to_string(ra[i]) + " " + std::to_string(dec[i]) + "\n";
  write_file(d + "/pos.txt", pos);
  const std::string py = d + "/noise.py";
  write_file(py,
             "import sys, glob, os, numpy as np\n"
             "from astropy.io import fits\nfrom astropy.wcs import WCS\n"
             "pos = np.loadtxt(sys.argv[2], ndmin=2)\n"
             "for f in sorted(glob.glob(sys.argv[1] + '/tile_*/*.rms*.fits')):\n"
             // The first HDU with data: tile-compressed maps are an extension.
             "    hdu = [x for x in fits.open(f) if x.data is not None][0]\n"
             "    h = hdu.header\n    d = hdu.data.squeeze()\n"
             "    x, y = WCS(h).celestial.wcs_world2pix(pos[:, 0], pos[:, 1], 0)\n"
             "    xi, yi = np.rint(x).astype(int), np.rint(y).astype(int)\n"
             "    ok = (xi >= 0) & (yi >= 0) & (xi < d.shape[1]) & (yi < d.shape[0])\n"
             "    v = np.full(len(pos), np.inf)\n"
             "    v[ok] = d[yi[ok], xi[ok]]\n    v[~np.isfinite(v)] = np.inf\n"
             "    print(os.path.basename(os.path.dirname(f)), ' '.join(repr(float(a)) for a in v))\n");
  const std::string out = d + "/noise.txt";
  ASSERT_EQ(std::system(("/usr/bin/python3 " + py + " " + d + "/out/tiles " + d + "/pos.txt > " + out + " 2>/dev/null").c_str()), 0);
  std::map<std::string, std::vector<double>> noise;
  {
    std::ifstream in(out);
    std::string n;
    while (in >> n) {
      std::vector<double> v(t.rows());
      for (auto& x : v) {
        std::string s;
        in >> s;
        x = s == "inf" ? INFINITY : std::stod(s);
      }
      noise[n] = v;
    }
  }
  ASSERT_EQ(noise.size(), 4u);
  const auto& flags = t.at("merge_flags").i64;
  const double d2r = ERFA_DD2R;
  for (std::size_t i = 0; i < t.rows(); ++i) {
    if (flags[i] & 2) continue;  // rescued: the owner did not detect it
    double best = INFINITY;
    for (const auto& [n, v] : noise) best = std::min(best, v[i]);
    EXPECT_LE(noise.at(tile[i])[i], 1.10 * best) << "row " << i << " of tile " << tile[i];
    for (std::size_t j = i + 1; j < t.rows(); ++j) {
      if (tile[i] == tile[j]) continue;
      const double s = eraSeps(ra[i] * d2r, dec[i] * d2r, ra[j] * d2r, dec[j] * d2r) / ERFA_DAS2R;
      EXPECT_GT(s, 5.0) << "rows " << i << " and " << j << " look like one source from two tiles";
    }
  }
  // Overlaps really held duplicates, which the rule removed.
  auto m = json::parse(read_file(d + "/out/lanternfish.components.merge.json"));
  EXPECT_GT(m.at("duplicates_removed").get<int>(), 10);
  EXPECT_EQ(m.at("residual_duplicate_pairs").get<int>(), 0);
}

// Bad configuration: exit 2 with one line naming the file and the option.
TEST(SurveyPipeline, BadConfigurationExitsTwo) {
  const std::string d = fresh_dir("badcfg");
  std::string cfg = make_survey(d, "[survey]\nbogus_key = 1\n");
  auto r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 2);
  EXPECT_EQ(r.err, "skerry survey: error: " + cfg + ": unknown option 'survey.bogus_key'\n");
  cfg = make_survey(d, "[survey]\nengine = teleport\n");
  r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 2);
  EXPECT_NE(r.err.find("survey.engine = teleport breaks local or slurm"), std::string::npos) << r.err;
  cfg = make_survey(d, "[detect]\npeak_snr = -3\n");
  r = run_skerry({"survey", cfg});
  EXPECT_EQ(r.code, 2) << r.err;
  EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << r.err;
}

namespace {
bool slurm_available() {
  return std::system("sinfo -h -o %T 2>/dev/null | grep -Eq 'idle|mix|alloc'") == 0;
}
}  // namespace

// (e) Slurm for real: the survey through `--engine slurm` on the one-node test
// cluster (tests/cluster/slurm-cluster.sh) gives a byte-identical catalogue to
// the local engine's (which merges in memory; Slurm always merges on disk), the
// tile array ran one task per tile, the partition-merge array one task per
// non-empty partition, and the concatenation ran after it. A failing tile is
// reported and the merge of the others still happens on Slurm; a failing
// partition task is reported and retried (alone) on the next run.
TEST(SurveyPipeline, SlurmEngineMatchesLocal) {
  if (!slurm_available()) {
    const char* req = std::getenv("SKERRY_REQUIRE_SLURM");
    if (req && std::string(req) == "1") FAIL() << "SKERRY_REQUIRE_SLURM=1 but no Slurm cluster answers (sinfo)";
    GTEST_SKIP() << "no Slurm cluster (start one with tests/cluster/slurm-cluster.sh start)";
  }
  // Partition order 9 (6.9' pixels) cuts the 16' field into several partitions.
  const std::string slurm_opts =
      "[slurm]\npoll_seconds = 0.2\nmem = 500M\nmerge_mem = 500M\ntime = 00:10:00\n[survey]\npartition_order = 9\n";
  const std::string dl = fresh_dir("slurm-local");
  ASSERT_EQ(run_skerry({"survey", make_survey(dl, slurm_opts)}).code, 0);
  const std::string ds = fresh_dir("slurm");
  const std::string cfg = make_survey(ds, slurm_opts);
  auto r = run_skerry({"survey", cfg, "--engine", "slurm"});
  ASSERT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(read_file(ds + kCatalogue), read_file(dl + kCatalogue));
  // One task per tile: the task logs name each tile once, all of one array job.
  std::set<std::string> tiles, jobs;
  std::size_t logs = 0;
  for (const auto& run : fs::directory_iterator(ds + "/out/slurm")) {
    for (const auto& e : fs::directory_iterator(run.path())) {
      const std::string n = e.path().filename().string();
      if (n.rfind("task-", 0) != 0) continue;
      ++logs;
      const std::string text = read_file(e.path().string());
      const std::string key = "skerry survey task " + n.substr(5, n.size() - 9) + " of job ";
      const auto p = text.find(key);
      ASSERT_NE(p, std::string::npos) << text;
      const auto colon = text.find(": tile ", p);
      jobs.insert(text.substr(p + key.size(), colon - p - key.size()));
      tiles.insert(text.substr(colon + 7, text.find('\n', colon) - colon - 7));
    }
  }
  EXPECT_EQ(logs, 4u);
  EXPECT_EQ(tiles, (std::set<std::string>{"tile_00", "tile_01", "tile_10", "tile_11"}));
  EXPECT_EQ(jobs.size(), 1u);
  auto merges = last_run_events(ds + "/out", "merge");
  ASSERT_EQ(merges.size(), 1u);
  EXPECT_EQ(json::parse(merges[0]).at("where"), "slurm");
  // One partition task per non-empty partition of the plan, all of one array
  // job, each naming its partition once (task logs, "%a" per array element).
  const auto summary = json::parse(read_file(ds + "/out/lanternfish.components.merge.json"));
  EXPECT_EQ(summary.value("merge", std::string()), "on disk");
  const std::size_t n_parts = summary.at("partitions").get<std::size_t>();
  EXPECT_GT(n_parts, 4u);
  auto run_dir = [&] {
    const auto st = last_run_events(ds + "/out", "run_start");
    return st.empty() ? fs::path() : fs::path(ds + "/out/slurm") / json::parse(st.back()).at("run").get<std::string>();
  };
  auto partition_tasks = [&](const fs::path& dir, std::set<std::string>& part_jobs) {
    std::multiset<std::string> parts;
    for (const auto& e : fs::directory_iterator(dir)) {
      const std::string n = e.path().filename().string();
      if (n.rfind("partition-", 0) != 0) continue;
      const std::string text = read_file(e.path().string());
      const std::string key = "skerry survey partition task " + n.substr(10, n.size() - 14) + " of job ";
      const auto p = text.find(key);
      EXPECT_NE(p, std::string::npos) << text;
      if (p == std::string::npos) continue;
      const auto colon = text.find(": partition ", p);
      part_jobs.insert(text.substr(p + key.size(), colon - p - key.size()));
      parts.insert(text.substr(colon + 12, text.find('\n', colon) - colon - 12));
      EXPECT_NE(text.find(" ok: "), std::string::npos) << text;
    }
    return parts;
  };
  {
    std::set<std::string> part_jobs;
    const auto parts = partition_tasks(run_dir(), part_jobs);
    EXPECT_EQ(parts.size(), n_parts);
    EXPECT_EQ(std::set<std::string>(parts.begin(), parts.end()).size(), n_parts);  // each once
    EXPECT_EQ(part_jobs.size(), 1u);
    std::set<std::string> planned;
    const json mp = json::parse(read_file((run_dir() / "merge-plan.json").string()));
    for (const auto& p : mp.at("todo"))
      planned.insert(std::to_string(p.get<std::int64_t>()));
    EXPECT_EQ(std::set<std::string>(parts.begin(), parts.end()), planned);
    EXPECT_NE(read_file((run_dir() / "concat.log").string()).find("merge: 4 tiles"), std::string::npos);
  }
  // Unchanged: nothing submitted.
  EXPECT_EQ(run_skerry({"survey", cfg, "--engine", "slurm"}).code, 5);
  // A failing task is reported (exit 6); the others are merged on Slurm (a plan
  // job of its own, since the afterok one never ran).
  const std::string tile = ds + "/tiles/tile_11.fits";
  const std::string good = read_file(tile);
  ASSERT_EQ(::truncate(tile.c_str(), static_cast<off_t>(good.size() / 3)), 0);
  r = run_skerry({"survey", cfg, "--engine", "slurm"});
  EXPECT_EQ(r.code, 6) << r.err;
  auto ev = last_run_events(ds + "/out", "tile");
  ASSERT_EQ(ev.size(), 1u);
  EXPECT_EQ(json::parse(ev[0]).at("status"), "failed");
  merges = last_run_events(ds + "/out", "merge");
  ASSERT_EQ(merges.size(), 1u);
  EXPECT_EQ(json::parse(merges[0]).at("where"), "slurm");
  // tile_11's last good rows stay in the merge, marked stale.
  EXPECT_EQ(json::parse(merges[0]).at("tiles"), 4);
  EXPECT_GT(json::parse(merges[0]).at("stale_rows").get<int>(), 0);
  EXPECT_NE(r.err.find("tile_11 (failed)"), std::string::npos) << r.err;
  // Repaired: retried on the next run, and the catalogue is the local one again.
  write_file(tile, good);
  r = run_skerry({"survey", cfg, "--engine", "slurm"});
  EXPECT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(read_file(ds + kCatalogue), read_file(dl + kCatalogue));
  // A failing partition task (its result name squatted by a folder): exit 6, a
  // merge_failed event naming the partition and its Slurm task, no catalogue;
  // the next run submits that partition alone and completes.
  {
    std::vector<fs::path> pf;
    for (const auto& e : fs::directory_iterator(ds + "/out/merge/parts")) pf.push_back(e.path());
    ASSERT_EQ(pf.size(), 1u);
    const auto plan = json::parse(read_file((pf[0] / "plan.json").string()));
    const std::string px = std::to_string(plan.at("partitions").at(1).at("pixel").get<std::int64_t>());
    fs::remove(pf[0] / ("p" + px + ".json"));
    fs::remove(pf[0] / ("p" + px + ".stab"));
    fs::create_directories(pf[0] / ("p" + px + ".stab") / "squatter");
    fs::remove(ds + kCatalogue);
    r = run_skerry({"survey", cfg, "--engine", "slurm"});
    EXPECT_EQ(r.code, 6) << r.err;
    EXPECT_FALSE(fs::exists(ds + kCatalogue));
    const auto mf = last_run_events(ds + "/out", "merge_failed");
    ASSERT_EQ(mf.size(), 1u);
    const std::string msg = json::parse(mf[0]).at("message").get<std::string>();
    EXPECT_NE(msg.find("merge partition " + px + " (Slurm task "), std::string::npos) << msg;
    EXPECT_NE(r.err.find("merge partition " + px), std::string::npos) << r.err;
    fs::remove_all(pf[0] / ("p" + px + ".stab"));
    r = run_skerry({"survey", cfg, "--engine", "slurm"});
    EXPECT_EQ(r.code, 0) << r.err;
    EXPECT_EQ(read_file(ds + kCatalogue), read_file(dl + kCatalogue));
    std::set<std::string> part_jobs;
    const auto parts = partition_tasks(run_dir(), part_jobs);
    EXPECT_EQ(parts, (std::multiset<std::string>{px}));  // only the failed one was redone
  }
  // A controller killed (-9) while its jobs run: the next run exits busy until
  // they have ended, then completes the work.
  const int pid = start_skerry({"survey", cfg, "--engine", "slurm", "--force"}, ds);
  bool submitted = false;
  for (int i = 0; i < 3000 && !submitted; ++i) {
    for (const auto& run : fs::directory_iterator(ds + "/out/slurm"))
      submitted |= fs::exists(run.path() / "jobs.json") && run.path().filename().string().find(std::to_string(pid)) != std::string::npos;
    if (!submitted) std::this_thread::sleep_for(std::chrono::milliseconds(5));
  }
  ASSERT_TRUE(submitted);
  ::kill(pid, SIGKILL);
  wait_skerry(pid);
  r = run_skerry({"survey", cfg, "--engine", "slurm"});
  EXPECT_EQ(r.code, 7) << r.err;
  EXPECT_NE(r.err.find("of an earlier run"), std::string::npos) << r.err;
  for (int i = 0; i < 600 && r.code == 7; ++i) {
    std::this_thread::sleep_for(std::chrono::milliseconds(200));
    r = run_skerry({"survey", cfg, "--engine", "slurm"});
  }
  EXPECT_TRUE(r.code == 0 || r.code == 5) << r.err;
  EXPECT_EQ(read_file(ds + kCatalogue), read_file(dl + kCatalogue));
}
