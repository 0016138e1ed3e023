// Determinism (docs/CONVENTIONS.md "Determinism", common practice): the same inputs give
// byte-identical catalogues and images whatever the thread count, and on every
// repeated run. Time stamps and host names belong only in the run record
// (NAME.run.json), the one file not compared. Raw bytes are compared, FITS
// CHECKSUM/DATASUM cards included.
#include <gtest/gtest.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <map>
#include <sstream>
#include <string>
#include <vector>
#include "skerry_test_support.h"

namespace {

namespace fs = std::filesystem;

int run(const std::string& args, const fs::path& dir) {
  const std::string cmd = std::string(SKERRY_BINARY) + " " + args + " > /dev/null 2> " + (dir / "stderr.txt").string();
  return skerry::test::shell(cmd);
}

using skerry::test::slurp;

/// Every file of a folder (relative name -> bytes), the run records left out.
std::map<std::string, std::string> contents(const fs::path& dir) {
  std::map<std::string, std::string> m;
  for (const auto& e : fs::recursive_directory_iterator(dir)) {
    if (!e.is_regular_file()) continue;
    const std::string rel = fs::relative(e.path(), dir).string();
    if (rel.ends_with(".run.json")) continue;
    m[rel] = slurp(e.path());
  }
  return m;
}

void expect_same(const fs::path& ref, const fs::path& other, std::size_t min_files) {
  const auto a = contents(ref), b = contents(other);
  EXPECT_GE(a.size(), min_files) << ref;
  std::vector<std::string> na, nb;
  for (const auto& [k, v] : a) na.push_back(k);
  for (const auto& [k, v] : b) nb.push_back(k);
  ASSERT_EQ(na, nb) << "different file sets in " << ref << " and " << other;
  for (const auto& [k, v] : a) EXPECT_TRUE(v == b.at(k)) << k << " differs between " << ref << " and " << other;
}

class TempDir {
 public:
  TempDir() {
    std::string t = (fs::temp_directory_path() / "skerry-determinism-XXXXXX").string();
    if (!::mkdtemp(t.data())) throw std::runtime_error("mkdtemp failed");
    path_ = t;
  }
  ~TempDir() {
    std::error_code ec;
    fs::remove_all(path_, ec);
  }
  fs::path operator/(const std::string& f) const { return path_ / f; }
  const fs::path& path() const { return path_; }

 private:
  fs::path path_;
};

// One small simulated field (two bands) drives all three commands.
const std::string kSim =
    "simulate --field.size_pix 192 --bands.freq_mhz 1000,2000 --sources.count 30 "
    "--sources.double_fraction 0.2 --primary_beam.fwhm_deg 0.15 --primary_beam.blank_below 0.1";

TEST(Determinism, SimulateExtractBandsForOneTwoEightThreadsAndRepeatedRuns) {
  TempDir d;
  // simulate: 1 and 8 threads.
  for (const char* th : {"1", "8"})
    ASSERT_EQ(run(kSim + " --out " + (d / ("sim" + std::string(th))).string() + " --threads " + th, d.path()), 0)
        << slurp(d / "stderr.txt");
  expect_same(d / "sim1", d / "sim8", 3);

  std::vector<fs::path> images;
  for (const auto& e : fs::directory_iterator(d / "sim1"))
    if (e.path().extension() == ".fits" && e.path().filename().string().find("MHz") != std::string::npos &&
        e.path().filename().string().find("pb") == std::string::npos)
      images.push_back(e.path());
  std::sort(images.begin(), images.end());
  ASSERT_EQ(images.size(), 2u) << "expected one image per band in " << d / "sim1";

  // extract: 1, 2, 8 threads and a repeated 1-thread run; every output file.
  for (const char* tag : {"1", "2", "8", "1again"}) {
    const std::string th = std::string(tag).substr(0, 1);
    ASSERT_EQ(run("extract " + images[0].string() + " --out " + (d / ("ex" + std::string(tag))).string() +
                      " --threads " + th,
                  d.path()),
              0)
        << slurp(d / "stderr.txt");
  }
  for (const char* tag : {"2", "8", "1again"}) expect_same(d / "ex1", d / ("ex" + std::string(tag)), 10);

  // bands: 1 and 8 threads.
  for (const char* th : {"1", "8"})
    ASSERT_EQ(run("bands " + images[0].string() + " " + images[1].string() + " --out " +
                      (d / ("bands" + std::string(th))).string() + " --threads " + th,
                  d.path()),
              0)
        << slurp(d / "stderr.txt");
  expect_same(d / "bands1", d / "bands8", 3);
}

}  // namespace
