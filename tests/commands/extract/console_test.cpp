// What `skerry extract` prints at each verbosity (pipeline/app/console.h), run
// as a user runs it from cron (stdout and stderr are pipes here, not a
// terminal). The catalogue must not depend on the verbosity; --quiet leaves
// errors and warnings only, --verbose adds a line per stage with its wall time.
// The rule (a cron job mails whatever a command prints, so a quiet mode prints
// only what needs attention) is common practice for unattended jobs.
#include <gtest/gtest.h>

#include <algorithm>
#include <filesystem>
#include <string>
#include <tuple>
#include <utility>
#include <vector>

#include "extract_helpers.h"

namespace skerry::test {
namespace {

namespace fs = std::filesystem;

TEST(ExtractConsole, QuietNormalVerbose) {
  TempDir tmp("console");
  const Beam beam{6.0, 5.0, 20.0};
  const std::string img = tmp / "field.fits";
  write_point_field(img, 120, 2.0, beam, 1e-4, 30, 5.0, 8, 12,
                    [](std::size_t i, auto&) { return 20.0 + 5.0 * static_cast<double>(i); });
  auto run = [&](const std::vector<std::string>& before, const std::vector<std::string>& after, const std::string& out) {
    std::vector<std::string> a = before;
    for (const std::string& x : std::vector<std::string>{"extract", img, "--out", tmp / out, "--threads", "2",
                                                          "--output.formats", "csv"})
      a.push_back(x);
    a.insert(a.end(), after.begin(), after.end());
    return run_skerry(a, tmp.path());
  };
  auto catalogue = [&](const std::string& out) { return slurp(fs::path(tmp / out) / "field.components.csv"); };

  // normal: the one-line summary on stdout; nothing on stderr (no terminal).
  const RunResult normal = run({}, {}, "n");
  ASSERT_EQ(normal.code, 0) << normal.err;
  EXPECT_EQ(normal.out.rfind("extract field: ", 0), 0u) << normal.out;
  EXPECT_EQ(std::count(normal.out.begin(), normal.out.end(), '\n'), 1) << normal.out;
  EXPECT_EQ(normal.err, "");
  const std::string ref = catalogue("n");
  ASSERT_GT(ref.size(), 200u);

  // quiet, after or before the sub-command: nothing printed, the same catalogue.
  for (const auto& [before, after, out] : std::vector<std::tuple<std::vector<std::string>, std::vector<std::string>, std::string>>{
           {{}, {"--quiet"}, "q1"}, {{"-q"}, {}, "q2"}}) {
    const RunResult q = run(before, after, out);
    EXPECT_EQ(q.code, 0) << q.err;
    EXPECT_EQ(q.out, "");
    EXPECT_EQ(q.err, "");
    EXPECT_EQ(catalogue(out), ref);
  }

  // verbose: each stage as it starts and when it ends, with seconds; progress
  // lines although stderr is not a terminal; the same summary and catalogue.
  const RunResult v = run({}, {"--verbose"}, "v");
  ASSERT_EQ(v.code, 0) << v.err;
  EXPECT_EQ(v.out, normal.out.substr(0, normal.out.find(" in ")) + v.out.substr(v.out.find(" in "))) << v.out;
  for (const std::string stage : {"read", "noise_pass1", "islands", "fit", "catalogue", "write"}) {
    EXPECT_NE(v.err.find("skerry extract: " + stage + " ...\n"), std::string::npos) << stage << "\n" << v.err;
    EXPECT_NE(v.err.find("skerry extract: " + stage + " done in "), std::string::npos) << stage << "\n" << v.err;
  }
  EXPECT_NE(v.err.find("skerry extract: fitting islands 100% ("), std::string::npos) << v.err;
  EXPECT_EQ(v.err.find('\r'), std::string::npos) << "carriage returns in a log";
  EXPECT_EQ(catalogue("v"), ref);

  // both at once: refused (exit 2), one line naming both, nothing written.
  for (const auto& [before, after] : std::vector<std::pair<std::vector<std::string>, std::vector<std::string>>>{
           {{}, {"--quiet", "--verbose"}}, {{"-q", "-v"}, {}}}) {
    const RunResult b = run(before, after, "b");
    EXPECT_EQ(b.code, 2) << b.err;
    EXPECT_NE(b.err.find("--quiet and --verbose"), std::string::npos) << b.err;
    EXPECT_EQ(std::count(b.err.begin(), b.err.end(), '\n'), 1) << b.err;
    EXPECT_FALSE(fs::exists(tmp / "b"));
  }

  // An error is printed whatever the verbosity.
  const RunResult e = run_skerry({"--quiet", "extract", tmp / "missing.fits", "--out", tmp / "e"}, tmp.path());
  EXPECT_EQ(e.code, 3);
  EXPECT_NE(e.err.find("missing.fits"), std::string::npos) << e.err;
}

}  // namespace
}  // namespace skerry::test
