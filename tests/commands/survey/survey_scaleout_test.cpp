// The on-disk merge of `skerry survey` (scatter -> partition merge ->
// concatenation, pipeline/survey/merge.cpp) end to end on the small simulated survey:
// byte-identical to the in-memory merge in every catalogue format, independent
// of the worker count, complete after kill -9 between its steps, and a failed
// partition is reported and retried. The tiles of each test are processed once;
// the merge is redone by removing the catalogue (the merge fingerprint excludes
// survey.merge_in_memory_rows and the partition order, which change no byte).
#include <gtest/gtest.h>
#include <sys/stat.h>

#include <cstdlib>
#include <filesystem>
#include <nlohmann/json.hpp>
#include <set>

#include "io/atomic_file.h"
#include "io/table_io.h"
#include "survey_fixture.h"

using namespace skerry::testing;
namespace fs = std::filesystem;
using nlohmann::json;

namespace {

/// A survey folder whose tiles are processed once; `merge(extra)` rewrites the
/// configuration with `extra` INI lines, removes the catalogue and runs again,
/// so only the merge runs.
struct MergeBench {
  std::string dir, cfg, base;
  explicit MergeBench(const std::string& name, const std::string& extra = "") {
    dir = fresh_dir(name);
    cfg = make_survey(dir);
    base = read_file(cfg);
    write_file(cfg, base + extra);
  }
  /// `base` with its [survey] catalogue line set to `catalogue`.
  void set_catalogue(const std::string& catalogue) {
    const std::string key = "\ncatalogue = ";
    const auto p = base.find(key);
    ASSERT_NE(p, std::string::npos);
    base.replace(p + 1, base.find('\n', p + 1) - p, "catalogue = " + catalogue + "\n");
  }
  RunResult merge(const std::string& extra, const std::string& catalogue, bool remove_merge_folder = false) {
    write_file(cfg, base + extra);
    std::error_code ec;
    fs::remove(dir + "/out/" + catalogue, ec);
    if (remove_merge_folder) fs::remove_all(dir + "/out/merge", ec);
    return run_skerry({"survey", cfg});
  }
  std::string catalogue(const std::string& name) const { return read_file(dir + "/out/" + name); }
  json summary(const std::string& stem) const { return json::parse(read_file(dir + "/out/" + stem + ".merge.json")); }
};

bool any_temporary_left(const std::string& root) {
  for (const auto& e : fs::recursive_directory_iterator(root))
    if (skerry::is_temporary_name(e.path().filename().string())) return true;
  return false;
}

/// The partition folder of the current merge (merge/parts/FP; one after a merge).
fs::path parts_folder(const std::string& out) {
  std::vector<fs::path> v;
  for (const auto& e : fs::directory_iterator(out + "/merge/parts")) v.push_back(e.path());
  EXPECT_EQ(v.size(), 1u);
  return v.empty() ? fs::path() : v.front();
}

std::vector<std::int64_t> partition_pixels(const fs::path& parts) {
  std::vector<std::int64_t> px;
  const json plan = json::parse(read_file((parts / "plan.json").string()));
  for (const auto& e : plan.at("partitions"))
    px.push_back(e.at("pixel").get<std::int64_t>());
  return px;
}

}  // namespace

// The concatenation streams the partition results into CSV, FITS and VOTable;
// each must be byte-identical to the whole-table writer's file (the in-memory
// merge). Partition order 9 cuts the 16' field into many partitions.
TEST(SurveyScaleOut, OnDiskMergeIsByteIdenticalToInMemory) {
  MergeBench b("scale-formats", "[survey]\npartition_order = 9\n");
  ASSERT_EQ(run_skerry({"survey", b.cfg}).code, 0);
  for (const std::string name : {"m.components.csv", "m.components.fits", "m.components.vot"}) {
    b.set_catalogue(name);
    const std::string cat = "[survey]\npartition_order = 9\n";
    auto r = b.merge(cat + "merge_in_memory_rows = 1000000\n", name);
    ASSERT_EQ(r.code, 0) << name << ": " << r.err;
    const std::string in_memory = b.catalogue(name);
    EXPECT_FALSE(b.summary("m.components").contains("merge")) << "in-memory merge expected";
    r = b.merge(cat + "merge_in_memory_rows = 0\n", name);
    ASSERT_EQ(r.code, 0) << name << ": " << r.err;
    const auto s = b.summary("m.components");
    EXPECT_EQ(s.value("merge", std::string()), "on disk");
    EXPECT_GT(s.at("partitions").get<int>(), 4) << "the test needs several partitions";
    EXPECT_GT(s.at("rows").get<int>(), 30);
    EXPECT_EQ(b.catalogue(name), in_memory) << name;
    // The partition folder holds one result per partition of the plan.
    const fs::path parts = parts_folder(b.dir + "/out");
    const auto px = partition_pixels(parts);
    EXPECT_EQ(px.size(), s.at("partitions").get<std::size_t>());
    for (auto p : px) EXPECT_TRUE(fs::exists(parts / ("p" + std::to_string(p) + ".stab"))) << p;
  }
  // FITS output read back by astropy (an independent FITS reader, verifying the
  // CHECKSUM/DATASUM cards of the FITS checksum convention, FITS Standard 4.0
  // Appendix J): rows and the designation column agree with the CSV catalogue.
  const auto csv = skerry::read_table(b.dir + "/out/m.components.csv");
  const std::string py = b.dir + "/rows.py";
  write_file(py,
             "import sys, warnings\nfrom astropy.io import fits\n"
             "warnings.simplefilter('error')  # a checksum mismatch warns: make it fail\n"
             "d = fits.open(sys.argv[1], checksum=True)[1].data\n"
             "print(len(d))\nprint(d['designation'][0].strip())\nprint(d['designation'][-1].strip())\n");
  const std::string out = b.dir + "/rows.txt";
  ASSERT_EQ(std::system(("/usr/bin/python3 " + py + " " + b.dir + "/out/m.components.fits > " + out + " 2>/dev/null").c_str()), 0);
  EXPECT_EQ(read_file(out), std::to_string(csv.rows()) + "\n" + csv.at("designation").text.front() + "\n" +
                                csv.at("designation").text.back() + "\n");
}

// Determinism of the on-disk merge: 1 or 2 workers and partition orders 0, 6
// and 9 give the same bytes.
TEST(SurveyScaleOut, OnDiskMergeIndependentOfWorkersAndPartitions) {
  MergeBench b("scale-workers", "[survey]\nmerge_in_memory_rows = 0\n");
  ASSERT_EQ(run_skerry({"survey", b.cfg, "--threads", "2"}).code, 0);
  const std::string cat = "lanternfish.components.csv";
  const std::string want = b.catalogue(cat);
  ASSERT_FALSE(want.empty());
  for (const std::string order : {"0", "6", "9"}) {
    for (const std::string threads : {"1", "2"}) {
      write_file(b.cfg, b.base + "[survey]\nmerge_in_memory_rows = 0\npartition_order = " + order + "\n");
      fs::remove(b.dir + "/out/" + cat);
      auto r = run_skerry({"survey", b.cfg, "--threads", threads});
      ASSERT_EQ(r.code, 0) << r.err;
      EXPECT_EQ(b.catalogue(cat), want) << "order " << order << ", " << threads << " workers";
    }
  }
}

// kill -9 right after each step of the on-disk merge (scatter; one partition;
// all partitions; the catalogue written but the state record not yet updated),
// then rerun: it completes, gives the uninterrupted catalogue, and leaves no
// temporary file. The kill comes from SKERRY_SURVEY_KILL_AFTER (fault
// injection, DEVELOPERS.md), so each point is hit exactly. Each round renames
// the survey ([survey] name), which changes the merge fingerprint (a merge is
// due, with a fresh partition folder) but not the CSV catalogue's bytes.
TEST(SurveyScaleOut, KillNineBetweenMergeStepsThenRerun) {
  MergeBench b("scale-kill", "[survey]\nmerge_in_memory_rows = 0\npartition_order = 9\n");
  ASSERT_EQ(run_skerry({"survey", b.cfg}).code, 0);
  const std::string cat = "lanternfish.components.csv";
  const std::string want = b.catalogue(cat);
  for (const std::string step : {"scatter", "partition", "partitions", "concat"}) {
    const std::string extra = "[survey]\nmerge_in_memory_rows = 0\npartition_order = 9\n";
    const auto at = b.base.find("\nname = ") + 1;
    b.base.replace(at, b.base.find('\n', at) + 1 - at, "name = kill_" + step + "\n");
    ::setenv("SKERRY_SURVEY_KILL_AFTER", step.c_str(), 1);
    auto r = b.merge(extra, cat, /*remove_merge_folder=*/step == "scatter");
    ::unsetenv("SKERRY_SURVEY_KILL_AFTER");
    EXPECT_EQ(r.code, 128 + 9) << step << ": " << r.err;
    EXPECT_EQ(fs::exists(b.dir + "/out/" + cat), step == "concat") << step;
    r = run_skerry({"survey", b.cfg});
    EXPECT_EQ(r.code, 0) << step << ": " << r.err;
    EXPECT_EQ(b.catalogue(cat), want) << "killed after " << step;
    EXPECT_FALSE(any_temporary_left(b.dir + "/out")) << step;
    EXPECT_EQ(run_skerry({"survey", b.cfg}).code, 5) << step;
  }
}

// A partition whose result cannot be written fails alone: exit 6, a one-line
// message naming the partition, a merge_failed event, no catalogue written;
// the partitions that succeeded are kept, and the next run merges only the
// failed one and completes with the same catalogue.
TEST(SurveyScaleOut, FailedPartitionIsReportedAndRetried) {
  MergeBench b("scale-fail", "[survey]\nmerge_in_memory_rows = 0\npartition_order = 9\n");
  ASSERT_EQ(run_skerry({"survey", b.cfg}).code, 0);
  const std::string cat = "lanternfish.components.csv";
  const std::string want = b.catalogue(cat);
  const fs::path parts = parts_folder(b.dir + "/out");
  const auto px = partition_pixels(parts);
  ASSERT_GE(px.size(), 2u);
  const std::string bad = "p" + std::to_string(px[px.size() / 2]);
  const std::string good = "p" + std::to_string(px.front());
  // Squat the failed partition's result name with a folder: its rename fails.
  fs::remove(parts / (bad + ".json"));
  fs::remove(parts / (bad + ".stab"));
  fs::create_directories(parts / (bad + ".stab") / "squatter");
  fs::remove(b.dir + "/out/" + cat);
  struct stat before {};
  ASSERT_EQ(::stat((parts / (good + ".json")).c_str(), &before), 0);
  auto r = run_skerry({"survey", b.cfg});
  EXPECT_EQ(r.code, 6) << r.err;
  EXPECT_EQ(std::count(r.err.begin(), r.err.end(), '\n'), 1) << r.err;
  EXPECT_NE(r.err.find("merge partition " + bad.substr(1) + " failed"), std::string::npos) << r.err;
  EXPECT_FALSE(fs::exists(b.dir + "/out/" + cat));
  const auto ev = last_run_events(b.dir + "/out", "merge_failed");
  ASSERT_EQ(ev.size(), 1u);
  EXPECT_NE(json::parse(ev[0]).at("message").get<std::string>().find(bad.substr(1)), std::string::npos);
  // Repaired: the next run completes; the partition that had succeeded was not redone.
  fs::remove_all(parts / (bad + ".stab"));
  r = run_skerry({"survey", b.cfg});
  EXPECT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(b.catalogue(cat), want);
  struct stat after {};
  ASSERT_EQ(::stat((parts / (good + ".json")).c_str(), &after), 0);
  EXPECT_EQ(after.st_mtim.tv_sec, before.st_mtim.tv_sec);
  EXPECT_EQ(after.st_mtim.tv_nsec, before.st_mtim.tv_nsec);
  EXPECT_EQ(run_skerry({"survey", b.cfg}).code, 5);
}

// A damaged intermediate is an error naming the file, never garbage: a scatter
// file cut short fails its partition (exit 6); the next run scatters that tile
// again and completes with the same catalogue.
TEST(SurveyScaleOut, TruncatedScatterFileIsNamed) {
  MergeBench b("scale-trunc", "[survey]\nmerge_in_memory_rows = 0\npartition_order = 9\n");
  ASSERT_EQ(run_skerry({"survey", b.cfg}).code, 0);
  const std::string cat = "lanternfish.components.csv";
  write_file(b.dir + "/ref.csv", b.catalogue(cat));
  std::string victim;
  for (const auto& e : fs::directory_iterator(b.dir + "/out/merge/scatter/tile_00"))
    if (e.path().filename().string().rfind("p", 0) == 0) victim = e.path().string();
  ASSERT_FALSE(victim.empty());
  const std::string bytes = read_file(victim);
  write_file(victim, bytes.substr(0, bytes.size() - 9));
  fs::remove_all(parts_folder(b.dir + "/out"));
  fs::remove(b.dir + "/out/" + cat);
  auto r = run_skerry({"survey", b.cfg});
  EXPECT_EQ(r.code, 6) << r.err;
  EXPECT_NE(r.err.find(victim + ": not a complete skerry binary table"), std::string::npos) << r.err;
  EXPECT_FALSE(fs::exists(b.dir + "/out/" + cat));
  const std::string want = read_file(b.dir + "/ref.csv");
  r = run_skerry({"survey", b.cfg});
  EXPECT_EQ(r.code, 0) << r.err;
  EXPECT_EQ(b.catalogue(cat), want);
}
