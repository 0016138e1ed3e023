// The run report page (report_page.h). Everything drawn here is computed from
// the run folder's own files; formulas live in modules/quality and modules/plot.
#include "report/report_page.h"

#include <Eigen/Eigenvalues>
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <limits>
#include <map>
#include <nlohmann/json.hpp>
#include <sstream>

#include "app/errors.h"
#include "io/atomic_file.h"
#include "io/fits_image.h"
#include "io/table_io.h"
#include "skerry/catalogue.h"
#include "skerry/gaussian.h"
#include "skerry/plot.h"
#include "skerry/quality.h"
#include "skerry/sky.h"
#include "app/version.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;
using plot::Plot;
using plot::Series;
using plot::SeriesKind;
using plot::xml_escape;
namespace col = plot::colour;
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
constexpr double kArcsec2PerSr = 4.25451702961522e10;  // (180/pi * 3600)^2, exact by definition of the units

std::string fmt(const char* f, double v) {
  char b[64];
  std::snprintf(b, sizeof b, f, v);
  return b;
}

std::vector<double> column(const Table& t, const std::string& name) {
  const Column* c = t.find(name);
  std::vector<double> v;
  if (!c) return std::vector<double>(t.rows(), kNaN);
  if (c->type == ColumnType::Float64) return c->f64;
  if (c->type == ColumnType::Int64) for (auto x : c->i64) v.push_back(static_cast<double>(x));
  else v.assign(t.rows(), kNaN);
  return v;
}

double median(std::vector<double> v) {
  v.erase(std::remove_if(v.begin(), v.end(), [](double x) { return !std::isfinite(x); }), v.end());
  if (v.empty()) return kNaN;
  std::sort(v.begin(), v.end());
  const std::size_t n = v.size();
  return n % 2 ? v[n / 2] : 0.5 * (v[n / 2 - 1] + v[n / 2]);
}

std::vector<double> scaled(const std::vector<double>& v, double f) {
  std::vector<double> o(v);
  for (double& x : o) x *= f;
  return o;
}

/// Histogram with `nb` equal bins over the finite values (edges, counts).
void histogram(const std::vector<double>& v, int nb, std::vector<double>& edges, std::vector<double>& counts,
               double lo = kNaN, double hi = kNaN) {
  edges.clear();
  counts.clear();
  double a = std::numeric_limits<double>::infinity(), b = -a;
  for (double x : v) if (std::isfinite(x)) { a = std::min(a, x); b = std::max(b, x); }
  if (std::isfinite(lo)) a = lo;
  if (std::isfinite(hi)) b = hi;
  if (!(b >= a) || !std::isfinite(a)) return;
  if (b == a) { a -= 0.5; b += 0.5; }
  for (int i = 0; i <= nb; ++i) edges.push_back(a + (b - a) * i / nb);
  counts.assign(static_cast<std::size_t>(nb), 0.0);
  for (double x : v) {
    if (!std::isfinite(x) || x < a || x > b) continue;
    int k = static_cast<int>((x - a) / (b - a) * nb);
    k = std::clamp(k, 0, nb - 1);
    counts[static_cast<std::size_t>(k)] += 1;
  }
}

std::string figure(const std::string& svg, const std::string& caption) {
  return "<figure class=\"plotbox\">" + svg + "<figcaption>" + caption + "</figcaption></figure>\n";
}

struct Run {
  fs::path dir;
  std::string name;
  nlohmann::json record;  // null when absent
  bool have_record = false;
};

std::string find_name(const fs::path& dir, const std::string& wanted) {
  if (!wanted.empty()) return wanted;
  std::vector<std::string> names;
  for (const char* suffix : {".run.json", ".components.csv", ".components.fits", ".rms_map.fits"}) {
    const std::string sfx = suffix;
    for (const auto& e : fs::directory_iterator(dir)) {
      const std::string f = e.path().filename().string();
      if (f.size() > sfx.size() && f.compare(f.size() - sfx.size(), sfx.size(), sfx) == 0)
        names.push_back(f.substr(0, f.size() - sfx.size()));
    }
    if (!names.empty()) break;
  }
  std::sort(names.begin(), names.end());
  names.erase(std::unique(names.begin(), names.end()), names.end());
  if (names.empty()) throw InputError(dir.string(), "no run found (no NAME.run.json, NAME.components.csv or NAME.rms_map.fits)");
  if (names.size() > 1)
    throw UsageError(dir.string() + ": holds several runs (" + names[0] + ", " + names[1] +
                     ", ...); choose one with --report.name");
  return names[0];
}

/// An image thumbnail with a colour bar, a scale bar and (optionally) component ellipses.
struct Ellipses {
  std::vector<double> x, y, maj_arcsec, min_arcsec, pa_deg;  // x, y 0-based pixels
};

std::string image_panel(const std::string& id, const std::string& title, const ImageF& img, const SkyImage& geom,
                        plot::ColourMap map, const plot::Stretch& st, const std::string& unit, double unit_scale,
                        const Ellipses* ell, int max_px) {
  double scale = 1;
  const plot::Raster r = plot::thumbnail(img, st, map, max_px, &scale);
  if (r.width == 0) return "<p class=\"missing\">" + xml_escape(title) + ": empty image</p>";
  const std::string png = plot::base64(plot::encode_png(r));
  const double cx = 0.5 * static_cast<double>(img.cols() - 1), cy = 0.5 * static_cast<double>(img.rows() - 1);
  const auto g0 = geom.wcs ? local_geometry(*geom.wcs, cx, cy) : std::nullopt;
  std::ostringstream o;
  o << "<figure class=\"imagebox\" id=\"" << id << "\"><div class=\"imgtitle\">" << xml_escape(title) << "</div>\n";
  o << "<svg xmlns=\"http://www.w3.org/2000/svg\" class=\"thumb\" width=\"" << r.width << "\" height=\"" << r.height
    << "\" viewBox=\"0 0 " << r.width << ' ' << r.height << "\">\n";
  o << "<image href=\"data:image/png;base64," << png << "\" x=\"0\" y=\"0\" width=\"" << r.width << "\" height=\""
    << r.height << "\" style=\"image-rendering:pixelated\"/>\n";
  std::size_t drawn = 0;
  if (ell && geom.wcs) {
    o << "<g class=\"components\" fill=\"none\" stroke=\"" << col::kOrange << "\" stroke-width=\"1.3\">\n";
    for (std::size_t i = 0; i < ell->x.size(); ++i) {
      const double x = ell->x[i], y = ell->y[i];
      if (!std::isfinite(x) || !std::isfinite(y) || !(ell->maj_arcsec[i] > 0) || !(ell->min_arcsec[i] > 0)) continue;
      const auto g = local_geometry(*geom.wcs, x, y);
      if (!g) continue;
      // Sky ellipse (east, north) -> pixel frame through the local Jacobian (sky.h):
      // C_pix = J^-1 C_sky J^-T; the axes of C_pix, scaled like those of C_sky to FWHMs.
      const Eigen::Matrix2d c_sky = ellipse_to_cov({ell->maj_arcsec[i], ell->min_arcsec[i], ell->pa_deg[i]});
      const Eigen::Matrix2d c_pix = g->sky_cov_to_pixel(c_sky);
      Eigen::SelfAdjointEigenSolver<Eigen::Matrix2d> es_sky(c_sky), es(c_pix);
      const double k = ell->maj_arcsec[i] * ell->maj_arcsec[i] / es_sky.eigenvalues()(1);
      const double a_pix = std::sqrt(k * es.eigenvalues()(1)), b_pix = std::sqrt(k * std::max(es.eigenvalues()(0), 0.0));
      const Eigen::Vector2d v = es.eigenvectors().col(1);
      // Thumbnail: x right, y down (image row 0 at the bottom); angle of the major axis from +x.
      const double ang = std::atan2(-v(1), v(0)) * 180.0 / M_PI;
      const double tx = (x + 0.5) * scale, ty = r.height - (y + 0.5) * scale;
      o << "<ellipse class=\"comp\" cx=\"" << fmt("%.2f", tx) << "\" cy=\"" << fmt("%.2f", ty) << "\" rx=\""
        << fmt("%.2f", std::max(0.5 * a_pix * scale, 1.5)) << "\" ry=\"" << fmt("%.2f", std::max(0.5 * b_pix * scale, 1.5))
        << "\" transform=\"rotate(" << fmt("%.2f", ang) << ' ' << fmt("%.2f", tx) << ' ' << fmt("%.2f", ty) << ")\"/>\n";
      ++drawn;
    }
    o << "</g>\n";
  }
  // Scale bar: a nice number of arcmin near a fifth of the width.
  if (g0) {
    const double arcsec_per_pix = std::sqrt(g0->pixel_area_arcsec2);
    const double width_arcmin = img.cols() * arcsec_per_pix / 60.0;
    double bar = 1;
    for (double c : {0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 15.0, 20.0, 30.0, 60.0, 120.0})
      if (c <= width_arcmin / 4) bar = c;
    const double bar_px = bar * 60.0 / arcsec_per_pix * scale;
    const double y0 = r.height - 14;
    o << "<g class=\"scalebar\"><rect x=\"8\" y=\"" << y0 - 16 << "\" width=\"" << bar_px + 12
      << "\" height=\"26\" fill=\"#ffffff\" fill-opacity=\"0.8\" rx=\"3\"/><line x1=\"14\" y1=\"" << y0 << "\" x2=\""
      << 14 + bar_px << "\" y2=\"" << y0 << "\" stroke=\"#000\" stroke-width=\"3\"/><text x=\"" << 14 + bar_px / 2
      << "\" y=\"" << y0 - 5 << "\" text-anchor=\"middle\" font-size=\"11\" font-family=\"DejaVu Sans, sans-serif\">"
      << plot::tick_label(bar) << " arcmin</text></g>\n";
    // North and east arrows from the local Jacobian (parity shown as it is).
    const Eigen::Matrix2d Jinv = g0->jac_arcsec_per_pix.inverse();
    auto arrow = [&](double e, double n, const char* label) {
      Eigen::Vector2d d = Jinv * Eigen::Vector2d(e, n);
      d.normalize();
      const double ox = r.width - 34, oy = 40, L = 22;
      const double ex = ox + L * d(0), ey = oy - L * d(1);
      o << "<line x1=\"" << ox << "\" y1=\"" << oy << "\" x2=\"" << fmt("%.1f", ex) << "\" y2=\"" << fmt("%.1f", ey)
        << "\" stroke=\"#fff\" stroke-width=\"2\"/><text x=\"" << fmt("%.1f", ox + 1.45 * L * d(0)) << "\" y=\""
        << fmt("%.1f", oy - 1.45 * L * d(1) + 4) << "\" fill=\"#fff\" font-size=\"11\" text-anchor=\"middle\" font-family=\"DejaVu Sans, sans-serif\">"
        << label << "</text>";
    };
    o << "<g class=\"compass\">";
    arrow(0, 1, "N");
    arrow(1, 0, "E");
    o << "</g>\n";
  }
  o << "</svg>\n" << plot::colour_bar_svg(st, map, unit, unit_scale, std::min(r.width, 420));
  if (ell) o << "<figcaption>" << drawn << " fitted components drawn as their FWHM ellipses (orange)</figcaption>";
  o << "</figure>\n";
  return o.str();
}

}  // namespace

ReportResult write_report(const ReportOptions& opt) {
  ReportResult res;
  const fs::path dir(opt.run_dir);
  std::error_code ec;
  if (!fs::is_directory(dir, ec)) throw InputError(opt.run_dir, "not a folder (give the run folder written by skerry extract)");
  Run run;
  run.dir = dir;
  run.name = find_name(dir, opt.name);
  res.name = run.name;
  const std::string N = run.name;
  auto P = [&](const std::string& suffix) { return (dir / (N + suffix)).string(); };

  // ---- run record
  if (fs::exists(P(".run.json"))) {
    std::ifstream in(P(".run.json"));
    try {
      run.record = nlohmann::json::parse(in);
      run.have_record = true;
    } catch (const std::exception& e) {
      res.missing.push_back(N + ".run.json is not valid JSON (" + std::string(e.what()).substr(0, 80) + ")");
    }
  } else {
    res.missing.push_back("no run record " + N + ".run.json: provenance and timings unknown");
  }
  double k_sigma = 5.0;
  if (run.have_record && run.record.contains("values") && run.record["values"].contains("peak_snr_used")) {
    try { k_sigma = std::stod(run.record["values"]["peak_snr_used"].get<std::string>()); } catch (...) {}
  }

  // ---- catalogue
  Table comps;
  bool have_comps = false;
  for (const char* ext : {".components.csv", ".components.fits", ".components.vot"}) {
    if (!fs::exists(P(ext))) continue;
    comps = read_table(P(ext));
    have_comps = true;
    break;
  }
  res.catalogue_found = have_comps;
  if (!have_comps) res.missing.push_back("no component catalogue " + N + ".components.csv: no components drawn, no counts");
  res.n_components = have_comps ? comps.rows() : 0;
  if (have_comps && comps.rows() == 0) res.missing.push_back("the component catalogue " + N + ".components.csv is empty: nothing was detected above the threshold");
  Table sources;
  bool have_sources = fs::exists(P(".sources.csv"));
  if (have_sources) sources = read_table(P(".sources.csv"));

  // ---- maps
  std::optional<SkyImage> rms, residual, image;
  ImageReadOptions ro;
  ro.require_beam = false;
  ro.allow_all_blank = true;
  if (fs::exists(P(".rms_map.fits"))) rms = read_sky_image(P(".rms_map.fits"), ro);
  else res.missing.push_back("no noise map " + N + ".rms_map.fits: no visibility area, counts not area-corrected");
  if (fs::exists(P(".residual_map.fits"))) residual = read_sky_image(P(".residual_map.fits"), ro);
  else res.missing.push_back("no residual image " + N + ".residual_map.fits");
  std::string image_path;
  if (run.have_record && run.record.contains("inputs"))
    for (const auto& in : run.record["inputs"])
      if (in.value("role", "") == "image") image_path = in.value("path", "");
  if (!image_path.empty() && fs::exists(image_path)) {
    try { image = read_sky_image(image_path, ro); } catch (const std::exception& e) {
      res.missing.push_back("input image unreadable: " + std::string(e.what()));
    }
  } else if (residual && fs::exists(P(".model_map.fits"))) {
    // The input image is residual + model: extract's residual is image - model, with
    // the background left in it (README, "What skerry extract writes").
    const SkyImage m = read_sky_image(P(".model_map.fits"), ro);
    if (m.pixels.rows() == residual->pixels.rows() && m.pixels.cols() == residual->pixels.cols()) {
      image = *residual;
      image->pixels = residual->pixels + m.pixels;
    } else {
      res.missing.push_back("input image not found, and " + N + ".model_map.fits differs in shape from the residual");
    }
  } else {
    res.missing.push_back("input image not found" + (image_path.empty() ? std::string() : " (" + image_path + ")"));
  }
  const SkyImage* geom = rms ? &*rms : residual ? &*residual : image ? &*image : nullptr;
  double pixel_area_sr = kNaN;
  if (geom && geom->wcs) {
    const auto g = local_geometry(*geom->wcs, 0.5 * (geom->pixels.cols() - 1), 0.5 * (geom->pixels.rows() - 1));
    if (g) pixel_area_sr = g->pixel_area_arcsec2 / kArcsec2PerSr;
  }

  // ---- component columns
  const auto s_int = column(comps, "s_int_jy"), s_int_err = column(comps, "s_int_err_jy");
  const auto s_peak = column(comps, "s_peak_jy_per_beam"), snr = column(comps, "snr");
  const auto flags = column(comps, "flags"), resolved = column(comps, "resolved");
  // Flagged = any quality warning in `flags` (informational bits live in `info_bits`).
  std::size_t n_flagged = 0;
  for (double f : flags)
    if (std::isfinite(f) && f > 0) ++n_flagged;

  std::ostringstream body;
  std::vector<std::string> nav;
  auto section = [&](const std::string& id, const std::string& title) {
    nav.push_back("<a href=\"#" + id + "\">" + xml_escape(title) + "</a>");
    body << "<section id=\"" << id << "\"><h2>" << xml_escape(title) << "</h2>\n";
  };

  // ---- images
  section("images", "Images");
  body << "<div class=\"row\">\n";
  Ellipses ell;
  if (have_comps) {
    ell.x = column(comps, "x_pix1");
    ell.y = column(comps, "y_pix1");
    for (double& v : ell.x) v -= 1.0;  // FITS 1-based -> 0-based (docs/CONVENTIONS.md "Pixels and axes")
    for (double& v : ell.y) v -= 1.0;
    ell.maj_arcsec = column(comps, "maj_arcsec");
    ell.min_arcsec = column(comps, "min_arcsec");
    ell.pa_deg = column(comps, "pa_deg");
  }
  if (image)
    body << image_panel("img-image", "Image with fitted components", image->pixels, *image, plot::ColourMap::Grey,
                        plot::auto_stretch(image->pixels), "mJy/beam", 1e3, have_comps ? &ell : nullptr, opt.thumbnail_px);
  if (residual)
    body << image_panel("img-residual", "Residual (image - model)", residual->pixels, *residual,
                        plot::ColourMap::Diverging, plot::auto_stretch(residual->pixels, true), "mJy/beam", 1e3,
                        have_comps ? &ell : nullptr, opt.thumbnail_px);
  if (rms)
    body << image_panel("img-rms", "Noise (rms) map", rms->pixels, *rms, plot::ColourMap::Sequential,
                        plot::auto_stretch(rms->pixels, false, true), "mJy/beam", 1e3, nullptr, opt.thumbnail_px);
  if (!image && !residual && !rms) body << "<p class=\"missing\">No images in this run folder.</p>";
  body << "</div></section>\n";

  // ---- noise and visibility area
  VisibilityArea va;
  if (rms && std::isfinite(pixel_area_sr)) {
    section("noise", "Noise and visibility area");
    va = visibility_area(rms->pixels, pixel_area_sr, rms_grid_for(rms->pixels, 60));
    std::vector<double> rv;
    for (Eigen::Index i = 0; i < rms->pixels.size(); ++i)
      if (std::isfinite(rms->pixels.data()[i])) rv.push_back(rms->pixels.data()[i] * 1e3);
    std::vector<double> e, c;
    histogram(rv, 40, e, c);
    for (double& v : c) v *= pixel_area_sr * kArcsec2PerSr / 3600.0 / 3600.0;  // pixels -> deg^2
    Plot h;
    h.id = "plot-rms-hist";
    h.title = "Noise distribution";
    h.x_label = "local rms [mJy/beam]";
    h.y_label = "area [deg²]";
    h.series.push_back({SeriesKind::Bars, e, c, {}, {}, col::kBlue, "", 2.5, 1.6, false});
    Plot a;
    a.id = "plot-visibility";
    a.title = "Visibility area";
    a.x_label = "rms at most [mJy/beam]";
    a.y_label = "area [deg²]";
    a.series.push_back({SeriesKind::Line, scaled(va.rms_jy_per_beam, 1e3), scaled(va.area_sr, kArcsec2PerSr / 3600.0 / 3600.0), {}, {}, col::kGreen, "", 2.5, 2.0, false});
    a.note = "total " + fmt("%.4g", va.total_area_sr * kArcsec2PerSr / 3600.0 / 3600.0) + " deg²";
    body << "<div class=\"row\">" << figure(plot::render_svg(h), "Area of the noise map per rms bin.")
         << figure(plot::render_svg(a),
                   "Cumulative area where the rms is at most the given value: a point source of peak S is detectable over the area with rms ≤ S / " +
                       fmt("%.3g", k_sigma) + ".")
         << "</div>\n";
    body << "<table class=\"data\" id=\"visibility-table\"><tr><th>rms ≤ [Jy/beam]</th><th>area [sr]</th></tr>\n";
    for (std::size_t i = 0; i < va.rms_jy_per_beam.size(); i += 6)
      body << "<tr><td>" << fmt("%.9e", va.rms_jy_per_beam[i]) << "</td><td>" << fmt("%.6e", va.area_sr[i]) << "</td></tr>\n";
    body << "<tr><td>" << fmt("%.9e", va.rms_jy_per_beam.back()) << "</td><td>" << fmt("%.6e", va.area_sr.back()) << "</td></tr>\n";
    body << "</table></section>\n";
  }

  // ---- source counts
  section("counts", "Source counts");
  // Counting rule (modules/quality, count_flux_jy): an unresolved component counts by its
  // peak, a resolved one by S_int, a source by the sum over its components. A catalogue
  // without the resolved column (not written by extract) counts by S_int.
  const bool have_rule = comps.find("resolved") != nullptr;
  const std::vector<double> comp_count_flux = have_rule ? count_flux_jy(s_peak, s_int, resolved) : s_int;
  const bool by_source = have_sources && comps.find("source_id") && sources.find("source_id");
  const std::vector<double> count_flux =
      by_source ? sum_by_group(comp_count_flux, column(comps, "source_id"), column(sources, "source_id")) : comp_count_flux;
  std::size_t n_counted = 0;
  for (double s : count_flux) if (std::isfinite(s) && s > 0) ++n_counted;
  if (n_counted == 0) {
    body << "<p class=\"missing\">No catalogued flux densities: no source counts.</p>";
  } else {
    CountsOptions co;
    co.bins_per_decade = opt.count_bins_per_decade;
    const bool have_area = !va.area_sr.empty();
    const double flat_area = geom ? static_cast<double>(geom->pixels.size()) * pixel_area_sr : kNaN;
    auto area_of = [&](double s) { return have_area ? va.area_at(s / k_sigma) : flat_area; };
    const auto bins = euclidean_counts(count_flux, co, area_of);
    Series pts{SeriesKind::ErrorPoints, {}, {}, {}, {}, col::kVermillion, "", 3.5, 1.6, false};
    for (const auto& b : bins) {
      if (b.n == 0 || !(b.area_sr > 0)) continue;
      pts.x.push_back(b.centre_jy * 1e3);
      pts.y.push_back(b.euclid);
      pts.y_lo.push_back(b.euclid_lo);
      pts.y_hi.push_back(b.euclid_hi);
    }
    Plot p;
    p.id = "plot-counts";
    p.title = "Euclidean-normalised differential counts";
    p.x_label = "S at bin centre [mJy]";
    p.y_label = "S^2.5 dN/dS [Jy^1.5 sr^-1]";
    p.x_log = p.y_log = true;
    p.series.push_back(pts);
    body << "<div class=\"row\">"
         << figure(plot::render_svg(p),
                   "Counts of " + std::string(by_source ? "sources" : "components") +
                       std::string(have_rule ? (by_source ? " by the sum over each source's components of S_peak (unresolved) or S_int (resolved)"
                                                          : " by S_peak (unresolved) or S_int (resolved)")
                                             : " by S_int") +
                       " in logarithmic bins (" + std::to_string(co.bins_per_decade) +
                       " per decade), each divided by the visibility area at S/" + fmt("%.3g", k_sigma) +
                       "; bin centres are geometric means of the edges; errors are 1σ Poisson limits after Gehrels (1986, ApJ 303, 336, eqs. 7 and 12). For a point source S_int = S_peak, and the peak's error is √3 times smaller (Condon 1997, PASP 109, 166); counting faint point sources by S_int would lift more of them into brighter bins (Eddington bias). Near the threshold the S_int/S_peak test still calls some point sources resolved, so the faintest bins can lie above the true counts (by about 20 % at 10–30σ in a simulated field of point sources).")
         << "<table class=\"data\" id=\"counts-table\"><tr><th>S lo [Jy]</th><th>S hi [Jy]</th><th>centre [Jy]</th><th>N</th><th>area [sr]</th><th>S^2.5 dN/dS</th><th>−1σ</th><th>+1σ</th></tr>\n";
    for (const auto& b : bins)
      body << "<tr><td>" << fmt("%.6e", b.lo_jy) << "</td><td>" << fmt("%.6e", b.hi_jy) << "</td><td>" << fmt("%.6e", b.centre_jy)
           << "</td><td>" << b.n << "</td><td>" << fmt("%.6e", b.area_sr) << "</td><td>" << fmt("%.6e", b.euclid) << "</td><td>"
           << fmt("%.4e", b.euclid_lo) << "</td><td>" << fmt("%.4e", b.euclid_hi) << "</td></tr>\n";
    body << "</table></div>\n";
  }
  body << "</section>\n";

  // ---- flux densities
  if (have_comps && comps.rows() > 0) {
    section("fluxes", "Flux densities and sizes");
    Series unres{SeriesKind::Points, {}, {}, {}, {}, col::kBlue, "unresolved", 2.5, 1.6, false};
    Series reso{SeriesKind::Points, {}, {}, {}, {}, col::kOrange, "resolved", 2.5, 1.6, false};
    for (std::size_t i = 0; i < comps.rows(); ++i) {
      const double ratio = s_int[i] / s_peak[i];
      (resolved[i] == 1 ? reso : unres).x.push_back(snr[i]);
      (resolved[i] == 1 ? reso : unres).y.push_back(ratio);
    }
    // Envelope 1 + a SNR^-b (fitting.h resolved_envelope; REF-RESOLVED-01 family), a and b from the run's configuration.
    double ea = 3.5, eb = 1.0;
    if (run.have_record && run.record.contains("configuration")) {
      const auto& c = run.record["configuration"];
      for (auto it = c.begin(); it != c.end(); ++it) {
        if (it.key().find("envelope_a") != std::string::npos) try { ea = std::stod(it.value().get<std::string>()); } catch (...) {}
        if (it.key().find("envelope_b") != std::string::npos) try { eb = std::stod(it.value().get<std::string>()); } catch (...) {}
      }
    }
    Series env{SeriesKind::Line, {}, {}, {}, {}, col::kBlack, "envelope", 2.5, 1.4, true};
    double smin = k_sigma * 0.8, smax = k_sigma * 2;
    for (double s : snr) if (std::isfinite(s)) smax = std::max(smax, s);
    for (int i = 0; i <= 80; ++i) {
      const double s = smin * std::pow(smax / smin, i / 80.0);
      env.x.push_back(s);
      env.y.push_back(1.0 + ea * std::pow(s, -eb));
    }
    Plot p;
    p.id = "plot-ratio";
    p.title = "Integrated / peak flux density";
    p.x_label = "component SNR (fitted peak / local rms)";
    p.y_label = "S_int / S_peak [beam]";
    p.x_log = p.y_log = true;
    p.series = {unres, reso, env};
    p.h_lines = {1.0};
    Series er{SeriesKind::Points, scaled(s_int, 1e3), {}, {}, {}, col::kGreen, "", 2.5, 1.6, false};
    for (std::size_t i = 0; i < comps.rows(); ++i) er.y.push_back(s_int_err[i] / s_int[i]);
    Plot q;
    q.id = "plot-fluxerr";
    q.title = "Fractional flux-density error";
    q.x_label = "S_int [mJy]";
    q.y_label = "σ(S_int) / S_int";
    q.x_log = q.y_log = true;
    q.series = {er};
    body << "<div class=\"row\">"
         << figure(plot::render_svg(p), "Dashed: the envelope 1 + " + fmt("%.3g", ea) + " SNR^-" + fmt("%.3g", eb) +
                                            " above which a component counts as resolved.")
         << figure(plot::render_svg(q), "Errors include the flux-scale term (run configuration).") << "</div></section>\n";
  }

  // ---- completeness and reliability (from skerry completeness, when run into this folder)
  const bool have_compl = fs::exists(P(".completeness.csv")), have_rel = fs::exists(P(".reliability.csv"));
  double compl90_jy = kNaN;
  section("quality", "Completeness and reliability");
  if (have_compl) {
    const Table t = read_table(P(".completeness.csv"));
    const auto var = t.find("binned_by");
    const auto x = column(t, "centre"), f = column(t, "completeness"), lo = column(t, "completeness_lo"),
               hi = column(t, "completeness_hi"), ratio = column(t, "mean_flux_ratio"), nn = column(t, "n_injected");
    Series cf{SeriesKind::ErrorPoints, {}, {}, {}, {}, col::kBlue, "", 3.5, 1.6, false};
    Series cs = cf, eb = cf;
    cs.colour = col::kPurple;
    eb.colour = col::kVermillion;
    std::vector<FractionBin> fb;
    for (std::size_t i = 0; i < t.rows(); ++i) {
      const bool by_flux = var && var->type == ColumnType::Text && var->text[i] == "s_peak_jy_per_beam";
      Series& s = by_flux ? cf : cs;
      s.x.push_back(by_flux ? x[i] * 1e3 : x[i]);
      s.y.push_back(f[i]);
      s.y_lo.push_back(lo[i]);
      s.y_hi.push_back(hi[i]);
      if (!by_flux) { eb.x.push_back(x[i]); eb.y.push_back(ratio[i]); }
      if (by_flux) {
        FractionBin b;
        b.centre = x[i];
        b.fraction = f[i];
        b.n = static_cast<std::size_t>(nn[i]);
        fb.push_back(b);
      }
    }
    compl90_jy = fraction_limit(fb, 0.9);
    Plot a;
    a.id = "plot-completeness";
    a.title = "Completeness vs injected peak flux density";
    a.x_label = "injected S_peak [mJy/beam]";
    a.y_label = "fraction recovered";
    a.x_log = true;
    a.y_min = 0;
    a.y_max = 1.05;
    a.series = {cf};
    a.h_lines = {0.5, 0.9};
    Plot b = a;
    b.id = "plot-completeness-snr";
    b.title = "Completeness vs injected SNR";
    b.x_label = "injected peak / local rms";
    b.series = {cs};
    b.v_lines = {k_sigma};
    Plot c;
    c.id = "plot-eddington";
    c.title = "Flux bias of recovered injections";
    c.x_label = "injected peak / local rms";
    c.y_label = "mean measured / injected S_peak";
    c.x_log = true;
    c.series = {eb};
    c.h_lines = {1.0};
    c.v_lines = {k_sigma};
    body << "<div class=\"row\">" << figure(plot::render_svg(a), "Point sources of the beam's shape injected into the image at random positions away from catalogued sources; 1σ Wilson (1927) intervals. 90 % complete above " + (std::isfinite(compl90_jy) ? fmt("%.3g", compl90_jy * 1e3) + " mJy/beam." : std::string("(not reached).")))
         << figure(plot::render_svg(b), "The same injections binned by their true SNR; dotted: the detection threshold.")
         << figure(plot::render_svg(c), "Near the threshold, noise peaks lift faint sources over it: recovered fluxes are biased high (Eddington bias).")
         << "</div>\n";
  } else {
    body << "<p class=\"missing\" id=\"no-completeness\">Completeness not measured for this run: run <code>skerry completeness IMAGE --out " << xml_escape(dir.string().empty() ? "RUN_DIR" : "RUN_DIR")
         << "</code> to add it.</p>\n";
  }
  if (have_rel) {
    const Table t = read_table(P(".reliability.csv"));
    const auto x = column(t, "snr_centre"), f = column(t, "reliability"), lo = column(t, "reliability_lo"),
               hi = column(t, "reliability_hi"), fdr = column(t, "negative_to_positive_ratio");
    Series rs{SeriesKind::ErrorPoints, x, f, lo, hi, col::kGreen, "reliability", 3.5, 1.6, false};
    Series fs_{SeriesKind::Points, x, fdr, {}, {}, col::kVermillion, "negative / positive detections", 3.5, 1.6, false};
    Plot a;
    a.id = "plot-reliability";
    a.title = "Reliability from the negated image";
    a.x_label = "component SNR";
    a.y_label = "fraction";
    a.x_log = true;
    a.y_min = 0;
    a.y_max = 1.05;
    a.series = {rs, fs_};
    body << "<div class=\"row\">" << figure(plot::render_svg(a), "Detections on the negated image (noise is symmetric, sources are positive) per SNR bin, against detections on the image: R = 1 − N_neg/N_pos; limits after Gehrels (1986).") << "</div>\n";
  } else {
    body << "<p class=\"missing\" id=\"no-reliability\">Reliability not measured for this run (skerry completeness measures it too).</p>\n";
  }
  body << "</section>\n";

  // ---- cross-match
  for (const auto& e : fs::directory_iterator(dir)) {
    const std::string f = e.path().filename().string();
    const std::string sfx = ".match_summary.json";
    if (f.size() <= sfx.size() || f.compare(f.size() - sfx.size(), sfx.size(), sfx) != 0) continue;
    const std::string base = f.substr(0, f.size() - sfx.size());
    nlohmann::json js;
    try { std::ifstream in(e.path()); js = nlohmann::json::parse(in); } catch (...) { res.missing.push_back(f + " is not valid JSON"); continue; }
    if (!js.contains("flux_ratio_a_over_b"))
      res.warnings.push_back("Cross-match " + base + ": the flux-scale check is off (no flux ratio in " + f + "), so a flux-scale error between the catalogues would go unnoticed.");
    section("match-" + base, "Cross-match " + base);
    if (fs::exists(dir / (base + ".matches.csv"))) {
      const Table m = read_table((dir / (base + ".matches.csv")).string());
      const auto sep = column(m, "sep_arcsec"), pa = column(m, "pa_deg");
      std::vector<double> de, dn, ed, c;
      for (std::size_t i = 0; i < m.rows(); ++i) {
        de.push_back(sep[i] * std::sin(pa[i] * M_PI / 180.0));  // east offset of B from A [arcsec]
        dn.push_back(sep[i] * std::cos(pa[i] * M_PI / 180.0));  // north offset [arcsec]
      }
      histogram(sep, 30, ed, c, 0.0);
      Plot h;
      h.id = "plot-sep-" + base;
      h.title = "Separations";
      h.x_label = "separation [arcsec]";
      h.y_label = "pairs per bin";
      h.series.push_back({SeriesKind::Bars, ed, c, {}, {}, col::kSkyBlue, "", 2.5, 1.6, false});
      const double me = median(de), mn = median(dn);
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
      body << "<div class=\"row\">" << figure(plot::render_svg(h), std::to_string(m.rows()) + " matched pairs.")
           << figure(plot::render_svg(s), "Offsets on the sky (east, north) from sep and PA; red: median.") << "</div>\n";
    }
    body << "</section>\n";
  }

  // ---- spectra
  for (const auto& e : fs::directory_iterator(dir)) {
    const std::string f = e.path().filename().string();
    const std::string sfx = ".spectra.csv";
    if (f.size() <= sfx.size() || f.compare(f.size() - sfx.size(), sfx.size(), sfx) != 0) continue;
    const Table t = read_table(e.path().string());
    const auto alpha = column(t, "alpha");
    std::vector<double> flux;
    for (const char* cname : {"s_ref_jy", "s_int_jy", "s_0_jy"}) if (t.find(cname)) { flux = column(t, cname); break; }
    if (flux.empty())
      for (const auto& c : t.columns()) if (c.unit == "Jy" && c.type == ColumnType::Float64) { flux = c.f64; break; }
    section("spectra", "Spectral indices (" + f + ")");
    std::vector<double> ed, c;
    histogram(alpha, 30, ed, c, -3.0, 2.0);
    Plot h;
    h.id = "plot-alpha-hist";
    h.title = "Spectral index distribution";
    h.x_label = "α (S ∝ ν^α)";
    h.y_label = "sources per bin";
    h.series.push_back({SeriesKind::Bars, ed, c, {}, {}, col::kPurple, "", 2.5, 1.6, false});
    Plot s;
    s.id = "plot-alpha-flux";
    s.title = "Spectral index vs flux density";
    s.x_label = "S [mJy]";
    s.y_label = "α";
    s.x_log = true;
    s.series.push_back({SeriesKind::Points, scaled(flux, 1e3), alpha, {}, {}, col::kPurple, "", 2.5, 1.6, false});
    s.note = "median α = " + fmt("%.3f", median(alpha));
    body << "<div class=\"row\">" << figure(plot::render_svg(s), "") << figure(plot::render_svg(h), "") << "</div></section>\n";
    break;
  }

  // ---- provenance
  section("provenance", "Provenance");
  if (run.have_record) {
    const auto& r = run.record;
    body << "<table class=\"kv\"><tr><th>command</th><td>skerry " << xml_escape(r.value("command", "")) << "</td></tr>"
         << "<tr><th>version</th><td>" << xml_escape(r.value("version", "")) << " (" << xml_escape(r.value("git_revision", "")) << ")</td></tr>"
         << "<tr><th>started</th><td>" << xml_escape(r.value("started_utc", "")) << "</td></tr>"
         << "<tr><th>threads</th><td>" << r.value("threads", 0) << "</td></tr>"
         << "<tr><th>configuration file</th><td>" << xml_escape(r.value("config_file", "")) << "</td></tr></table>\n";
    if (r.contains("inputs")) {
      body << "<h3>Inputs</h3><table class=\"data\"><tr><th>role</th><th>file</th><th>bytes</th><th>SHA-256</th></tr>";
      for (const auto& in : r["inputs"])
        body << "<tr><td>" << xml_escape(in.value("role", "")) << "</td><td>" << xml_escape(in.value("path", "")) << "</td><td>"
             << in.value("bytes", 0) << "</td><td class=\"mono\">" << xml_escape(in.value("sha256", "")) << "</td></tr>";
      body << "</table>\n";
    }
    if (r.contains("stages")) {
      Series st{SeriesKind::Bars, {}, {}, {}, {}, col::kSkyBlue, "", 2.5, 1.6, false};
      body << "<h3>Timings</h3><table class=\"data\" id=\"timings\"><tr><th>stage</th><th>wall time [s]</th></tr>";
      for (const auto& s : r["stages"])
        body << "<tr><td>" << xml_escape(s.value("stage", "")) << "</td><td>" << fmt("%.3f", s.value("seconds", 0.0)) << "</td></tr>";
      body << "<tr><th>total</th><th>" << fmt("%.3f", r.value("total_seconds", 0.0)) << "</th></tr></table>\n";
    }
    if (r.contains("counts")) {
      body << "<h3>Counts</h3><table class=\"data\">";
      for (auto it = r["counts"].begin(); it != r["counts"].end(); ++it)
        body << "<tr><td>" << xml_escape(it.key()) << "</td><td>" << it.value().dump() << "</td></tr>";
      body << "</table>\n";
    }
    if (r.contains("configuration")) {
      body << "<details><summary>Configuration (" << r["configuration"].size() << " settings)</summary><table class=\"data mono\">";
      for (auto it = r["configuration"].begin(); it != r["configuration"].end(); ++it)
        body << "<tr><td>" << xml_escape(it.key()) << "</td><td>" << xml_escape(it.value().is_string() ? it.value().get<std::string>() : it.value().dump()) << "</td></tr>";
      body << "</table></details>\n";
    }
  } else {
    body << "<p class=\"missing\">No run record.</p>";
  }
  body << "</section>\n";

  // ---- warnings where the run could mislead
  if (have_comps && comps.rows() > 0) {
    const double frac = static_cast<double>(n_flagged) / static_cast<double>(comps.rows());
    if (frac > 0.1)
      res.warnings.push_back(std::to_string(n_flagged) + " of " + std::to_string(comps.rows()) + " components (" +
                             fmt("%.0f", 100 * frac) + " %) carry quality warnings (flags != 0): check the flag bits before using them.");
    if (std::isfinite(compl90_jy)) {
      std::size_t below = 0;
      for (double s : s_peak) if (std::isfinite(s) && s < compl90_jy) ++below;
      if (below > 0)
        res.warnings.push_back(std::to_string(below) + " components lie below the 90 % completeness limit (" +
                               fmt("%.3g", compl90_jy * 1e3) + " mJy/beam): counts there are incomplete and fluxes biased high.");
    } else if (!have_compl) {
      res.warnings.push_back("Completeness was not measured: the faint end of the counts cannot be trusted yet.");
    }
  }
  if (!have_comps || comps.rows() == 0) res.warnings.insert(res.warnings.begin(), res.missing.front());

  // ---- page
  std::ostringstream html;
  const std::string title = "skerry run report: " + N;
  html << "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\n<title>" << xml_escape(title) << "</title>\n"
       << "<meta name=\"generator\" content=\"skerry " << SKERRY_VERSION << "\">\n<style>\n"
       << "body{margin:0;font-family:'DejaVu Sans',Verdana,sans-serif;color:#1d2430;background:#f2f1ec}\n"
       << "header{background:#14324a;color:#fff;padding:18px 28px}header h1{margin:0;font-size:24px;font-weight:600}\n"
       << "header p{margin:6px 0 0;color:#cfe1ee;font-size:14px}nav{background:#1f4662;padding:6px 28px}\n"
       << "nav a{color:#fff;margin-right:18px;font-size:13px;text-decoration:none}main{padding:10px 28px 40px}\n"
       << "section{background:#fff;border-radius:6px;padding:10px 18px 16px;margin:16px 0;box-shadow:0 1px 3px rgba(0,0,0,.12)}\n"
       << "h2{font-size:18px;color:#14324a;border-bottom:2px solid #56B4E9;padding-bottom:4px}h3{font-size:15px;color:#14324a}\n"
       << ".row{display:flex;flex-wrap:wrap;gap:18px;align-items:flex-start}figure{margin:0}figcaption{font-size:12px;color:#444;max-width:520px;margin-top:4px}\n"
       << ".imgtitle{font-weight:600;font-size:14px;margin-bottom:4px}.thumb{display:block;border:1px solid #888}\n"
       << ".warn{background:#fff4e0;border-left:6px solid #D55E00;padding:10px 16px;margin:16px 0;border-radius:4px}\n"
       << ".warn h2{border:none;color:#a04000;margin:0 0 6px}.warn li{margin:3px 0}\n"
       << ".missing{color:#7a4b00;background:#fbf3df;padding:6px 10px;border-radius:4px}\n"
       << ".summary{display:flex;gap:14px;flex-wrap:wrap}.card{background:#eef5fa;border-radius:6px;padding:8px 14px;min-width:120px}\n"
       << ".card b{display:block;font-size:20px;color:#0072B2}.card span{font-size:12px;color:#333}\n"
       << "table.data,table.kv{border-collapse:collapse;font-size:12px;margin:6px 0}table.data td,table.data th,table.kv td,table.kv th{border:1px solid #ccd;padding:2px 8px;text-align:left}\n"
       << "table.data th{background:#e7eef4}.mono,code{font-family:'DejaVu Sans Mono',monospace;font-size:11px}details{margin-top:8px}\n"
       << "</style></head><body>\n";
  html << "<header><h1>" << xml_escape(N) << "</h1><p>Run report of the skerry pipeline · version " << SKERRY_VERSION;
  if (run.have_record) html << " · run started " << xml_escape(run.record.value("started_utc", ""));
  html << "</p></header>\n<nav>";
  for (const auto& a : nav) html << a;
  html << "</nav>\n<main>\n";
  if (!res.warnings.empty()) {
    html << "<div class=\"warn\" id=\"warnings\"><h2>Read this first</h2><ul>";
    for (const auto& w : res.warnings) html << "<li>" << xml_escape(w) << "</li>";
    html << "</ul></div>\n";
  }
  html << "<section id=\"summary\"><h2>Summary</h2><div class=\"summary\">";
  auto card = [&](const std::string& v, const std::string& l) { html << "<div class=\"card\"><b>" << xml_escape(v) << "</b><span>" << xml_escape(l) << "</span></div>"; };
  card(have_comps ? std::to_string(comps.rows()) : "–", "components");
  card(have_sources ? std::to_string(sources.rows()) : "–", "sources");
  card(std::to_string(n_flagged), "components with quality flags");
  if (!va.area_sr.empty()) card(fmt("%.3g", va.total_area_sr * kArcsec2PerSr / 3600 / 3600) + " deg²", "area mapped");
  if (rms) card(fmt("%.3g", median(std::vector<double>(rms->pixels.data(), rms->pixels.data() + rms->pixels.size())) * 1e6) + " µJy/beam", "median rms");
  if (geom && geom->beam.valid()) card(fmt("%.3g", geom->beam.maj_arcsec) + "″ × " + fmt("%.3g", geom->beam.min_arcsec) + "″", "beam FWHM, PA " + fmt("%.0f", geom->beam.pa_deg) + "°");
  card(fmt("%.3g", k_sigma) + " σ", "peak detection threshold");
  html << "</div>";
  if (!res.missing.empty()) {
    html << "<ul class=\"missing\" id=\"missing\">";
    for (const auto& m : res.missing) html << "<li>" << xml_escape(m) << "</li>";
    html << "</ul>";
  }
  html << "</section>\n" << body.str() << "</main></body></html>\n";

  res.path = opt.output.empty() ? P(".report.html") : opt.output;
  write_text_atomic(res.path, html.str());
  return res;
}

}  // namespace skerry
