// skerry report / skerry completeness end to end: a simulated run folder, the page
// loaded in a real headless browser, its numbers against direct counts, bad input,
// completeness on pure correlated noise.
#include <gtest/gtest.h>

#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <map>
#include <regex>
#include <sstream>
#include <string>

#include "io/fits_image.h"
#include "io/table_io.h"
#include "skerry/plot.h"
#include "skerry_test_support.h"

namespace fs = std::filesystem;

namespace skerry {
namespace {

struct Cmd { int code; std::string out, err; };

using test::slurp;

Cmd run(const std::string& args, const fs::path& tmp) {
  const std::string o = (tmp / "cmd.out").string(), e = (tmp / "cmd.err").string();
  const int rc = test::shell(args + " >" + o + " 2>" + e + " </dev/null");
  return {rc, slurp(o), slurp(e)};
}

std::string skerry() { return test::skerry_binary(); }

fs::path fresh_dir(const std::string& name) {
  const fs::path d = fs::temp_directory_path() / ("skerry_report_test_" + name + "_" + std::to_string(::getpid()));
  fs::remove_all(d);
  fs::create_directories(d);
  return d;
}

// One simulated band of the invented Lanternfish Field: 768 x 768 pixels of 1.5", one
// band at 1400 MHz, no primary beam, no background; `extra` adds options.
void simulate(const fs::path& dir, const std::string& extra) {
  const Cmd c = run(skerry() + " simulate --out " + dir.string() + " --bands.freq_mhz 1400 --noise.rms_jy_per_beam 2e-5"
                    " --field.size_pix 768 --primary_beam.fwhm_deg 0 --background.amplitude_jy_per_beam 0"
                    " --bands.crpix_shift_pix 0 --output.name field " + extra, dir);
  ASSERT_EQ(c.code, 0) << c.err;
}

std::vector<std::vector<double>> html_table(const std::string& html, const std::string& id) {
  std::vector<std::vector<double>> rows;
  const auto a = html.find("id=\"" + id + "\"");
  if (a == std::string::npos) return rows;
  const auto b = html.find("</table>", a);
  const std::string t = html.substr(a, b - a);
  std::regex tr("<tr>(.*?)</tr>"), td("<td>([^<]*)</td>");
  for (std::sregex_iterator it(t.begin(), t.end(), tr), end; it != end; ++it) {
    const std::string r = (*it)[1];
    std::vector<double> v;
    for (std::sregex_iterator jt(r.begin(), r.end(), td); jt != end; ++jt) v.push_back(std::stod((*jt)[1]));
    if (!v.empty()) rows.push_back(v);
  }
  return rows;
}

class ReportRun : public ::testing::Test {
 protected:
  static void SetUpTestSuite() {
    dir_ = fresh_dir("run");
    simulate(dir_, "--sources.count 300 --sources.slope 2.5 --sources.s_min_jy 1e-4 --sources.s_max_jy 0.05");
    const Cmd e = run(skerry() + " extract " + (dir_ / "field_1400MHz.fits").string() + " --out " + (dir_ / "run").string(), dir_);
    ASSERT_EQ(e.code, 0) << e.err;
    const Cmd r = run(skerry() + " report " + (dir_ / "run").string(), dir_);
    ASSERT_EQ(r.code, 0) << r.err;
    page_ = dir_ / "run" / "field_1400MHz.report.html";
    html_ = slurp(page_);
  }
  static void TearDownTestSuite() { fs::remove_all(dir_); }
  static fs::path dir_, page_;
  static std::string html_;
};
fs::path ReportRun::dir_, ReportRun::page_;
std::string ReportRun::html_;

TEST_F(ReportRun, SelfContained) {
  ASSERT_FALSE(html_.empty());
  // One inline script (the map viewer) and its JSON data block; nothing loaded from elsewhere.
  EXPECT_EQ(html_.find("<script src"), std::string::npos);
  EXPECT_EQ(html_.find("<link"), std::string::npos);
  EXPECT_NE(html_.find("id=\"vw-data\""), std::string::npos);
  EXPECT_EQ(html_.find("http://"), html_.find("http://www.w3.org/2000/svg"));  // only the SVG namespace name
  EXPECT_EQ(html_.find("https://"), std::string::npos);
  EXPECT_NE(html_.find("data:image/png;base64,"), std::string::npos);
}

TEST_F(ReportRun, CountsMatchDirectCountOfCatalogue) {
  // A source counts by the sum over its components of the peak (unresolved) or the
  // integrated flux density (resolved): computed here from the two tables directly.
  const Table s = read_table((dir_ / "run" / "field_1400MHz.sources.csv").string());
  const Table c = read_table((dir_ / "run" / "field_1400MHz.components.csv").string());
  std::map<std::int64_t, double> by_source;
  std::size_t n_resolved = 0, n_unresolved = 0;
  for (std::size_t i = 0; i < c.rows(); ++i) {
    const bool res = c.at("resolved").i64[i] != 0;
    (res ? n_resolved : n_unresolved)++;
    by_source[c.at("source_id").i64[i]] += res ? c.at("s_int_jy").f64[i] : c.at("s_peak_jy_per_beam").f64[i];
  }
  EXPECT_GT(n_resolved, 0u);
  EXPECT_GT(n_unresolved, 0u);
  std::vector<double> f;
  for (std::size_t i = 0; i < s.rows(); ++i) f.push_back(by_source.at(s.at("source_id").i64[i]));
  const auto rows = html_table(html_, "counts-table");
  ASSERT_GE(rows.size(), 3u);
  std::size_t total = 0;
  for (auto r : rows) {
    ASSERT_EQ(r.size(), 8u);
    std::size_t n = 0;
    // The table is in the plot's units: S in mJy, area in deg^2 (1 sr = (180/pi)^2 deg^2).
    r[0] *= 1e-3;
    r[1] *= 1e-3;
    r[4] /= std::pow(180.0 / M_PI, 2);
    for (double v : f) if (v >= r[0] && v < r[1]) ++n;  // direct count in [lo, hi)
    EXPECT_EQ(static_cast<std::size_t>(r[3]), n) << "bin " << r[0];
    total += n;
    // Definition (common practice): S_c^2.5 N / (A dS), S_c = sqrt(lo hi).
    if (r[4] == 0) {
      EXPECT_TRUE(std::isnan(r[5])) << "no visibility area: no value";  // sources below every pixel's threshold
    } else if (n > 0) {
      // Printed to 4 significant digits (area and value), 6 (edges).
      EXPECT_NEAR(r[5], std::pow(std::sqrt(r[0] * r[1]), 2.5) * n / (r[4] * (r[1] - r[0])), 2e-3 * r[5]);
    }
  }
  EXPECT_GT(total, 50u);
}

TEST_F(ReportRun, VisibilityAreaMatchesRmsMap) {
  ImageReadOptions ro;
  ro.require_beam = false;
  const SkyImage rms = read_sky_image((dir_ / "run" / "field_1400MHz.rms_map.fits").string(), ro);
  // Pixel solid angle at the tangent point: |CDELT1 CDELT2| (FITS WCS Paper II, SIN at the
  // reference point); 1.5" pixels of the simulation.
  const double pix_sr = std::pow(1.5 / 206264.80624709636, 2);
  const auto rows = html_table(html_, "visibility-table");
  ASSERT_GE(rows.size(), 5u);
  for (auto r : rows) {
    // The table is in the plot's units: mJy/beam and deg^2.
    r[0] *= 1e-3;
    r[1] /= std::pow(180.0 / M_PI, 2);
    std::size_t n = 0;
    for (Eigen::Index i = 0; i < rms.pixels.size(); ++i)
      if (std::isfinite(rms.pixels.data()[i]) && rms.pixels.data()[i] <= static_cast<float>(r[0])) ++n;
    // 1e-4: the pixel area off the tangent point; 1e-5: the area printed to 6 digits;
    // a pixel count of 1e-5 of the map plus one: pixels at the printed (rounded to 6
    // digits) rms value may fall on either side of it.
    EXPECT_NEAR(r[1], n * pix_sr, 1e-4 * n * pix_sr + 1e-5 * r[1] + (1.01 + 1e-5 * rms.pixels.size()) * pix_sr) << "rms " << r[0];
  }
  EXPECT_NEAR(rows.back()[1] / std::pow(180.0 / M_PI, 2), static_cast<double>(rms.pixels.size()) * pix_sr, 1e-4 * rows.back()[1] / std::pow(180.0 / M_PI, 2));
}

TEST_F(ReportRun, RendersInHeadlessBrowser) {
  const char* req = std::getenv("SKERRY_REQUIRE_BROWSER");
  const bool required = req && std::string(req) == "1";
  std::string browser;
  for (const char* b : {"/usr/bin/chromium", "/usr/bin/chromium-browser"}) if (fs::exists(b)) { browser = b; break; }
  if (browser.empty()) {
    if (required) FAIL() << "chromium not found but SKERRY_REQUIRE_BROWSER=1";
    GTEST_SKIP() << "chromium not installed: the page was not rendered (install chromium, or set SKERRY_REQUIRE_BROWSER=1 to fail)";
  }
  const fs::path prof = dir_ / "profile";
  const std::string flags = " --headless --no-sandbox --disable-gpu --disable-quic --no-first-run --disable-background-networking"
                            " --disable-component-update --disable-sync --user-data-dir=" + prof.string() +
                            " --window-size=1400,4000 ";
  const fs::path png = dir_ / "page.png";
  const Cmd shot = run(browser + flags + "--screenshot=" + png.string() + " file://" + page_.string(), dir_);
  ASSERT_EQ(shot.code, 0) << shot.err;
  ASSERT_TRUE(fs::exists(png)) << shot.err;
  const Cmd dom = run(browser + flags + "--dump-dom file://" + page_.string(), dir_);
  ASSERT_EQ(dom.code, 0) << dom.err;
  // The browser parsed the page into the expected elements.
  for (const char* id : {"vw-canvas", "vw-btn-image", "vw-btn-residual", "vw-btn-rms", "gallery", "plot-counts", "plot-visibility", "plot-rms-hist",
                         "plot-ratio", "plot-fluxerr", "provenance", "counts-table"})
    EXPECT_NE(dom.out.find(std::string("id=\"") + id + "\""), std::string::npos) << id;
  EXPECT_NE(dom.out.find("</html>"), std::string::npos);
  EXPECT_EQ(dom.out.find("This page isn"), std::string::npos);  // no browser error page
  // The screenshot is not blank: pixel variance well above zero.
  const std::string bytes = slurp(png);
  const plot::Raster r = plot::decode_png(std::vector<std::uint8_t>(bytes.begin(), bytes.end()));
  ASSERT_GT(r.width, 100);
  double s = 0, s2 = 0;
  for (auto v : r.rgb) { s += v; s2 += double(v) * v; }
  const double n = static_cast<double>(r.rgb.size()), var = s2 / n - (s / n) * (s / n);
  EXPECT_GT(var, 100.0) << "screenshot looks blank";
}

// A likelihood-ratio counterpart identification and an ordinary match beside the run,
// written here with known values (the column names and JSON keys of skerry match).
// The page must draw n(m) and q(m), the Q0 fit and the reliabilities, state the
// numbers of the files, carry the summary's warnings, and keep the flux-scale
// warning for the ordinary match only.
TEST_F(ReportRun, LikelihoodRatioMatchSection) {
  const fs::path rd = dir_ / "run";
  const std::string lr = "field_1400MHz_optical", plain = "field_1400MHz_reference";
  // Candidates: four radio sources, three identified at R > 0.8.
  { std::ofstream(rd / (lr + ".lr_candidates.csv"))
        << "row_a,row_b,sep_arcsec,reliability,best,identified\n0,10,0.4,0.95,1,1\n1,11,0.7,0.90,1,1\n"
           "2,12,1.1,0.85,1,1\n3,13,2.5,0.30,1,0\n3,14,3.0,0.02,0,0\n"; }
  { std::ofstream(rd / (lr + ".lr_magnitude_bins.csv"))
        << "mag_lo,mag_hi,total,background,n_m_per_deg2_per_mag,real,q_m_per_mag\n"
           "18,19,2,10,1200,1.5,0.2\n19,20,2,40,4800,1.2,0.3\n20,21,1,90,10800,0.1,0.1\n"; }
  { std::ofstream(rd / (lr + ".lr_q0_fit.csv"))
        << "radius_arcsec,blank_a,blank_background,f_r_mean,model_ratio\n"
           "1,0.62,0.98,0.5,0.68825\n2,0.40,0.95,0.9,0.43894\n4,0.33,0.90,1.0,0.3766\n"; }
  // Sigma (1 - R) over the identified rows of the candidates above (REF-LR-01: the
  // expected number of false identifications among them).
  const Table cand = read_table((rd / (lr + ".lr_candidates.csv")).string());
  double false_ids = 0;
  int identified = 0;
  for (std::size_t i = 0; i < cand.rows(); ++i)
    if (cand.at("identified").i64[i]) { false_ids += 1 - cand.at("reliability").f64[i]; ++identified; }
  const double q0 = 0.6234;
  { std::ofstream(rd / (lr + ".match_summary.json"))
        << "{\"mode\":\"likelihood_ratio\",\"radius_arcsec\":4.0,\"counts\":{\"rows_a\":5,\"rows_a_used\":4,"
           "\"candidates\":" << cand.rows() << ",\"identified\":" << identified << "},\"likelihood_ratio\":{\"q0\":" << q0
        << ",\"q0_estimated\":true,\"q0_fit_rms\":0.012,\"reliability_threshold\":0.8,\"identified_expected_false\":"
        << false_ids << ",\"warnings\":[\"a warning of the likelihood-ratio run\"]}}\n"; }
  { std::ofstream(rd / (plain + ".match_summary.json")) << "{\"mode\":\"nearest\",\"radius_arcsec\":5.0}\n"; }
  const fs::path page = dir_ / "lr_page.html";
  const Cmd r = run(skerry() + " report " + rd.string() + " --report.output " + page.string(), dir_);
  ASSERT_EQ(r.code, 0) << r.err;
  const std::string html = slurp(page);
  for (const std::string id : {"plot-lr-nm-qm-", "plot-lr-q0-", "plot-lr-reliability-", "lr-summary-", "lr-bins-"})
    EXPECT_NE(html.find("id=\"" + id + lr + "\""), std::string::npos) << id;
  auto value = [&](const std::string& id) {
    std::smatch m;
    const std::regex re("id=\"lr-" + id + "-" + lr + "\">([^<]*)<");
    return std::regex_search(html, m, re) ? std::stod(m[1]) : -1.0;
  };
  EXPECT_NEAR(value("q0"), q0, 5e-5);                // printed to 4 decimals
  EXPECT_NEAR(value("false"), false_ids, 5e-3);      // printed to 2 decimals
  EXPECT_EQ(value("identified"), identified);
  EXPECT_EQ(value("candidates"), static_cast<double>(cand.rows()));
  EXPECT_EQ(value("searched"), 4.0);
  // The bins table repeats n(m) and q(m) of the file.
  const auto rows = html_table(html, "lr-bins-" + lr);
  ASSERT_EQ(rows.size(), 3u);
  EXPECT_NEAR(rows[1][2], 4800, 1e-9);
  EXPECT_NEAR(rows[1][3], 0.3, 1e-12);
  // Warnings: the summary's own, the flux-scale one only for the ordinary match.
  const std::string warn = html.substr(html.find("id=\"warnings\""), html.find("</div>", html.find("id=\"warnings\"")) - html.find("id=\"warnings\""));
  EXPECT_NE(warn.find("a warning of the likelihood-ratio run"), std::string::npos) << warn;
  EXPECT_NE(warn.find("Cross-match " + plain + ": the flux-scale check is off"), std::string::npos) << warn;
  EXPECT_EQ(warn.find(lr + ": the flux-scale check"), std::string::npos) << warn;
  for (const auto& f : {lr + ".lr_candidates.csv", lr + ".lr_magnitude_bins.csv", lr + ".lr_q0_fit.csv",
                        lr + ".match_summary.json", plain + ".match_summary.json"})
    fs::remove(rd / f);
}

// End to end: a simulated field with an optical-like counterpart catalogue, extract,
// match by likelihood ratio, report. The page states the numbers the match wrote.
TEST(ReportLikelihoodRatio, PageStatesTheMatchNumbers) {
  const fs::path d = fresh_dir("lr");
  simulate(d, "--sources.count 300 --sources.slope 2.5 --sources.s_min_jy 1e-4 --sources.s_max_jy 0.05"
              " --counterparts.density_deg2 1e5");
  const fs::path rd = d / "run";
  Cmd c = run(skerry() + " extract " + (d / "field_1400MHz.fits").string() + " --out " + rd.string(), d);
  ASSERT_EQ(c.code, 0) << c.err;
  c = run(skerry() + " match " + (rd / "field_1400MHz.components.csv").string() + " " + (d / "field.counterparts.csv").string() +
          " --out " + rd.string() + " --match.mode likelihood_ratio --match.radius_arcsec 5 --match.lr_mag_b mag"
          " --match.name field_1400MHz_optical --match.chance_shifts 0", d);
  ASSERT_EQ(c.code, 0) << c.err;
  c = run(skerry() + " report " + rd.string(), d);
  ASSERT_EQ(c.code, 0) << c.err;
  const std::string html = slurp(rd / "field_1400MHz.report.html"), base = "field_1400MHz_optical";
  const std::string js = slurp(rd / (base + ".match_summary.json"));
  auto json_number = [&](const std::string& key) {
    std::smatch m;
    return std::regex_search(js, m, std::regex("\"" + key + "\": ([-0-9.eE+]+)")) ? std::stod(m[1]) : -1.0;
  };
  auto page_number = [&](const std::string& id) {
    std::smatch m;
    return std::regex_search(html, m, std::regex("id=\"lr-" + id + "-" + base + "\">([^<]*)<")) ? std::stod(m[1]) : -2.0;
  };
  for (const std::string id : {"plot-lr-nm-qm-", "plot-lr-q0-", "plot-lr-reliability-", "lr-summary-"})
    EXPECT_NE(html.find("id=\"" + id + base + "\""), std::string::npos) << id;
  EXPECT_NEAR(page_number("q0"), json_number("q0"), 5e-5);
  // Identified rows and Sigma (1 - R) over them counted here from the candidates table.
  const Table cand = read_table((rd / (base + ".lr_candidates.csv")).string());
  double false_ids = 0;
  int identified = 0;
  for (std::size_t i = 0; i < cand.rows(); ++i)
    if (cand.at("identified").i64[i]) { false_ids += 1 - cand.at("reliability").f64[i]; ++identified; }
  EXPECT_GT(identified, 50);
  EXPECT_EQ(page_number("identified"), identified);
  EXPECT_EQ(page_number("candidates"), static_cast<double>(cand.rows()));
  EXPECT_NEAR(page_number("false"), false_ids, 5e-3 + 1e-9 * false_ids);
  EXPECT_EQ(html.find("flux-scale check is off"), std::string::npos);
  fs::remove_all(d);
}

TEST(ReportBadInput, FolderWithoutRun) {
  const fs::path d = fresh_dir("empty");
  const Cmd c = run(skerry() + " report " + d.string(), d);
  EXPECT_EQ(c.code, 3);
  EXPECT_NE(c.err.find("no run found"), std::string::npos) << c.err;
  EXPECT_EQ(c.err.find('\n'), c.err.size() - 1) << "one line: " << c.err;
  const Cmd m = run(skerry() + " report " + (d / "nope").string(), d);
  EXPECT_EQ(m.code, 3);
  EXPECT_NE(m.err.find("not a folder"), std::string::npos) << m.err;
  fs::remove_all(d);
}

TEST(ReportBadInput, MissingAndEmptyCatalogue) {
  const fs::path d = fresh_dir("nocat");
  simulate(d, "--sources.count 0");
  const Cmd e = run(skerry() + " extract " + (d / "field_1400MHz.fits").string() + " --out " + (d / "run").string(), d);
  ASSERT_TRUE(e.code == 0 || e.code == 8) << e.err;
  const fs::path runp = d / "run";
  // Pure noise at 5 sigma over 768^2 pixels may yield a false detection or two: empty the catalogue.
  std::string header = slurp(runp / "field_1400MHz.components.csv");
  header = header.substr(0, header.find('\n') + 1);
  { std::ofstream(runp / "field_1400MHz.components.csv") << header; }
  fs::remove(runp / "field_1400MHz.sources.csv");
  Cmd c = run(skerry() + " report " + runp.string(), d);
  EXPECT_EQ(c.code, 8) << c.err;
  EXPECT_NE(c.err.find("catalogue is empty"), std::string::npos) << c.err;
  std::string html = slurp(runp / "field_1400MHz.report.html");
  EXPECT_NE(html.find("is empty: nothing was detected"), std::string::npos);
  EXPECT_NE(html.find("id=\"warnings\""), std::string::npos);
  for (const auto& ent : fs::directory_iterator(runp)) {
    const std::string f = ent.path().filename().string();
    if (f.find(".components.") != std::string::npos) fs::remove(ent.path());
  }
  c = run(skerry() + " report " + runp.string(), d);
  EXPECT_EQ(c.code, 3) << c.err;
  EXPECT_NE(c.err.find("no component catalogue"), std::string::npos) << c.err;
  html = slurp(runp / "field_1400MHz.report.html");
  EXPECT_NE(html.find("no component catalogue field_1400MHz.components.csv"), std::string::npos);
  fs::remove_all(d);
}

}  // namespace
}  // namespace skerry
