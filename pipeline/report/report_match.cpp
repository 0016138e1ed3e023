// The report's cross-match sections (report_match.h). Everything drawn is read
// from the files `skerry match` wrote; the quantities of the likelihood-ratio
// identification are defined in REF-LR-01 (LR, reliability), REF-LR-02 (q(m),
// n(m)) and REF-LR-03 (Q0 from blank fractions).
#include "report/report_match.h"

#include <algorithm>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <limits>
#include <nlohmann/json.hpp>
#include <sstream>

#include "io/table_io.h"
#include "report/report_names.h"
#include "report/report_util.h"
#include "skerry/plot.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;
namespace rn = report_names;
namespace col = plot::colour;
using plot::Plot;
using plot::Series;
using plot::SeriesKind;
using plot::xml_escape;
using report_util::column;
using report_util::figure;
using report_util::fmt;
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
constexpr double kArcsec2PerDeg2 = 3600.0 * 3600.0;

/// `base + stem` as the first of .csv, .fits, .vot that exists ("" = none).
std::string table_path(const fs::path& dir, const std::string& base, const std::string& stem) {
  for (const char* ext : {".csv", ".fits", ".vot"})
    if (fs::exists(dir / (base + stem + ext))) return (dir / (base + stem + ext)).string();
  return "";
}

bool is_lr_match(const fs::path& dir, const std::string& base, const nlohmann::json& js) {
  return (js.contains("mode") && js["mode"] == "likelihood_ratio") || !table_path(dir, base, ".lr_magnitude_bins").empty();
}

double num(const nlohmann::json& j, const char* key) {
  return j.is_object() && j.contains(key) && j[key].is_number() ? j[key].get<double>() : kNaN;
}

/// j[key] when it is an object, else an empty object (a hand-edited summary does not crash the page).
nlohmann::json object_at(const nlohmann::json& j, const char* key) {
  return j.is_object() && j.contains(key) && j[key].is_object() ? j[key] : nlohmann::json::object();
}

// ------------------------------------------------------------ ordinary match

std::string offsets_html(const fs::path& matches, const std::string& base) {
  const Table m = read_table(matches.string());
  const auto sep = column(m, "sep_arcsec"), pa = column(m, "pa_deg");
  std::vector<double> de, dn, ed, c;
  for (std::size_t i = 0; i < m.rows(); ++i) {
    de.push_back(sep[i] * std::sin(pa[i] * M_PI / 180.0));  // east offset of B from A [arcsec]
    dn.push_back(sep[i] * std::cos(pa[i] * M_PI / 180.0));  // north offset [arcsec]
  }
  report_util::histogram(sep, 30, ed, c, 0.0, kNaN);
  Plot h;
  h.id = "plot-sep-" + base;
  h.title = "Separations";
  h.x_label = "separation [arcsec]";
  h.y_label = "pairs per bin";
  h.series.push_back({SeriesKind::Bars, ed, c, {}, {}, col::kSkyBlue, "", 2.5, 1.6, false});
  const double me = report_util::median(de), mn = report_util::median(dn);
  Plot s;
  s.id = "plot-offsets-" + base;
  s.title = "Position offsets (B − A)";
  s.x_label = "ΔRA cos Dec [arcsec]";
  s.y_label = "ΔDec [arcsec]";
  s.series.push_back({SeriesKind::Points, de, dn, {}, {}, col::kBlue, "", 2.0, 1.6, false});
  s.series.push_back({SeriesKind::Points, {me}, {mn}, {}, {}, col::kVermillion, "median", 5.0, 1.6, false});
  s.v_lines = {0.0};
  s.h_lines = {0.0};
  s.note = "median " + fmt("%+.3f", me) + ", " + fmt("%+.3f", mn) + " arcsec";
  return "<div class=\"row\">" + figure(plot::render_svg(h), std::to_string(m.rows()) + " matched pairs.") +
         figure(plot::render_svg(s), "Offsets on the sky (east, north) from sep and PA; large vermillion (orange-red) point: the median.") +
         "</div>\n";
}

// ------------------------------------------------------------ likelihood ratio

/// n(m) scaled to one search circle and q(m) against magnitude, and the bins as a table.
std::string lr_magnitude_html(const std::string& path, const std::string& base, double radius_arcsec,
                              std::string& out_table) {
  const Table t = read_table(path);
  const auto lo = column(t, "mag_lo"), hi = column(t, "mag_hi"), nm = column(t, "n_m_per_deg2_per_mag"),
             qm = column(t, "q_m_per_mag"), tot = column(t, "total"), bg = column(t, "background");
  const double circle_deg2 = M_PI * radius_arcsec * radius_arcsec / kArcsec2PerDeg2;
  std::vector<double> mid, n_circle;
  for (std::size_t i = 0; i < t.rows(); ++i) {
    mid.push_back(0.5 * (lo[i] + hi[i]));
    n_circle.push_back(nm[i] * circle_deg2);
  }
  Plot p;
  p.id = "plot-lr-nm-qm-" + base;
  p.title = "Background n(m) and counterparts q(m)";
  p.x_label = "magnitude of B [mag]";
  p.y_label = "objects per radio source per mag [mag⁻¹]";
  p.y_log = true;
  auto curve = [&](const std::vector<double>& y, const char* c, const char* label) {
    p.series.push_back({SeriesKind::Line, mid, y, {}, {}, c, "", 2.5, 1.8, false});
    p.series.push_back({SeriesKind::Points, mid, y, {}, {}, c, label, 3.0, 1.6, false});
  };
  curve(n_circle, col::kBlue, "n(m) π r² (background)");
  curve(qm, col::kVermillion, "q(m) (true counterparts)");
  const std::string cap =
      "Per magnitude bin: in blue, the background density n(m) (objects of B per deg² per mag, measured around "
      "shifted positions) times the search area π r² = " + fmt("%.3g", circle_deg2 * kArcsec2PerDeg2) +
      " arcsec², i.e. the unrelated objects expected within r of one radio source; in vermillion, q(m), the "
      "magnitude distribution of the true counterparts from the excess over that background (REF-LR-02), "
      "normalised so that its integral is Q0. Where q(m) lies well above n(m) π r², a candidate of that magnitude "
      "is more likely a counterpart than a chance neighbour; LR = q(m) f(r) / n(m) (REF-LR-01). Empty bins are "
      "not drawn on the log axis; the points sit at the bin centres.";
  std::ostringstream tab;
  tab << "<details><summary>Magnitude bins (" << t.rows() << ")</summary><table class=\"data\" id=\"lr-bins-" << base
      << "\"><tr><th>mag lo</th><th>mag hi</th><th>n(m) [deg⁻² mag⁻¹]</th><th>q(m) [mag⁻¹]</th><th>candidates</th>"
      << "<th>background candidates</th></tr>";
  for (std::size_t i = 0; i < t.rows(); ++i)
    tab << "<tr><td>" << fmt("%.6g", lo[i]) << "</td><td>" << fmt("%.6g", hi[i]) << "</td><td>" << fmt("%.4g", nm[i])
        << "</td><td>" << fmt("%.4g", qm[i]) << "</td><td>" << fmt("%.0f", tot[i]) << "</td><td>" << fmt("%.0f", bg[i])
        << "</td></tr>";
  tab << "</table></details>\n";
  out_table = tab.str();
  return figure(plot::render_svg(p), cap);
}

/// Measured blank-fraction ratio against radius with the fitted 1 - Q0 F(r).
std::string lr_q0_html(const std::string& path, const std::string& base, const nlohmann::json& lr) {
  const Table t = read_table(path);
  const auto r = column(t, "radius_arcsec"), ba = column(t, "blank_a"), bb = column(t, "blank_background"),
             model = column(t, "model_ratio");
  std::vector<double> ratio;
  for (std::size_t i = 0; i < t.rows(); ++i) ratio.push_back(bb[i] > 0 ? ba[i] / bb[i] : kNaN);
  const double q0 = num(lr, "q0"), rms = num(lr, "q0_fit_rms");
  const bool estimated = !(lr.contains("q0_estimated") && lr["q0_estimated"].is_boolean()) || lr["q0_estimated"].get<bool>();
  Plot p;
  p.id = "plot-lr-q0-" + base;
  p.title = "Q0 from the blank fractions";
  p.x_label = "search radius r [arcsec]";
  p.y_label = "blank fraction ratio U_A(r) / U_bg(r)";
  p.y_min = 0;
  p.y_max = 1.05;
  p.x_min = 0;
  p.series.push_back({SeriesKind::Points, r, ratio, {}, {}, col::kBlue, "measured", 3.5, 1.6, false});
  p.series.push_back({SeriesKind::Line, r, model, {}, {}, col::kVermillion, "1 − Q0 F(r)", 2.5, 1.8, false});
  if (std::isfinite(q0)) p.h_lines = {1.0 - q0};
  p.note = "Q0 = " + fmt("%.3f", q0) + (estimated ? " (fit rms " + fmt("%.3g", rms) + ")" : " (fixed by match.lr_q0)");
  const std::string cap =
      "Blue points: the fraction of radio positions with no object of B within r, divided by the same fraction "
      "at background positions. Without counterparts it would stay at 1; it falls as r takes in the true "
      "counterparts and levels off at 1 − Q0 (dotted line) once r covers the position errors. Vermillion: the "
      "fitted model 1 − Q0 F(r), F(r) the probability that a true counterpart lies within r (REF-LR-03). Q0 = " +
      fmt("%.3f", q0) + " is the fraction of radio sources with a counterpart in B" +
      (estimated ? "." : ", fixed by match.lr_q0 (the points are shown for comparison).");
  return figure(plot::render_svg(p), cap);
}

/// Reliability of the best candidates (bars) and of all candidates (steps), threshold drawn.
std::string lr_reliability_html(const std::string& path, const std::string& base, double threshold) {
  const Table t = read_table(path);
  const auto rel = column(t, "reliability"), best = column(t, "best");
  std::vector<double> rb;
  for (std::size_t i = 0; i < t.rows(); ++i)
    if (best[i] == 1) rb.push_back(rel[i]);
  std::vector<double> ea, ca, eb, cb;
  report_util::histogram(rel, 20, ea, ca, 0.0, 1.0);
  report_util::histogram(rb, 20, eb, cb, 0.0, 1.0);
  Plot p;
  p.id = "plot-lr-reliability-" + base;
  p.title = "Reliability of the candidates";
  p.x_label = "reliability R";
  p.y_label = "candidates per bin (width 0.05)";
  p.x_min = 0;
  p.x_max = 1;
  p.y_min = 0;
  p.y_log = true;
  double top = 1;
  for (double c : ca) top = std::max(top, c);
  p.y_min = 0.7;
  p.y_max = 2 * top;
  p.series.push_back({SeriesKind::Bars, ea, ca, {}, {}, col::kSkyBlue, "all candidates", 2.5, 1.6, false});
  p.series.push_back({SeriesKind::Bars, eb, cb, {}, {}, col::kGreen, "best candidates", 2.5, 1.6, false});
  if (std::isfinite(threshold)) p.v_lines = {threshold};
  const std::string cap =
      "R = LR / (Σ LR + 1 − Q0) is the probability that a candidate is the counterpart, the sum running over the "
      "candidates of the same radio source (REF-LR-01). Green: the candidate with the largest LR of each radio "
      "source; green and sky blue together: every candidate within the radius (log scale). The dotted line is the "
      "identification threshold R = " + fmt("%.3g", threshold) + ": a best candidate to its right counts as identified. A clean identification shows most best candidates piled "
      "near 1 and the other candidates near 0; a broad middle means ambiguous cases.";
  return figure(plot::render_svg(p), cap);
}

/// The one-line summary from the match summary's counts and likelihood_ratio block.
std::string lr_summary_html(const nlohmann::json& js, const std::string& base) {
  const nlohmann::json counts = object_at(js, "counts"), lr = object_at(js, "likelihood_ratio");
  auto count = [&](const char* k) { return counts.contains(k) ? counts[k].dump() : std::string("–"); };
  auto span = [&](const std::string& id, const std::string& v) {
    return "<b id=\"lr-" + id + "-" + xml_escape(base) + "\">" + xml_escape(v) + "</b>";
  };
  std::ostringstream o;
  o << "<p class=\"lrsum\" id=\"lr-summary-" << xml_escape(base) << "\">" << span("searched", count("rows_a_used"))
    << " radio sources searched (of " << count("rows_a") << "), " << span("candidates", count("candidates"))
    << " candidates within " << fmt("%.3g", num(js, "radius_arcsec")) << " arcsec, " << span("identified", count("identified"))
    << " identified (best candidate with R &gt; " << fmt("%.3g", num(lr, "reliability_threshold"))
    << "), of which about " << span("false", fmt("%.2f", num(lr, "identified_expected_false")))
    << " expected false (Σ (1 − R) over the identified); Q0 = " << span("q0", fmt("%.4f", num(lr, "q0"))) << ".</p>\n";
  return o.str();
}

ReportSection lr_section(const fs::path& dir, const std::string& base, const std::string& other,
                         const nlohmann::json& js, MatchSections& out) {
  // A stem that already says "counterparts" is not repeated in the title (and the navigation bar).
  const bool says = other.find("counterpart") != std::string::npos;
  ReportSection s{"match-" + base, says ? "Counterparts by likelihood ratio" : "Counterparts in " + other + " (likelihood ratio)", ""};
  const nlohmann::json lr = object_at(js, "likelihood_ratio");
  if (lr.contains("warnings") && lr["warnings"].is_array())
    for (const auto& w : lr["warnings"])
      if (w.is_string()) out.warnings.push_back("Counterparts " + base + ": " + w.get<std::string>() + ".");
  std::string html = "<p class=\"note\">Counterpart identification by likelihood ratio (REF-LR-01..03), from " +
                     xml_escape(base) + ".match_summary.json and its tables.</p>\n" + lr_summary_html(js, base);
  const std::string bins = table_path(dir, base, ".lr_magnitude_bins"), q0 = table_path(dir, base, ".lr_q0_fit"),
                    cand = table_path(dir, base, ".lr_candidates");
  try {
    std::string figs, table;
    if (!bins.empty()) figs += lr_magnitude_html(bins, base, num(js, "radius_arcsec"), table);
    else out.missing.push_back("no " + base + ".lr_magnitude_bins table: n(m) and q(m) not drawn");
    if (!q0.empty()) figs += lr_q0_html(q0, base, lr);
    else out.missing.push_back("no " + base + ".lr_q0_fit table: the Q0 fit not drawn");
    if (!cand.empty()) figs += lr_reliability_html(cand, base, num(lr, "reliability_threshold"));
    else out.missing.push_back("no " + base + ".lr_candidates table: reliabilities not drawn");
    html += "<div class=\"row\">" + figs + "</div>\n" + table;
  } catch (const std::exception& e) {
    out.missing.push_back("the likelihood-ratio tables of " + base + " could not be read (" + std::string(e.what()).substr(0, 120) + ")");
  }
  s.html = html;
  return s;
}

}  // namespace

MatchSections match_sections(const std::string& dir_s, const std::string& N) {
  MatchSections out;
  const fs::path dir(dir_s);
  std::vector<fs::path> files;
  const std::string sfx = rn::kMatchSummary;
  for (const auto& e : fs::directory_iterator(dir)) {
    const std::string f = e.path().filename().string();
    if (f.size() > sfx.size() && f.compare(f.size() - sfx.size(), sfx.size(), sfx) == 0) files.push_back(e.path());
  }
  std::sort(files.begin(), files.end());  // the page's order does not depend on the file system's
  for (const auto& path : files) {
    const std::string f = path.filename().string();
    const std::string base = f.substr(0, f.size() - sfx.size());
    nlohmann::json js;
    try { std::ifstream in(path); js = nlohmann::json::parse(in); } catch (...) { out.missing.push_back(f + " is not valid JSON"); continue; }
    if (!js.is_object()) { out.missing.push_back(f + " is not a JSON object: not shown"); continue; }
    // Title: the other catalogue's name (the stem is NAME.components_OTHER).
    std::string other = base;
    for (const std::string& pre : {N + ".components_", N + "_"})
      if (other.size() > pre.size() && other.compare(0, pre.size(), pre) == 0) { other = other.substr(pre.size()); break; }
    if (is_lr_match(dir, base, js)) {
      out.sections.push_back(lr_section(dir, base, other, js, out));
      continue;
    }
    if (!js.contains("flux_ratio_a_over_b"))
      out.warnings.push_back("Cross-match " + base + ": the flux-scale check is off (no flux ratio in " + f + "), so a flux-scale error between the catalogues would go unnoticed.");
    ReportSection s{"match-" + base, "Cross-match with " + other, ""};
    if (fs::exists(dir / (base + rn::kMatches))) s.html = offsets_html(dir / (base + rn::kMatches), base);
    out.sections.push_back(std::move(s));
  }
  return out;
}

}  // namespace skerry
