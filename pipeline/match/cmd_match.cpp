// `skerry match A B --out DIR`: cross-match catalogues by sky separation.
//
// Modes (match.mode): nearest, all, one_to_one, sigma_scaled (separations in
// units of the combined position errors; match.exclusive makes it one-to-one), self (one
// catalogue, duplicates and friends-of-friends groups), multi (the first
// catalogue is the master list, every further one is matched to it),
// likelihood_ratio (counterparts of A in a dense catalogue B with magnitudes).
// Outputs (NAME = the stems of A and B joined by '_'):
//   NAME.matches.csv (+ .fits / .vot with match.formats)   matched pairs
//   NAME.unmatched_a.csv, NAME.unmatched_b.csv              with match.unmatched
//   NAME.match_summary.json                                  counts, offsets, chance matches, flux ratio
// self:  NAME.self_matches.csv (pairs) and NAME.groups.csv (one row per input row)
// multi: NAME.multi.csv (one row per master row) and NAME.match_summary.json
// likelihood_ratio: NAME.lr_candidates.csv (every candidate with LR, reliability,
//   rank, best), NAME.lr_magnitude_bins.csv (n(m), q(m) per bin, for plots),
//   NAME.lr_q0_fit.csv (blank fractions behind Q0) and NAME.match_summary.json
#include <erfa.h>
#include <erfam.h>

#include <algorithm>
#include <cctype>
#include <charconv>
#include <cmath>
#include <filesystem>
#include <iostream>
#include <nlohmann/json.hpp>
#include <sstream>
#include <string>
#include <vector>

#include "app/console.h"
#include "app/command.h"
#include "app/errors.h"
#include "io/atomic_file.h"
#include "io/sky_columns.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "app/options.h"
#include "app/run_record.h"
#include "skerry/crossmatch.h"
#include "skerry/likelihood_ratio.h"
#include "skerry/table.h"
#include "app/version.h"

namespace skerry {

namespace {

namespace fs = std::filesystem;

std::string lower(std::string s) {
  for (auto& c : s) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return s;
}

std::vector<std::string> split_list(const std::string& s) {
  std::vector<std::string> out;
  std::string cur;
  for (char c : s) {
    if (c == ',') {
      if (!cur.empty()) out.push_back(cur);
      cur.clear();
    } else if (c != ' ') {
      cur += c;
    }
  }
  if (!cur.empty()) out.push_back(cur);
  return out;
}

std::string stem_of(const std::string& path) {
  std::string f = fs::path(path).filename().string();
  auto dot = f.rfind('.');
  return dot == std::string::npos || dot == 0 ? f : f.substr(0, dot);
}


double flux_unit_factor(const Column& c, const std::string& file) {
  const std::string u = lower(c.unit);
  if (u.empty() || u == "jy" || u == "jy/beam") return 1.0;
  if (u == "mjy" || u == "mjy/beam") return 1e-3;
  if (u == "ujy" || u == "ujy/beam" || u == "microjy") return 1e-6;
  throw InputError(file, "column '" + c.name + "': unit '" + c.unit + "' is not a flux density unit (Jy, mJy, uJy)");
}

struct SideOptions {
  std::string ra, dec, ra_err, dec_err, flux, flux_err, frame;
  double freq_hz = 0;
};

struct Catalogue {
  std::string path;
  Table table;
  SkyPositions pos;
  std::vector<double> flux, flux_err;  // [Jy], empty when none
  std::string ra_col, dec_col, frame, flux_col;
  double freq_hz = 0;
  std::size_t no_position = 0;
};

/// need_errors: the position error columns must exist; optional_errors: read
/// them when they exist (likelihood_ratio's dense catalogue).
Catalogue load_catalogue(const std::string& path, const SideOptions& so, const std::string& side, bool need_errors,
                         bool optional_errors = false) {
  Catalogue cat;
  cat.path = path;
  cat.table = read_table(path);
  const Table& t = cat.table;
  PositionColumnOptions pco;
  pco.ra = so.ra;
  pco.dec = so.dec;
  pco.frame = so.frame;
  pco.ra_option = "match.ra_" + side;
  pco.dec_option = "match.dec_" + side;
  pco.frame_option = "match.frame_" + side;
  CataloguePositions cp = read_catalogue_positions(t, path, pco);
  cat.ra_col = cp.ra_col;
  cat.dec_col = cp.dec_col;
  cat.frame = cp.frame;
  cat.no_position = cp.no_position;
  const std::size_t n = t.rows();
  cat.pos.ra_deg = std::move(cp.ra_deg);
  cat.pos.dec_deg = std::move(cp.dec_deg);

  // Positional errors (arcsec): RA*cos(Dec) and Dec.
  const Column* re = find_column(t, path, so.ra_err, "match.ra_err_" + side, {"stat.error;pos.eq.ra"},
                                 {"ra_err_arcsec", "e_ra", "ra_err", "era", "sigma_ra", "e_raj2000"});
  const Column* de = find_column(t, path, so.dec_err, "match.dec_err_" + side, {"stat.error;pos.eq.dec"},
                                 {"dec_err_arcsec", "e_dec", "dec_err", "edec", "sigma_dec", "e_dej2000"});
  if (need_errors || (optional_errors && re && de)) {
    if (!re || !de)
      throw InputError(path, std::string("error-aware matching needs positional error columns; none found for ") +
                                 (!re ? "RA" : "Dec") + " (name it with --match." + (!re ? "ra_err_" : "dec_err_") +
                                 side + ")");
    const double fr = angle_unit_factor(*re, path, true), fd = angle_unit_factor(*de, path, true);
    cat.pos.err_east_arcsec = numeric_values(*re, path);
    cat.pos.err_north_arcsec = numeric_values(*de, path);
    for (std::size_t i = 0; i < n; ++i) {
      cat.pos.err_east_arcsec[i] *= fr;
      cat.pos.err_north_arcsec[i] *= fd;
      for (double e : {cat.pos.err_east_arcsec[i], cat.pos.err_north_arcsec[i]})
        if (e < 0)
          throw InputError(path, "row " + std::to_string(i + 1) + ": negative positional error");
    }
  }
  // Flux density (optional).
  const Column* fl = find_column(t, path, so.flux, "match.flux_" + side, {},
                                 {"s_int_jy", "s_int", "flux_jy", "flux", "int_flux", "s_total", "total_flux"});
  if (fl) {
    const double f = flux_unit_factor(*fl, path);
    cat.flux = numeric_values(*fl, path);
    for (auto& v : cat.flux) v *= f;
    cat.flux_col = fl->name;
    const Column* fe = find_column(t, path, so.flux_err, "match.flux_err_" + side, {},
                                   {fl->name + "_err", "s_int_err_jy", "s_int_err", "flux_err_jy", "flux_err", "e_flux"});
    if (fe && fe != fl) {
      const double fef = flux_unit_factor(*fe, path);
      cat.flux_err = numeric_values(*fe, path);
      for (auto& v : cat.flux_err) v *= fef;
    }
  }
  cat.freq_hz = so.freq_hz;
  if (!(cat.freq_hz > 0))
    if (const std::string* m = t.get_meta("freq_mhz")) {
      double v = 0;
      auto r = std::from_chars(m->data(), m->data() + m->size(), v);
      if (r.ec == std::errc() && v > 0) cat.freq_hz = v * 1e6;
    }
  return cat;
}

// ---- output tables ----------------------------------------------------------------------

/// Columns of `src` to carry: all when `list` is empty, else the named ones.
std::vector<const Column*> carried(const Table& src, const std::string& file, const std::string& list) {
  std::vector<const Column*> out;
  if (list.empty() || list == "*") {
    for (const auto& c : src.columns()) out.push_back(&c);
    return out;
  }
  if (list == "none") return out;
  for (const auto& n : split_list(list)) {
    const Column* c = src.find(n);
    if (!c) throw InputError(file, "no column '" + n + "' to carry (--match.columns)");
    out.push_back(c);
  }
  return out;
}

/// Append the rows `idx` (-1 = empty cell) of column c to `t` as "prefix + name".
void append_column(Table& t, const Column& c, const std::string& prefix, const std::vector<std::int64_t>& idx) {
  Column o;
  o.name = prefix + c.name;
  o.unit = c.unit;
  o.ucd = c.ucd;
  o.description = c.description;
  o.type = c.type;
  bool any_missing = std::any_of(idx.begin(), idx.end(), [](std::int64_t i) { return i < 0; });
  if (c.type == ColumnType::Int64 && any_missing) o.type = ColumnType::Float64;  // room for NaN
  for (std::int64_t i : idx) {
    switch (o.type) {
      case ColumnType::Float64:
        o.f64.push_back(i < 0 ? std::nan("")
                              : (c.type == ColumnType::Int64 ? static_cast<double>(c.i64[i]) : c.f64[i]));
        break;
      case ColumnType::Int64: o.i64.push_back(c.i64[i]); break;
      case ColumnType::Text: o.text.push_back(i < 0 ? std::string() : c.text[i]); break;
    }
  }
  if (t.find(o.name)) o.name += "_";  // cannot happen with distinct prefixes; keep names unique anyway
  t.add(std::move(o));
}

void set_provenance(Table& t, const std::string& mode, double radius, const ParsedOptions& parsed) {
  t.set_meta("tool", "skerry match");
  t.set_meta("tool_version", SKERRY_VERSION);
  t.set_meta("git_revision", SKERRY_GIT_REVISION);
  t.set_meta("match_mode", mode);
  t.set_meta("match_radius_arcsec", std::to_string(radius));
  for (const auto& [k, v] : parsed.resolved)
    if (k.rfind("match.", 0) == 0) t.set_meta("config." + k, v);
}

void write_formats(const Table& t, const std::string& base, const std::vector<std::string>& formats,
                   RunRecord& rec, nlohmann::ordered_json& outputs) {
  for (const auto& f : formats) {
    std::string ext = f == "csv" ? ".csv" : f == "fits" ? ".fits" : ".vot";
    write_table(t, base + ext);
    rec.add_output(base + ext);
    outputs.push_back(fs::path(base + ext).filename().string());
  }
}

std::string mode_name(MatchMode m) {
  switch (m) {
    case MatchMode::Nearest: return "nearest";
    case MatchMode::All: return "all";
    case MatchMode::OneToOne: return "one_to_one";
    case MatchMode::ErrorAware: return "sigma_scaled";
  }
  return "?";
}

nlohmann::ordered_json num(double v) {
  return std::isfinite(v) ? nlohmann::ordered_json(v) : nlohmann::ordered_json(nullptr);
}

/// Magnitudes of B for likelihood_ratio: the magnitude column, or -2.5 log10 of
/// a flux column (non-positive flux: no magnitude). NaN = none.
std::vector<double> lr_magnitudes(const Catalogue& B, const std::string& mag_opt, const std::string& flux_opt,
                                  std::string& column, bool& from_flux) {
  if (!mag_opt.empty() && !flux_opt.empty())
    throw UsageError("give match.lr_mag_b or match.lr_flux_b, not both");
  from_flux = !flux_opt.empty();
  const Column* c = from_flux
                        ? find_column(B.table, B.path, flux_opt, "match.lr_flux_b", {}, {})
                        : find_column(B.table, B.path, mag_opt, "match.lr_mag_b", {"phot.mag;meta.main", "phot.mag"},
                                      {"mag", "magnitude", "mag_auto", "rmag", "r_mag", "imag", "i_mag", "kmag", "ks_mag"});
  if (!c)
    throw InputError(B.path, "no magnitude column found for the likelihood-ratio match; name it with "
                             "--match.lr_mag_b (or a flux column with --match.lr_flux_b)");
  column = c->name;
  std::vector<double> v = numeric_values(*c, B.path);
  if (from_flux)
    for (auto& x : v) x = x > 0 && std::isfinite(x) ? -2.5 * std::log10(x) : std::nan("");
  return v;
}

int run_likelihood_ratio(const Catalogue& A, const Catalogue& B, const ParsedOptions& parsed, double radius,
                         const std::vector<std::string>& formats, const std::string& base, RunRecord& rec,
                         nlohmann::ordered_json& js, nlohmann::ordered_json& outputs) {
  const auto& vm = parsed.vm;
  LikelihoodRatioOptions lo;
  lo.radius_arcsec = radius;
  lo.systematic_arcsec = vm["match.systematic_arcsec"].as<double>();
  lo.mag_bin = vm["match.lr_mag_bin"].as<double>();
  require(lo.mag_bin > 0 && std::isfinite(lo.mag_bin), "match.lr_mag_bin", std::to_string(lo.mag_bin), "> 0");
  lo.background_shifts = vm["match.lr_background_shifts"].as<int>();
  require(lo.background_shifts >= 1 && lo.background_shifts <= 1000, "match.lr_background_shifts",
          std::to_string(lo.background_shifts), "1..1000");
  lo.q0_radii = vm["match.lr_q0_radii"].as<int>();
  require(lo.q0_radii >= 2 && lo.q0_radii <= 1000, "match.lr_q0_radii", std::to_string(lo.q0_radii), "2..1000");
  const double q0 = vm["match.lr_q0"].as<double>();
  require(q0 >= 0 && q0 <= 1, "match.lr_q0", std::to_string(q0), "0 (estimate) or 0 < Q0 <= 1");
  if (q0 > 0) lo.q0 = q0;
  const double r_min = vm["match.lr_reliability"].as<double>();
  require(r_min >= 0 && r_min <= 1, "match.lr_reliability", std::to_string(r_min), "0..1");
  std::string mag_col;
  bool from_flux = false;
  const std::vector<double> mag = lr_magnitudes(B, vm["match.lr_mag_b"].as<std::string>(),
                                                vm["match.lr_flux_b"].as<std::string>(), mag_col, from_flux);
  LikelihoodRatioResult r;
  {
    StageTimer st(rec, "match");
    try {
      r = likelihood_ratio_match(A.pos, B.pos, mag, lo);
    } catch (const std::invalid_argument& e) {
      throw UsageError(std::string("likelihood_ratio: ") + e.what());
    }
  }
  if (r.n_a_used == 0) throw InputError(A.path, "no row has a usable position and positional error");

  // Candidates.
  Table t;
  t.name = "lr_candidates";
  std::vector<std::int64_t> ia, ib, nc, rk, best, ident;
  std::vector<double> sep, pa, dn, mg, fr, lrv, rel;
  for (const auto& c : r.candidates) {
    ia.push_back(c.a);
    ib.push_back(c.b);
    sep.push_back(c.sep_arcsec);
    pa.push_back(c.pa_deg);
    dn.push_back(c.norm_sep);
    mg.push_back(c.mag);
    fr.push_back(c.f_r);
    lrv.push_back(c.lr);
    rel.push_back(c.reliability);
    nc.push_back(c.n_candidates);
    rk.push_back(c.rank);
    best.push_back(c.rank == 1 ? 1 : 0);
    ident.push_back(c.rank == 1 && c.reliability > r_min ? 1 : 0);
  }
  t.add_i64("row_a", "", "meta.id", "0-based row of A", ia);
  t.add_i64("row_b", "", "meta.id.cross", "0-based row of B (the candidate)", ib);
  t.add_f64("sep_arcsec", "arcsec", "pos.angDistance", "Great-circle separation of B from A (Vincenty)", sep);
  t.add_f64("pa_deg", "deg", "pos.posAng", "Position angle of B seen from A, east of north, [0, 360)", pa);
  t.add_f64("norm_sep", "", "stat.value", "Normalised separation d = sqrt(D^T S^-1 D), S = S_A + S_B + sys^2 I", dn);
  t.add_f64("mag_b", "mag", "phot.mag", from_flux ? "-2.5 log10 of B's flux column " + mag_col : "Magnitude of B (" + mag_col + ")", mg);
  t.add_f64("f_r", "arcsec-2", "stat.probability", "Positional probability density f(r) = exp(-d^2/2) / (2 pi sqrt(det S))", fr);
  t.add_f64("likelihood_ratio", "", "stat.likelihood", "LR = q(m) f(r) / n(m)", lrv);
  t.add_f64("reliability", "", "stat.probability", "R = LR / (sum of LR over this row of A + 1 - Q0)", rel);
  t.add_i64("n_candidates", "", "meta.number", "Candidates of this row of A within the radius", nc);
  t.add_i64("rank", "", "meta.number", "Rank by LR among the candidates of this row of A (1 = largest)", rk);
  t.add_i64("best", "", "meta.code", "1 for the candidate with the largest LR of this row of A", best);
  t.add_i64("identified", "", "meta.code", "1 when best and reliability > match.lr_reliability", ident);
  for (const Column* c : carried(A.table, A.path, vm["match.columns_a"].as<std::string>()))
    append_column(t, *c, vm["match.prefix_a"].as<std::string>(), ia);
  for (const Column* c : carried(B.table, B.path, vm["match.columns_b"].as<std::string>()))
    append_column(t, *c, vm["match.prefix_b"].as<std::string>(), ib);
  set_provenance(t, "likelihood_ratio", radius, parsed);
  t.set_meta("lr_q0", std::to_string(r.q0));

  // Magnitude bins: n(m) per deg^2 per mag and q(m) per mag, for plots.
  constexpr double kArcsec2PerDeg2 = 3600.0 * 3600.0;
  Table bt;
  bt.name = "lr_magnitude_bins";
  std::vector<double> lo_e, hi_e, nm, qm, real;
  std::vector<std::int64_t> tot, bg;
  for (const auto& b : r.bins) {
    lo_e.push_back(b.mag_lo);
    hi_e.push_back(b.mag_hi);
    tot.push_back(b.total);
    bg.push_back(b.background);
    nm.push_back(b.n_m * kArcsec2PerDeg2 / lo.mag_bin);
    real.push_back(b.real);
    qm.push_back(b.q_m / lo.mag_bin);
  }
  bt.add_f64("mag_lo", "mag", "phot.mag;stat.min", "Lower edge of the magnitude bin", lo_e);
  bt.add_f64("mag_hi", "mag", "phot.mag;stat.max", "Upper edge of the magnitude bin", hi_e);
  bt.add_i64("total", "", "meta.number", "Candidates of B within the radius of the rows of A", tot);
  bt.add_i64("background", "", "meta.number", "Candidates of B within the radius of the background positions", bg);
  bt.add_f64("n_m_per_deg2_per_mag", "deg-2 mag-1", "phot.count;stat.density", "Background surface density n(m)", nm);
  bt.add_f64("real", "", "meta.number", "Excess total - n(m) N_A pi r^2 (>= 0): counterparts within the radius", real);
  bt.add_f64("q_m_per_mag", "mag-1", "stat.probability", "q(m): magnitude distribution of the true counterparts, integral Q0", qm);
  set_provenance(bt, "likelihood_ratio", radius, parsed);

  Table qt;
  qt.name = "lr_q0_fit";
  std::vector<double> model;
  for (std::size_t j = 0; j < r.q0_radius_arcsec.size(); ++j) model.push_back(1.0 - r.q0 * r.q0_model_f[j]);
  qt.add_f64("radius_arcsec", "arcsec", "pos.angDistance", "Radius r", r.q0_radius_arcsec);
  qt.add_f64("blank_a", "", "stat.value", "Fraction of A positions with no candidate within r", r.q0_blank_a);
  qt.add_f64("blank_background", "", "stat.value", "Fraction of background positions with no candidate within r", r.q0_blank_background);
  qt.add_f64("f_r_mean", "", "stat.value", "F(r): mean over A of the probability that a true counterpart lies within r", r.q0_model_f);
  qt.add_f64("model_ratio", "", "stat.value", "1 - Q0 F(r), the model of blank_a / blank_background", model);
  set_provenance(qt, "likelihood_ratio", radius, parsed);
  {
    StageTimer st(rec, "write");
    write_formats(t, base + ".lr_candidates", formats, rec, outputs);
    write_formats(bt, base + ".lr_magnitude_bins", formats, rec, outputs);
    write_formats(qt, base + ".lr_q0_fit", formats, rec, outputs);
  }

  std::size_t with_cand = 0, identified = 0;
  double expected_true = 0;
  for (const auto& c : r.candidates) {
    if (c.rank != 1) continue;
    ++with_cand;
    if (c.reliability > r_min) {
      ++identified;
      expected_true += c.reliability;
    }
  }
  nlohmann::ordered_json counts;
  counts["rows_a"] = A.table.rows();
  counts["rows_b"] = B.table.rows();
  counts["rows_a_without_position"] = r.a_invalid;
  counts["rows_a_without_error"] = r.a_no_error;
  counts["rows_b_without_position"] = r.b_invalid;
  counts["rows_b_without_magnitude"] = r.b_no_mag;
  counts["rows_a_used"] = r.n_a_used;
  counts["candidates"] = r.candidates.size();
  counts["rows_a_with_candidates"] = with_cand;
  counts["identified"] = identified;
  js["counts"] = counts;
  nlohmann::ordered_json l;
  l["q0"] = r.q0;
  l["q0_estimated"] = r.q0_estimated;
  l["q0_fit_rms"] = num(r.q0_fit_rms);
  l["q0_method"] = "blank fractions U_A(r)/U_bg(r) = 1 - Q0 F(r), least squares over the radii (REF-LR-03)";
  l["reliability_threshold"] = r_min;
  l["identified_expected_true"] = expected_true;
  l["identified_expected_false"] = static_cast<double>(identified) - expected_true;
  l["magnitude_column_b"] = mag_col;
  l["magnitude_from_flux"] = from_flux;
  l["mag_bin"] = lo.mag_bin;
  l["systematic_arcsec"] = lo.systematic_arcsec;
  l["b_median_error_arcsec"] = r.b_median_error_arcsec;
  l["background_positions"] = r.n_background;
  l["background_method"] = "A positions shifted by (4 + s mod 4) radii at position angles 360 s / S";
  nlohmann::ordered_json bins = nlohmann::ordered_json::array();
  for (std::size_t k = 0; k < r.bins.size(); ++k)
    bins.push_back({{"mag_lo", lo_e[k]}, {"mag_hi", hi_e[k]}, {"n_m_per_deg2_per_mag", nm[k]}, {"q_m_per_mag", qm[k]},
                    {"total", tot[k]}, {"background", bg[k]}});
  l["bins"] = bins;
  l["method"] = "likelihood ratio LR = q(m) f(r) / n(m), reliability R = LR / (sum LR + 1 - Q0) (REF-LR-01); "
                "q(m) from the excess around A over the background (REF-LR-02)";
  // Where the run could mislead, say so.
  nlohmann::ordered_json warn = nlohmann::ordered_json::array();
  if (r.q0_estimated && r.q0_fit_rms > 0.05)
    warn.push_back("the blank fractions do not follow 1 - Q0 F(r) (fit rms " + std::to_string(r.q0_fit_rms) +
                   "): position errors misstated, clustered background or B not covering A's field; Q0 is uncertain");
  std::size_t empty_bins = 0;
  for (const auto& b : r.bins) empty_bins += b.background == 0 && b.real > 0;
  if (empty_bins)
    warn.push_back(std::to_string(empty_bins) + " magnitude bins with counterparts but no background object: n(m) "
                   "taken as one object there (an upper limit), so LR is a lower limit");
  {
    std::vector<double> sig;
    const double bm = r.b_median_error_arcsec;
    for (std::size_t i = 0; i < A.pos.size(); ++i) {
      const double e = A.pos.err_east_arcsec[i], n = A.pos.err_north_arcsec[i];
      const double v = 0.5 * (e * e + n * n) + bm * bm + lo.systematic_arcsec * lo.systematic_arcsec;
      if (std::isfinite(v) && v > 0) sig.push_back(std::sqrt(v));
    }
    if (!sig.empty()) {
      std::nth_element(sig.begin(), sig.begin() + static_cast<std::ptrdiff_t>(sig.size() / 2), sig.end());
      const double med = sig[sig.size() / 2];
      l["median_combined_sigma_arcsec"] = med;
      if (radius < 3.5 * med)
        warn.push_back("match.radius_arcsec is below 3.5 x the median combined position error (" + std::to_string(med) +
                       " arcsec): true counterparts outside the radius are missed and reliabilities run high");
    }
  }
  if (r.a_no_error)
    warn.push_back(std::to_string(r.a_no_error) + (r.a_no_error == 1 ? " row" : " rows") +
                   " of A without a usable position error " + (r.a_no_error == 1 ? "was" : "were") + " not searched");
  l["warnings"] = warn;
  js["likelihood_ratio"] = l;
  if (!B.pos.err_east_arcsec.empty()) js["b_position_errors"] = "used";
  else js["b_position_errors"] = "none found: taken as 0 (only A's errors and the systematic term enter f(r))";
  js["outputs"] = outputs;
  write_text_atomic(base + ".match_summary.json", js.dump(2) + "\n");
  std::ostringstream line;
  line << "skerry match: " << A.table.rows() << " x " << B.table.rows() << " rows, " << r.candidates.size()
       << " candidates (likelihood_ratio, " << radius << " arcsec), Q0 = " << r.q0 << ", " << identified
       << " identified at R > " << r_min << " -> " << base << ".lr_candidates." << formats[0];
  say(line.str());
  return kExitOk;
}

int run_match(const std::vector<std::string>& args) {
  po::options_description d("match options (options are match.KEY; in a config file, KEY goes under [match])");
  d.add_options()
      ("catalogues", po::value<std::vector<std::string>>()->multitoken(), "input catalogues (.csv, .fits, .vot): A B, or one (self), or master + several (multi)")
      ("out", po::value<std::string>()->default_value("outputs/match"), "output folder")
      ("match.mode", po::value<std::string>()->default_value("nearest"), "nearest | all | one_to_one | sigma_scaled | self | multi | likelihood_ratio")
      ("match.radius_arcsec", po::value<double>()->default_value(5.0), "match radius [arcsec] (sigma_scaled mode: the largest separation considered)")
      ("match.completeness", po::value<double>()->default_value(0.997), "sigma_scaled mode: completeness p; match when d < sqrt(-2 ln(1-p))")
      ("match.systematic_arcsec", po::value<double>()->default_value(0.0), "sigma_scaled and likelihood_ratio modes: systematic error per coordinate added to both catalogues' [arcsec]")
      ("match.exclusive", po::value<bool>()->default_value(false), "sigma_scaled mode: one-to-one; pairs taken globally by increasing normalised separation d, each row of A and of B used at most once")
      ("match.exclusive_by", po::value<std::string>()->default_value("d"), "sigma_scaled exclusive: pair order; d = increasing normalised separation among d < k; reliability = decreasing match reliability R (likelihood ratio with Q0 and B's density measured from the catalogues) among R > match.exclusive_min_reliability")
      ("match.exclusive_min_reliability", po::value<double>()->default_value(0.4), "sigma_scaled exclusive by reliability: lowest R accepted, 0 <= R < 1")
      ("match.exclusive_q0", po::value<double>()->default_value(0.0), "sigma_scaled exclusive by reliability: fixed fraction of A with a partner in B, in (0, 1]; 0 = estimate it from the blanks")
      ("match.lr_mag_b", po::value<std::string>()->default_value(""), "likelihood_ratio: magnitude column of B; empty = match.lr_flux_b or a column named mag, magnitude, mag_auto, ...")
      ("match.lr_flux_b", po::value<std::string>()->default_value(""), "likelihood_ratio: flux column of B used instead of a magnitude (binned in -2.5 log10 of it)")
      ("match.lr_mag_bin", po::value<double>()->default_value(0.5), "likelihood_ratio: magnitude bin width of n(m) and q(m) [mag]")
      ("match.lr_background_shifts", po::value<int>()->default_value(20), "likelihood_ratio: shifted copies of A's positions that measure the background n(m) and the blanks")
      ("match.lr_q0", po::value<double>()->default_value(0.0), "likelihood_ratio: fixed Q0 in (0, 1]; 0 = estimate it from the blanks")
      ("match.lr_q0_radii", po::value<int>()->default_value(10), "likelihood_ratio: radii (up to match.radius_arcsec) of the Q0 fit")
      ("match.lr_reliability", po::value<double>()->default_value(0.8), "likelihood_ratio: reliability above which the best candidate counts as identified (summary and the identified column)")
      ("match.ra_a", po::value<std::string>()->default_value(""), "RA (or Galactic longitude) column of A; empty = from UCDs or common names")
      ("match.dec_a", po::value<std::string>()->default_value(""), "Dec (or Galactic latitude) column of A")
      ("match.ra_b", po::value<std::string>()->default_value(""), "RA column of B (and of every further catalogue in multi mode)")
      ("match.dec_b", po::value<std::string>()->default_value(""), "Dec column of B")
      ("match.ra_err_a", po::value<std::string>()->default_value(""), "error of RA*cos(Dec) column of A (arcsec unless the unit says otherwise)")
      ("match.dec_err_a", po::value<std::string>()->default_value(""), "error of Dec column of A")
      ("match.ra_err_b", po::value<std::string>()->default_value(""), "error of RA*cos(Dec) column of B")
      ("match.dec_err_b", po::value<std::string>()->default_value(""), "error of Dec column of B")
      ("match.frame_a", po::value<std::string>()->default_value("auto"), "auto | icrs | galactic (Galactic is converted to ICRS)")
      ("match.frame_b", po::value<std::string>()->default_value("auto"), "auto | icrs | galactic")
      ("match.flux_a", po::value<std::string>()->default_value(""), "flux density column of A (Jy, mJy or uJy); empty = common names")
      ("match.flux_b", po::value<std::string>()->default_value(""), "flux density column of B")
      ("match.flux_err_a", po::value<std::string>()->default_value(""), "flux density error column of A")
      ("match.flux_err_b", po::value<std::string>()->default_value(""), "flux density error column of B")
      ("match.freq_a_mhz", po::value<double>()->default_value(0.0), "frequency of A [MHz]; 0 = the table's freq_mhz metadata")
      ("match.freq_b_mhz", po::value<double>()->default_value(0.0), "frequency of B [MHz]; 0 = the table's freq_mhz metadata")
      ("match.spectral_index", po::value<double>()->default_value(-0.7), "assumed alpha (S ~ nu^alpha) for the flux ratio when the frequencies differ")
      ("match.columns_a", po::value<std::string>()->default_value("*"), "columns of A to carry (comma list, * = all, none)")
      ("match.columns_b", po::value<std::string>()->default_value("*"), "columns of B to carry")
      ("match.prefix_a", po::value<std::string>()->default_value("a_"), "prefix of A's carried columns")
      ("match.prefix_b", po::value<std::string>()->default_value("b_"), "prefix of B's carried columns")
      ("match.unmatched", po::value<bool>()->default_value(false), "also write the unmatched rows of A and of B")
      ("match.formats", po::value<std::string>()->default_value("csv"), "table formats to write: comma list of csv, fits, vot")
      ("match.chance_shifts", po::value<int>()->default_value(8), "shifted re-matches for the chance-match estimate (0 = none)")
      ("match.name", po::value<std::string>()->default_value(""), "NAME of the output files; default: A_B from the input file stems");
  ParsedOptions parsed = parse_options("match", "A B [--out DIR] [options]", d, {{"catalogues", -1}}, args);
  if (parsed.help) return kExitOk;
  ThreadLimit threads(parsed.vm["threads"].as<int>());
  const auto& vm = parsed.vm;
  auto S = [&](const char* k) { return vm[k].as<std::string>(); };
  auto D = [&](const char* k) { return vm[k].as<double>(); };

  std::vector<std::string> files;
  if (vm.count("catalogues")) files = vm["catalogues"].as<std::vector<std::string>>();
  const std::string mode_s = lower(S("match.mode"));
  const bool self = mode_s == "self", multi = mode_s == "multi";
  MatchMode mode = MatchMode::Nearest;
  if (mode_s == "nearest") mode = MatchMode::Nearest;
  else if (mode_s == "all") mode = MatchMode::All;
  else if (mode_s == "one_to_one") mode = MatchMode::OneToOne;
  else if (mode_s == "sigma_scaled") mode = MatchMode::ErrorAware;
  const bool lr = mode_s == "likelihood_ratio";
  if (lr) mode = MatchMode::ErrorAware;  // A needs position errors, as in the sigma_scaled mode
  else if (mode_s != "nearest" && mode_s != "all" && mode_s != "one_to_one" && mode_s != "sigma_scaled" && !self && !multi)
    throw UsageError("--match.mode = " + mode_s +
                     " breaks 'nearest, all, one_to_one, sigma_scaled, self, multi or likelihood_ratio'");
  if (self && files.size() != 1) throw UsageError("match.mode self takes exactly one catalogue");
  if (multi && files.size() < 2) throw UsageError("match.mode multi takes a master catalogue and at least one more");
  require(!vm["match.exclusive"].as<bool>() || (mode == MatchMode::ErrorAware && !lr), "match.exclusive", "true",
          "only with match.mode sigma_scaled; one_to_one is the exclusive mode by separation");
  const std::string excl_by = S("match.exclusive_by");
  require(excl_by == "d" || excl_by == "reliability", "match.exclusive_by", excl_by, "d or reliability");
  require(excl_by == "d" || vm["match.exclusive"].as<bool>(), "match.exclusive_by", excl_by,
          "only with match.exclusive true");
  const double excl_min_r = D("match.exclusive_min_reliability");
  require(excl_min_r >= 0 && excl_min_r < 1, "match.exclusive_min_reliability", fits_real(excl_min_r), "0 <= R < 1");
  const double excl_q0 = D("match.exclusive_q0");
  require(excl_q0 >= 0 && excl_q0 <= 1, "match.exclusive_q0", fits_real(excl_q0), "0 (estimate) or 0 < Q0 <= 1");
  if (!self && !multi && files.size() != 2) throw UsageError("match takes two catalogues A B (got " + std::to_string(files.size()) + ")");
  const double radius = D("match.radius_arcsec");
  require(radius > 0 && std::isfinite(radius), "match.radius_arcsec", std::to_string(radius), "> 0");
  const double p = D("match.completeness");
  require(p > 0 && p < 1, "match.completeness", std::to_string(p), "0 < p < 1");
  require(D("match.systematic_arcsec") >= 0, "match.systematic_arcsec", std::to_string(D("match.systematic_arcsec")), ">= 0");
  const int shifts = vm["match.chance_shifts"].as<int>();
  require(shifts >= 0 && shifts <= 64, "match.chance_shifts", std::to_string(shifts), "0..64");
  std::vector<std::string> formats = split_list(lower(S("match.formats")));
  for (const auto& f : formats)
    if (f != "csv" && f != "fits" && f != "vot")
      throw UsageError("--match.formats = " + S("match.formats") + " breaks 'comma list of csv, fits, vot'");
  if (formats.empty()) formats.push_back("csv");

  SideOptions sa{S("match.ra_a"), S("match.dec_a"), S("match.ra_err_a"), S("match.dec_err_a"),
                 S("match.flux_a"), S("match.flux_err_a"), S("match.frame_a"), D("match.freq_a_mhz") * 1e6};
  SideOptions sb{S("match.ra_b"), S("match.dec_b"), S("match.ra_err_b"), S("match.dec_err_b"),
                 S("match.flux_b"), S("match.flux_err_b"), S("match.frame_b"), D("match.freq_b_mhz") * 1e6};

  const std::string out_dir = vm["out"].as<std::string>();
  std::string name = S("match.name");
  if (name.empty()) {
    name = stem_of(files[0]);
    for (std::size_t i = 1; i < files.size(); ++i) name += "_" + stem_of(files[i]);
  }
  if (name.find('/') != std::string::npos) throw UsageError("--match.name = " + name + " breaks 'a file name without /'");
  const std::string base = (fs::path(out_dir) / name).string();

  RunRecord rec("match");
  rec.set_configuration(parsed.resolved, parsed.config_file);
  rec.set_threads(threads.threads());
  nlohmann::ordered_json js;
  js["tool"] = "skerry match";
  js["tool_version"] = SKERRY_VERSION;
  js["git_revision"] = SKERRY_GIT_REVISION;
  js["mode"] = self ? "self" : multi ? "multi" : lr ? "likelihood_ratio" : mode_name(mode);
  js["radius_arcsec"] = radius;
  nlohmann::ordered_json outputs = nlohmann::ordered_json::array();
  nlohmann::ordered_json inputs = nlohmann::ordered_json::array();

  std::vector<Catalogue> cats;
  {
    StageTimer st(rec, "read");
    for (std::size_t i = 0; i < files.size(); ++i) {
      const SideOptions& so = i == 0 ? sa : sb;
      const bool need_err = mode == MatchMode::ErrorAware && !self && !multi && !(lr && i == 1);
      cats.push_back(load_catalogue(files[i], so, i == 0 ? "a" : "b", need_err, lr && i == 1));
      // The checksum is of the file read; a VOTable selection FILE[SEL] stays in "file".
      const std::string sha = rec.add_input(i == 0 ? "catalogue_a" : "catalogue_b", table_file_path(files[i]));
      const Catalogue& c = cats.back();
      nlohmann::ordered_json ij;
      ij["file"] = files[i];
      ij["sha256"] = sha;
      ij["rows"] = c.table.rows();
      ij["rows_without_position"] = c.no_position;
      ij["position_columns"] = {c.ra_col, c.dec_col};
      ij["frame"] = c.frame;
      if (!c.flux_col.empty()) ij["flux_column"] = c.flux_col;
      if (c.freq_hz > 0) ij["freq_mhz"] = c.freq_hz / 1e6;
      inputs.push_back(ij);
      if (c.no_position)
        note(files[i] + ": " + std::to_string(c.no_position) + " rows without a position are never matched");
    }
  }
  js["inputs"] = inputs;

  if (self) {
    const Catalogue& c = cats[0];
    SelfMatchResult r;
    {
      StageTimer st(rec, "match");
      r = self_match(c.pos, radius);
    }
    Table pairs;
    pairs.name = "self_matches";
    std::vector<std::int64_t> ia, ib;
    for (const auto& q : r.pairs) {
      ia.push_back(q.a);
      ib.push_back(q.b);
    }
    pairs.add_i64("row_a", "", "meta.id", "0-based row of the first member of the pair", ia);
    pairs.add_i64("row_b", "", "meta.id", "0-based row of the second member (row_b > row_a)", ib);
    std::vector<double> sep, pa;
    std::vector<std::int64_t> nc, rk, gid;
    for (const auto& q : r.pairs) {
      sep.push_back(q.sep_arcsec);
      pa.push_back(q.pa_deg);
      nc.push_back(q.n_candidates);
      rk.push_back(q.rank);
      gid.push_back(r.group[q.a]);
    }
    pairs.add_f64("sep_arcsec", "arcsec", "pos.angDistance", "Great-circle separation (Vincenty)", sep);
    pairs.add_f64("pa_deg", "deg", "pos.posAng", "Position angle of row_b seen from row_a, east of north, [0, 360)", pa);
    pairs.add_i64("n_candidates", "", "meta.number", "Other rows within the radius of row_a", nc);
    pairs.add_i64("rank", "", "meta.number", "Rank of row_b among row_a's neighbours (1 = closest)", rk);
    pairs.add_i64("fof_group_id", "", "meta.id.parent", "Friends-of-friends group (smallest row index in the group)", gid);
    for (const Column* col : carried(c.table, c.path, S("match.columns_a"))) {
      append_column(pairs, *col, S("match.prefix_a"), ia);
      append_column(pairs, *col, S("match.prefix_b"), ib);
    }
    set_provenance(pairs, "self", radius, parsed);
    Table groups;
    groups.name = "groups";
    std::vector<std::int64_t> rows(c.table.rows());
    for (std::size_t i = 0; i < rows.size(); ++i) rows[i] = static_cast<std::int64_t>(i);
    groups.add_i64("row", "", "meta.id", "0-based row of the input catalogue", rows);
    groups.add_i64("fof_group_id", "", "meta.id.parent", "Friends-of-friends group: smallest row index among rows linked by separations within the radius", r.group);
    std::vector<std::int64_t> gs(r.group_size.begin(), r.group_size.end());
    groups.add_i64("fof_group_members", "", "meta.number", "Rows in the friends-of-friends group (1 = no duplicate)", gs);
    for (const Column* col : carried(c.table, c.path, S("match.columns_a"))) append_column(groups, *col, "", rows);
    set_provenance(groups, "self", radius, parsed);
    {
      StageTimer st(rec, "write");
      write_formats(pairs, base + ".self_matches", formats, rec, outputs);
      write_formats(groups, base + ".groups", formats, rec, outputs);
    }
    std::size_t ngroups = 0, in_groups = 0;
    for (std::size_t i = 0; i < r.group.size(); ++i) {
      if (r.group_size[i] > 1) ++in_groups;
      if (r.group[i] == static_cast<std::int64_t>(i) && r.group_size[i] > 1) ++ngroups;
    }
    js["counts"] = {{"rows", c.table.rows()}, {"rows_without_position", r.invalid}, {"pairs", r.pairs.size()},
                    {"groups_with_several_rows", ngroups}, {"rows_in_such_groups", in_groups}};
    js["outputs"] = outputs;
    write_text_atomic(base + ".match_summary.json", js.dump(2) + "\n");
    std::ostringstream line;
    line << "skerry match: " << c.table.rows() << " rows, " << r.pairs.size() << " pairs within " << radius
         << " arcsec, " << ngroups << " groups of duplicates -> " << base << ".groups." << formats[0];
    say(line.str());
    return kExitOk;
  }

  if (multi) {
    const Catalogue& m = cats[0];
    std::vector<SkyPositions> others;
    std::vector<FluxColumn> fluxes;
    bool any_flux = false;
    for (std::size_t i = 1; i < cats.size(); ++i) {
      others.push_back(cats[i].pos);
      fluxes.push_back({cats[i].flux, cats[i].flux_err});
      any_flux |= !cats[i].flux.empty();
    }
    if (!any_flux) fluxes.clear();
    MultiMatchResult r;
    {
      StageTimer st(rec, "match");
      MultiMatchOptions mo;
      mo.radius_arcsec = radius;
      r = match_to_master(m.pos, others, fluxes, mo);
    }
    Table t;
    t.name = "multi";
    std::vector<std::int64_t> rows(m.table.rows());
    for (std::size_t i = 0; i < rows.size(); ++i) rows[i] = static_cast<std::int64_t>(i);
    t.add_i64("row", "", "meta.id", "0-based row of the master catalogue", rows);
    for (const Column* col : carried(m.table, m.path, S("match.columns_a"))) append_column(t, *col, S("match.prefix_a"), rows);
    std::vector<std::int64_t> ncat(r.n_catalogues.begin(), r.n_catalogues.end());
    t.add_i64("n_catalogues", "", "meta.number", "Number of the other catalogues with a match within the radius", ncat);
    for (std::size_t c = 0; c < others.size(); ++c) {
      const std::string pre = "c" + std::to_string(c + 1) + "_";
      std::vector<double> idx(r.match_index[c].size());
      for (std::size_t i = 0; i < idx.size(); ++i)
        idx[i] = r.match_index[c][i] < 0 ? std::nan("") : static_cast<double>(r.match_index[c][i]);
      t.add_f64(pre + "row", "", "meta.id.cross", "0-based row of the match in " + fs::path(files[c + 1]).filename().string() + " (empty: none)", idx);
      t.add_f64(pre + "sep_arcsec", "arcsec", "pos.angDistance", "Separation of that match", r.sep_arcsec[c]);
      if (!cats[c + 1].flux.empty()) {
        std::vector<double> f(idx.size(), std::nan(""));
        for (std::size_t i = 0; i < idx.size(); ++i)
          if (r.match_index[c][i] >= 0) f[i] = cats[c + 1].flux[r.match_index[c][i]];
        t.add_f64(pre + "flux_jy", "Jy", "phot.flux.density", "Flux density of that match", f);
      }
    }
    if (!fluxes.empty()) {
      std::vector<std::int64_t> nf(r.n_flux.begin(), r.n_flux.end()), dof(r.chi2_dof.begin(), r.chi2_dof.end());
      t.add_i64("n_flux", "", "meta.number", "Matches with a flux density (epochs used)", nf);
      t.add_f64("mean_flux_jy", "Jy", "phot.flux.density;stat.mean", "Unweighted mean flux density over the matches", r.mean_flux);
      t.add_f64("modulation_index", "", "src.var.index", "sigma_S / mean S (sample standard deviation)", r.modulation_index);
      t.add_f64("weighted_mean_flux_jy", "Jy", "phot.flux.density;stat.mean", "Inverse-variance weighted mean flux density", r.weighted_mean_flux);
      t.add_f64("chi2_const", "", "stat.fit.chi2", "Chi-square of the flux densities against a constant (the weighted mean)", r.chi2_const);
      t.add_i64("chi2_dof", "", "stat.fit.dof", "Degrees of freedom of chi2_const (epochs with errors - 1)", dof);
    }
    set_provenance(t, "multi", radius, parsed);
    {
      StageTimer st(rec, "write");
      write_formats(t, base + ".multi", formats, rec, outputs);
    }
    std::vector<std::size_t> hist(others.size() + 1, 0);
    for (auto v : r.n_catalogues) ++hist[static_cast<std::size_t>(v)];
    js["counts"] = {{"master_rows", m.table.rows()}, {"catalogues", others.size()}, {"rows_by_n_catalogues", hist}};
    js["outputs"] = outputs;
    write_text_atomic(base + ".match_summary.json", js.dump(2) + "\n");
    say("skerry match: " + std::to_string(m.table.rows()) + " master rows matched to " + std::to_string(others.size()) +
        " catalogues -> " + base + ".multi." + formats[0]);
    return kExitOk;
  }

  if (lr) return run_likelihood_ratio(cats[0], cats[1], parsed, radius, formats, base, rec, js, outputs);

  // ---- two catalogues -------------------------------------------------------------------
  const Catalogue& A = cats[0];
  const Catalogue& B = cats[1];
  MatchOptions mo;
  mo.mode = mode;
  mo.radius_arcsec = radius;
  mo.completeness = p;
  mo.systematic_arcsec = D("match.systematic_arcsec");
  mo.exclusive = vm["match.exclusive"].as<bool>();
  const bool by_reliability = mo.exclusive && excl_by == "reliability";
  if (by_reliability) {
    mo.exclusive_order = ExclusiveOrder::Reliability;
    mo.min_reliability = excl_min_r;
    if (excl_q0 > 0) mo.prior_q0 = excl_q0;
  }
  MatchResult r;
  {
    StageTimer st(rec, "match");
    r = match_catalogues(A.pos, B.pos, mo);
  }
  Table t;
  t.name = "matches";
  std::vector<std::int64_t> ia, ib;
  std::vector<double> sep, pa, dn, rel;
  std::vector<std::int64_t> nc, rk;
  for (const auto& q : r.pairs) {
    rel.push_back(q.reliability);
    ia.push_back(q.a);
    ib.push_back(q.b);
    sep.push_back(q.sep_arcsec);
    pa.push_back(q.pa_deg);
    nc.push_back(q.n_candidates);
    rk.push_back(q.rank);
    dn.push_back(q.norm_sep);
  }
  t.add_i64("row_a", "", "meta.id", "0-based row of A", ia);
  t.add_i64("row_b", "", "meta.id.cross", "0-based row of B", ib);
  t.add_f64("sep_arcsec", "arcsec", "pos.angDistance", "Great-circle separation of B from A (Vincenty)", sep);
  t.add_f64("pa_deg", "deg", "pos.posAng", "Position angle of B seen from A, east of north, [0, 360)", pa);
  t.add_i64("n_candidates", "", "meta.number",
            by_reliability                ? "Rows of B within the radius"
            : mode == MatchMode::ErrorAware ? "Rows of B within the radius with d < k"
                                            : "Rows of B within the radius of this row of A",
            nc);
  t.add_i64("rank", "", "meta.number",
            by_reliability ? "Rank of this B among the candidates (1 = largest likelihood ratio)"
                           : "Rank of this B among the candidates (1 = closest)",
            rk);
  if (mode == MatchMode::ErrorAware)
    t.add_f64("norm_sep", "", "stat.value", "Normalised separation d = sqrt(D^T S^-1 D)", dn);
  if (by_reliability)
    t.add_f64("reliability", "", "stat.probability", "Match reliability R = LR / (sum LR + 1 - Q0) over the candidates of this row of A", rel);
  for (const Column* c : carried(A.table, A.path, S("match.columns_a"))) append_column(t, *c, S("match.prefix_a"), ia);
  for (const Column* c : carried(B.table, B.path, S("match.columns_b"))) append_column(t, *c, S("match.prefix_b"), ib);
  set_provenance(t, mode_name(mode), radius, parsed);
  if (mode == MatchMode::ErrorAware && !by_reliability) t.set_meta("match_k", std::to_string(r.k_threshold));
  if (by_reliability) t.set_meta("match_q0", fits_real(r.q0));
  if (mo.exclusive) t.set_meta("match_exclusive", "true");

  std::vector<char> used_a(A.table.rows(), 0), used_b(B.table.rows(), 0);
  for (const auto& q : r.pairs) used_a[q.a] = used_b[q.b] = 1;
  const std::size_t matched_a = static_cast<std::size_t>(std::count(used_a.begin(), used_a.end(), 1));
  const std::size_t matched_b = static_cast<std::size_t>(std::count(used_b.begin(), used_b.end(), 1));
  {
    StageTimer st(rec, "write");
    write_formats(t, base + ".matches", formats, rec, outputs);
    if (vm["match.unmatched"].as<bool>()) {
      for (int side = 0; side < 2; ++side) {
        const Catalogue& C = side == 0 ? A : B;
        const auto& used = side == 0 ? used_a : used_b;
        Table u;
        u.name = side == 0 ? "unmatched_a" : "unmatched_b";
        std::vector<std::int64_t> rows;
        for (std::size_t i = 0; i < used.size(); ++i)
          if (!used[i]) rows.push_back(static_cast<std::int64_t>(i));
        u.add_i64("row", "", "meta.id", "0-based row of the input catalogue", rows);
        for (const auto& c : C.table.columns()) append_column(u, c, "", rows);
        set_provenance(u, mode_name(mode), radius, parsed);
        write_formats(u, base + (side == 0 ? ".unmatched_a" : ".unmatched_b"), formats, rec, outputs);
      }
    }
  }

  // Summary.
  nlohmann::ordered_json counts;
  counts["rows_a"] = A.table.rows();
  counts["rows_b"] = B.table.rows();
  counts["rows_a_without_position"] = r.a_invalid;
  counts["rows_b_without_position"] = r.b_invalid;
  counts["pairs"] = r.pairs.size();
  counts["matched_a"] = matched_a;
  counts["matched_b"] = matched_b;
  counts["unmatched_a"] = A.table.rows() - matched_a;
  counts["unmatched_b"] = B.table.rows() - matched_b;
  js["counts"] = counts;
  if (mode == MatchMode::ErrorAware) {
    js["sigma_scaled_mode"] = {{"completeness", p}, {"k", r.k_threshold}, {"systematic_arcsec", mo.systematic_arcsec},
                               {"exclusive", mo.exclusive}};
    if (by_reliability) {
      // k plays no part: pairs are accepted by R.
      js["sigma_scaled_mode"]["k"] = nullptr;
      js["sigma_scaled_mode"]["exclusive_by"] = "reliability";
      js["sigma_scaled_mode"]["min_reliability"] = mo.min_reliability;
      js["sigma_scaled_mode"]["q0"] = num(r.q0);
      js["sigma_scaled_mode"]["q0_estimated"] = r.q0_estimated;
      js["sigma_scaled_mode"]["density_b_per_arcmin2"] = num(r.density_b_arcsec2 * 3600.0);
      double expected_false = 0;  // sum of (1 - R) over the accepted pairs
      for (const auto& q : r.pairs) expected_false += 1.0 - q.reliability;
      js["sigma_scaled_mode"]["expected_false_pairs"] = num(expected_false);
    }
  }
  {
    // Offsets from the best pair of each A row (rank 1).
    std::vector<MatchPair> best;
    for (const auto& q : r.pairs)
      if (q.rank == 1 || mode == MatchMode::OneToOne || mo.exclusive) best.push_back(q);
    OffsetSummary os = offset_summary(A.pos, B.pos, best);
    js["offset_b_minus_a"] = {{"n", os.n},
                              {"median_ra_cosdec_arcsec", num(os.median_east_arcsec)},
                              {"median_ra_cosdec_err_arcsec", num(os.median_east_err_arcsec)},
                              {"median_dec_arcsec", num(os.median_north_arcsec)},
                              {"median_dec_err_arcsec", num(os.median_north_err_arcsec)},
                              {"method", "median of tangent-plane offsets at A; error 1.2533 x 1.4826 MAD / sqrt(n)"}};
    if (shifts > 0 && A.table.rows() > 0 && B.table.rows() > 0) {
      StageTimer st(rec, "chance");
      std::vector<double> radii;
      for (int s = 0; s < shifts; ++s) radii.push_back(6.0 + s);
      ChanceEstimate ce = chance_matches(A.pos, B.pos, radius, radii);
      js["chance_matches"] = {{"expected", ce.expected_chance},
                              {"error", ce.expected_chance_err},
                              {"per_shift", ce.per_shift},
                              {"shift_radii", radii},
                              {"method", "B shifted along great circles by the listed multiples of the radius at position angles 360 i/n; nearest-mode re-match; mean of the matched A rows"}};
    }
    if (!A.flux.empty() && !B.flux.empty()) {
      const double alpha = D("match.spectral_index");
      FluxRatioSummary fr = flux_ratio_summary(A.flux, B.flux, best, A.freq_hz, B.freq_hz, alpha);
      const bool corrected = A.freq_hz > 0 && B.freq_hz > 0 && A.freq_hz != B.freq_hz;
      js["flux_ratio_a_over_b"] = {{"n", fr.n},
                                   {"median", num(fr.median_ratio)},
                                   {"robust_scatter", num(fr.robust_scatter)},
                                   {"columns", {A.flux_col, B.flux_col}},
                                   {"spectral_index_assumed", corrected ? num(alpha) : nlohmann::ordered_json(nullptr)},
                                   {"freq_a_mhz", num(A.freq_hz / 1e6)},
                                   {"freq_b_mhz", num(B.freq_hz / 1e6)},
                                   {"method", "median of S_A / (S_B (nu_A/nu_B)^alpha); scatter 1.4826 MAD"}};
    }
  }
  js["outputs"] = outputs;
  write_text_atomic(base + ".match_summary.json", js.dump(2) + "\n");
  std::ostringstream line;
  line << "skerry match: " << A.table.rows() << " x " << B.table.rows() << " rows, " << r.pairs.size() << " pairs ("
       << mode_name(mode) << ", " << radius << " arcsec) -> " << base << ".matches." << formats[0];
  say(line.str());
  return kExitOk;
}

const CommandRegistrar reg{"match", "cross-match catalogues by sky separation", &run_match};

}  // namespace

}  // namespace skerry
