// The run report page (report_page.h). Everything drawn here is computed from
// the run folder's own files; formulas live in modules/quality and modules/plot.
#include "report/report_page.h"

#include <array>
#include <cctype>

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
#include "app/progress.h"
#include "app/version.h"
#include "report/report_match.h"
#include "report/report_names.h"
#include "report/report_util.h"
#include "report/report_viewer.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;
using plot::Plot;
using plot::Series;
using plot::SeriesKind;
using plot::xml_escape;
namespace col = plot::colour;
namespace rn = report_names;
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
using report_util::fmt;
using report_util::column;
using report_util::median;
using report_util::figure;
void histogram(const std::vector<double>& v, int nb, std::vector<double>& edges, std::vector<double>& counts,
               double lo = kNaN, double hi = kNaN) {
  report_util::histogram(v, nb, edges, counts, lo, hi);
}
constexpr double kArcsec2PerSr = 4.25451702961522e10;  // (180/pi * 3600)^2, exact by definition of the units

std::vector<double> scaled(const std::vector<double>& v, double f) {
  std::vector<double> o(v);
  for (double& x : o) x *= f;
  return o;
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
  for (const char* suffix : {rn::kRunRecord, rn::kComponentsCsv, rn::kComponentsFits, rn::kRmsMap}) {
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
  if (fs::exists(P(rn::kRunRecord))) {
    std::ifstream in(P(rn::kRunRecord));
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
  for (const char* ext : {rn::kComponentsCsv, rn::kComponentsFits, rn::kComponentsVot}) {
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
  bool have_sources = fs::exists(P(rn::kSourcesCsv));
  if (have_sources) sources = read_table(P(rn::kSourcesCsv));

  // ---- component columns
  const auto s_int = column(comps, rn::kSInt), s_int_err = column(comps, rn::kSIntErr);
  const auto s_peak = column(comps, rn::kSPeak), snr = column(comps, rn::kSnr);
  const auto flags = column(comps, rn::kFlags), resolved = column(comps, rn::kResolved);
  // Flagged = any quality warning in `flags` (informational bits live in `info_bits`).
  const auto info_bits = column(comps, rn::kInfoBits);
  std::size_t n_flagged = 0;
  for (double f : flags)
    if (std::isfinite(f) && f > 0) ++n_flagged;

  // ---- maps, one at a time (each read, summarised, tiled and cut out, then freed):
  // rms, residual, model, image.
  Progress progress("report", 6);
  ImageReadOptions ro;
  ro.require_beam = false;
  ro.allow_all_blank = true;
  std::optional<SkyImage> geom;  // header of the first map read (pixels dropped)
  long W = 0, H = 0;
  double pixel_area_sr = kNaN, arcsec_per_pix = kNaN;
  std::array<double, 2> north{0, 1}, east{-1, 0};
  auto take_geometry = [&](const SkyImage& m) {
    if (geom) return;
    geom = SkyImage();
    geom->wcs = m.wcs;
    geom->beam = m.beam;
    W = m.pixels.cols();
    H = m.pixels.rows();
    if (m.wcs) {
      const auto g = local_geometry(*m.wcs, 0.5 * static_cast<double>(W - 1), 0.5 * static_cast<double>(H - 1));
      if (g) {
        pixel_area_sr = g->pixel_area_arcsec2 / kArcsec2PerSr;
        arcsec_per_pix = std::sqrt(g->pixel_area_arcsec2);
        // North and east on the picture from the local Jacobian (parity shown as it is).
        const Eigen::Matrix2d Jinv = g->jac_arcsec_per_pix.inverse();
        Eigen::Vector2d n = Jinv * Eigen::Vector2d(0, 1), e = Jinv * Eigen::Vector2d(1, 0);
        n.normalize();
        e.normalize();
        north = {n(0), n(1)};
        east = {e(0), e(1)};
      }
    }
  };
  auto read_map = [&](const char* suffix) -> std::optional<SkyImage> {
    if (!fs::exists(P(suffix))) return std::nullopt;
    SkyImage m = read_sky_image(P(suffix), ro);
    if (geom && (m.pixels.cols() != W || m.pixels.rows() != H)) {
      res.missing.push_back(N + suffix + " differs in shape from the other maps: not shown");
      return std::nullopt;
    }
    take_geometry(m);
    return m;
  };

  // Rms first: geometry, visibility area, noise histogram, median.
  VisibilityArea va;
  std::vector<double> rms_edges, rms_counts;
  double median_rms = kNaN;
  std::optional<SkyImage> rms_map = read_map(rn::kRmsMap);
  if (!rms_map) res.missing.push_back(std::string("no noise map ") + N + rn::kRmsMap + ": no visibility area, counts not area-corrected");
  if (rms_map && std::isfinite(pixel_area_sr)) {
    va = visibility_area(rms_map->pixels, pixel_area_sr, rms_grid_for(rms_map->pixels, 60));
    // Histogram straight from the map (no copy): range, then bins.
    const ImageF& r = rms_map->pixels;
    double lo = std::numeric_limits<double>::infinity(), hi = -lo;
    for (Eigen::Index i = 0; i < r.size(); ++i)
      if (std::isfinite(r.data()[i])) { lo = std::min<double>(lo, r.data()[i]); hi = std::max<double>(hi, r.data()[i]); }
    if (std::isfinite(lo)) {
      if (hi <= lo) { lo -= 0.5 * std::fabs(lo) + 1e-12; hi += 0.5 * std::fabs(hi) + 1e-12; }
      const int nb = 40;
      for (int i = 0; i <= nb; ++i) rms_edges.push_back((lo + (hi - lo) * i / nb) * 1e3);
      rms_counts.assign(nb, 0.0);
      for (Eigen::Index i = 0; i < r.size(); ++i) {
        const double v = r.data()[i];
        if (!std::isfinite(v)) continue;
        rms_counts[static_cast<std::size_t>(std::clamp(static_cast<int>((v - lo) / (hi - lo) * nb), 0, nb - 1))] += 1;
      }
    }
  }
  if (rms_map) {
    // Median of at most 2^20 pixels at a fixed stride (sample_pixels): no sort of the map.
    std::vector<float> smp = plot::sample_pixels(rms_map->pixels);
    if (!smp.empty()) {
      std::nth_element(smp.begin(), smp.begin() + static_cast<long>(smp.size() / 2), smp.end());
      median_rms = smp[smp.size() / 2];
    }
  }
  progress.advance();

  // Components on the picture, their catalogue rows, and the sources' members.
  ViewerCatalogue vcat;
  std::map<long, std::size_t> source_index;  // source_id -> index into vcat.source_*
  if (have_sources) {
    const auto sid = column(sources, rn::kSourceId);
    const Column* nm = sources.find(rn::kDesignation);
    for (std::size_t i = 0; i < sources.rows(); ++i) {
      source_index[static_cast<long>(sid[i])] = i;
      vcat.source_labels.push_back((nm && nm->type == ColumnType::Text ? nm->text[i] + " · " : std::string()) + "source " +
                                   fmt("%.0f", sid[i]));
    }
    vcat.source_members.resize(sources.rows());
  }
  if (have_comps && geom && geom->wcs) {
    const auto x = column(comps, rn::kX), y = column(comps, rn::kY), maj = column(comps, rn::kMaj),
               mn = column(comps, rn::kMin), pa = column(comps, rn::kPa), sid = column(comps, rn::kSourceId);
    for (std::size_t i = 0; i < comps.rows(); ++i) {
      const double x0 = x[i] - 1.0, y0 = y[i] - 1.0;  // FITS 1-based -> 0-based (CONVENTIONS "Pixels and axes")
      if (!std::isfinite(x0) || !std::isfinite(y0) || !(maj[i] > 0) || !(mn[i] > 0)) continue;
      const auto g = local_geometry(*geom->wcs, x0, y0);
      if (!g) continue;
      // Sky ellipse (east, north) -> pixel frame through the local Jacobian (sky.h):
      // C_pix = J^-1 C_sky J^-T; the axes of C_pix, scaled like those of C_sky to FWHMs.
      const Eigen::Matrix2d c_sky = ellipse_to_cov({maj[i], mn[i], pa[i]});
      const Eigen::Matrix2d c_pix = g->sky_cov_to_pixel(c_sky);
      Eigen::SelfAdjointEigenSolver<Eigen::Matrix2d> es_sky(c_sky), es(c_pix);
      const double k = maj[i] * maj[i] / es_sky.eigenvalues()(1);
      const Eigen::Vector2d v = es.eigenvectors().col(1);
      DrawnComponent d;
      d.x = x0;
      d.y = y0;
      d.a = std::sqrt(k * es.eigenvalues()(1));
      d.b = std::sqrt(k * std::max(es.eigenvalues()(0), 0.0));
      d.angle_deg = std::atan2(-v(1), v(0)) * 180.0 / M_PI;  // picture: x right, y down
      d.row = i;
      const auto it = source_index.find(static_cast<long>(sid[i]));
      if (it != source_index.end()) {
        d.source = static_cast<long>(it->second);
        vcat.source_members[it->second].push_back(vcat.comps.size());
      }
      vcat.comps.push_back(d);
    }
  }
  if (have_comps) {
    vcat.columns = {"component", "island", "RA [deg]", "Dec [deg]", "S_peak [mJy/beam]", "S_int [mJy]", "SNR",
                    "FWHM [arcsec]", "PA [deg]", "intrinsic [arcsec]", "resolved", "flags", "info bits", "χ²_red"};
    const auto id = column(comps, rn::kComponentId), isl = column(comps, rn::kIslandId), ra = column(comps, rn::kRa),
               dec = column(comps, rn::kDec), spe = column(comps, rn::kSPeakErr), maj = column(comps, rn::kMaj),
               mn = column(comps, rn::kMin), pa = column(comps, rn::kPa), dmaj = column(comps, rn::kIntrinsicMaj),
               dmin = column(comps, rn::kIntrinsicMin), chi = column(comps, rn::kChi2);
    for (std::size_t i = 0; i < comps.rows(); ++i) {
      const std::uint32_t f = std::isfinite(flags[i]) && flags[i] >= 0 ? static_cast<std::uint32_t>(flags[i]) : 0;
      const std::uint32_t ib = std::isfinite(info_bits[i]) && info_bits[i] >= 0 ? static_cast<std::uint32_t>(info_bits[i]) : 0;
      vcat.rows.push_back({fmt("%.0f", id[i]), fmt("%.0f", isl[i]), fmt("%.5f", ra[i]), fmt("%+.5f", dec[i]),
                           fmt("%.3f", s_peak[i] * 1e3) + " ± " + fmt("%.3f", spe[i] * 1e3),
                           fmt("%.3f", s_int[i] * 1e3) + " ± " + fmt("%.3f", s_int_err[i] * 1e3), fmt("%.1f", snr[i]),
                           fmt("%.2f", maj[i]) + " × " + fmt("%.2f", mn[i]), fmt("%.1f", pa[i]),
                           fmt("%.2f", dmaj[i]) + " × " + fmt("%.2f", dmin[i]), resolved[i] == 1 ? "yes" : "no",
                           f ? fmt("%.0f", flags[i]) + " (" + xml_escape(flag_names(f)) + ")" : "0",
                           ib ? fmt("%.0f", info_bits[i]) + " (" + xml_escape(info_bit_names(ib)) + ")" : "0", fmt("%.2f", chi[i])});
    }
  }

  // Islands: boxes for the finer pyramid levels and the gallery.
  Table islands;
  const bool have_islands = fs::exists(P(rn::kIslandsCsv));
  if (have_islands) islands = read_table(P(rn::kIslandsCsv));
  std::map<long, std::size_t> island_row;
  std::vector<PixBox> island_box;
  const double beam_px = geom && geom->beam.valid() && std::isfinite(arcsec_per_pix) ? geom->beam.maj_arcsec / arcsec_per_pix : 4.0;
  const auto i_mr = column(islands, rn::kMeanRms);
  if (have_islands) {
    const auto iid = column(islands, rn::kIslandId), x0 = column(islands, rn::kXMin), x1 = column(islands, rn::kXMax),
               y0 = column(islands, rn::kYMin), y1 = column(islands, rn::kYMax);
    for (std::size_t i = 0; i < islands.rows(); ++i) {
      island_row[static_cast<long>(iid[i])] = i;
      // 1-based inclusive -> 0-based half-open.
      island_box.push_back({static_cast<long>(x0[i]) - 1, static_cast<long>(y0[i]) - 1, static_cast<long>(x1[i]), static_cast<long>(y1[i])});
    }
  }
  // Gallery choices (islands, components and sources tables).
  std::vector<Cutout> cuts;
  auto box_of = [&](const std::vector<long>& ids) {
    PixBox b{std::numeric_limits<long>::max(), std::numeric_limits<long>::max(), std::numeric_limits<long>::min(), std::numeric_limits<long>::min()};
    for (long id : ids) {
      const auto it = island_row.find(id);
      if (it == island_row.end()) continue;
      const PixBox& q = island_box[it->second];
      b = {std::min(b.x0, q.x0), std::min(b.y0, q.y0), std::max(b.x1, q.x1), std::max(b.y1, q.y1)};
    }
    if (b.x1 <= b.x0) return PixBox{};
    // Margin of 1.5 beams (8 px at least), then square, 24 px at least.
    const long m = std::max(8L, std::lround(1.5 * beam_px));
    b = {b.x0 - m, b.y0 - m, b.x1 + m, b.y1 + m};
    const long side = std::max({b.width(), b.height(), 24L});
    const long cx2 = b.x0 + b.x1, cy2 = b.y0 + b.y1;
    return PixBox{(cx2 - side) / 2, (cy2 - side) / 2, (cx2 - side) / 2 + side, (cy2 - side) / 2 + side};
  };
  const auto c_isl = column(comps, rn::kIslandId), c_id = column(comps, rn::kComponentId);
  std::map<long, std::vector<std::size_t>> comps_of_island;
  for (std::size_t i = 0; i < comps.rows(); ++i) comps_of_island[static_cast<long>(c_isl[i])].push_back(i);
  auto comp_rows_html = [&](const std::vector<long>& isl_ids) {
    std::string h = "<tr><th>component</th><th>S_peak [mJy/beam]</th><th>S_int [mJy]</th><th>flags</th></tr>";
    int shown = 0, total = 0;
    for (long id : isl_ids)
      for (std::size_t i : comps_of_island[id]) {
        ++total;
        if (shown++ >= 6) continue;
        const std::uint32_t f = std::isfinite(flags[i]) && flags[i] >= 0 ? static_cast<std::uint32_t>(flags[i]) : 0;
        h += "<tr><td>" + fmt("%.0f", c_id[i]) + "</td><td>" + fmt("%.3f", s_peak[i] * 1e3) + "</td><td>" + fmt("%.3f", s_int[i] * 1e3) +
             " ± " + fmt("%.3f", s_int_err[i] * 1e3) + "</td><td>" + (f ? xml_escape(flag_names(f)) : std::string("–")) + "</td></tr>";
      }
    if (total > 6) h += "<tr><td colspan=\"4\">… " + std::to_string(total - 6) + " more components</td></tr>";
    return h;
  };
  auto add_cut = [&](const std::string& category, const std::string& title, const std::vector<long>& isl_ids,
                     const std::string& head_rows) {
    Cutout c;
    c.category = category;
    c.title = title;
    c.box = box_of(isl_ids);
    if (c.box.width() <= 0) return;
    double rms_sum = 0;
    int n_rms = 0;
    for (long id : isl_ids) {
      const auto it = island_row.find(id);
      if (it == island_row.end()) continue;
      if (std::isfinite(i_mr[it->second])) { rms_sum += i_mr[it->second]; ++n_rms; }
    }
    c.rms = n_rms ? rms_sum / n_rms : median_rms;
    c.numbers_html = head_rows + comp_rows_html(isl_ids);
    for (std::size_t k = 0; k < vcat.comps.size(); ++k) {
      const auto& d = vcat.comps[k];
      if (d.x >= static_cast<double>(c.box.x0) && d.x < static_cast<double>(c.box.x1) && d.y >= static_cast<double>(c.box.y0) &&
          d.y < static_cast<double>(c.box.y1))
        c.comps.push_back(k);
    }
    cuts.push_back(std::move(c));
  };
  if (have_islands && islands.rows() > 0) {
    const auto iid = column(islands, rn::kIslandId), nc = column(islands, rn::kNComponents), rr = column(islands, rn::kResidualRms),
               ps = column(islands, rn::kPeakSnr), ifl = column(islands, rn::kFlags);
    auto island_head = [&](std::size_t i) {
      const std::uint32_t f = std::isfinite(ifl[i]) && ifl[i] >= 0 ? static_cast<std::uint32_t>(ifl[i]) : 0;
      return "<tr><th colspan=\"4\">island " + fmt("%.0f", iid[i]) + " · " + fmt("%.0f", nc[i]) + " component(s) · peak SNR " +
             fmt("%.1f", ps[i]) + " · residual rms / local rms " + fmt("%.2f", rr[i] / i_mr[i]) +
             (f ? " · flags " + xml_escape(flag_names(f)) : std::string()) + "</th></tr>";
    };
    // The k islands with the largest key among those kept (partial sort; ties by island id).
    auto top = [&](auto key, std::size_t k, auto keep) {
      std::vector<std::size_t> idx;
      for (std::size_t i = 0; i < islands.rows(); ++i) if (keep(i)) idx.push_back(i);
      const std::size_t m = std::min(k, idx.size());
      std::partial_sort(idx.begin(), idx.begin() + static_cast<long>(m), idx.end(), [&](std::size_t a, std::size_t b) {
        return key(a) != key(b) ? key(a) > key(b) : iid[a] < iid[b];
      });
      idx.resize(m);
      return idx;
    };
    if (have_sources) {
      const auto s_si = column(sources, rn::kSInt), s_sie = column(sources, rn::kSIntErr), s_nc = column(sources, rn::kNComponents),
                 s_ni = column(sources, rn::kNIslands);
      const Column* ids = sources.find(rn::kIslandIds);
      const Column* mor = sources.find(rn::kStructure);
      auto islands_of = [&](std::size_t s) {
        std::vector<long> v;
        if (!ids || ids->type != ColumnType::Text) return v;
        std::string cur;
        for (char ch : ids->text[s] + ";") {
          if (std::isdigit(static_cast<unsigned char>(ch))) cur += ch;
          else if (!cur.empty()) { v.push_back(std::stol(cur)); cur.clear(); }
        }
        return v;
      };
      auto source_head = [&](std::size_t s) {
        return "<tr><th colspan=\"4\">" + xml_escape(vcat.source_labels[s]) + " · S_int " + fmt("%.3f", s_si[s] * 1e3) + " ± " +
               fmt("%.3f", s_sie[s] * 1e3) + " mJy · " + fmt("%.0f", s_nc[s]) + " component(s) in " + fmt("%.0f", s_ni[s]) +
               " island(s)" + (mor && mor->type == ColumnType::Text ? " · " + xml_escape(mor->text[s]) : std::string()) + "</th></tr>";
      };
      // Brightest sources (by S_int), each over all its islands.
      std::vector<std::size_t> sidx(sources.rows());
      for (std::size_t i = 0; i < sidx.size(); ++i) sidx[i] = i;
      const std::size_t m = std::min<std::size_t>(6, sidx.size());
      std::partial_sort(sidx.begin(), sidx.begin() + static_cast<long>(m), sidx.end(), [&](std::size_t a, std::size_t b) {
        const double fa = std::isfinite(s_si[a]) ? s_si[a] : -1, fb = std::isfinite(s_si[b]) ? s_si[b] : -1;
        return fa != fb ? fa > fb : a < b;
      });
      for (std::size_t k = 0; k < m; ++k)
        add_cut("Brightest sources", vcat.source_labels[sidx[k]], islands_of(sidx[k]), source_head(sidx[k]));
      // The extended and associated sources: several islands, or diffuse.
      std::size_t n_ext = 0;
      const std::size_t max_ext = 12;
      for (std::size_t s = 0; s < sources.rows(); ++s) {
        const bool ext = s_ni[s] > 1 || (mor && mor->type == ColumnType::Text && mor->text[s] == "diffuse");
        if (!ext) continue;
        if (n_ext++ < max_ext)
          add_cut("Extended and associated sources (several islands, or diffuse)", vcat.source_labels[s], islands_of(s), source_head(s));
      }
      if (n_ext > max_ext)
        res.missing.push_back(std::to_string(n_ext - max_ext) + " more extended or associated sources are not in the gallery (the first " +
                              std::to_string(max_ext) + " in catalogue order are)");
    }
    for (std::size_t i : top([&](std::size_t j) { return nc[j]; }, 4, [&](std::size_t j) { return nc[j] >= 2; }))
      add_cut("Most components", "island " + fmt("%.0f", iid[i]), {static_cast<long>(iid[i])}, island_head(i));
    for (std::size_t i : top([&](std::size_t j) { return rr[j] / i_mr[j]; }, 4, [&](std::size_t j) { return std::isfinite(rr[j] / i_mr[j]); }))
      add_cut("Largest residual (residual rms / local rms)", "island " + fmt("%.0f", iid[i]), {static_cast<long>(iid[i])}, island_head(i));
    // Every island with a warning bit (its own, or one of its components'), by peak SNR.
    auto warned = [&](std::size_t j) {
      std::uint32_t f = std::isfinite(ifl[j]) && ifl[j] >= 0 ? static_cast<std::uint32_t>(ifl[j]) : 0;
      for (std::size_t c : comps_of_island[static_cast<long>(iid[j])])
        if (std::isfinite(flags[c]) && flags[c] >= 0) f |= static_cast<std::uint32_t>(flags[c]);
      return f != 0;
    };
    std::size_t n_warned = 0;
    for (std::size_t j = 0; j < islands.rows(); ++j) n_warned += warned(j) ? 1 : 0;
    const std::size_t max_warned = 60;
    for (std::size_t i : top([&](std::size_t j) { return ps[j]; }, max_warned, warned))
      add_cut("Islands with a warning bit", "island " + fmt("%.0f", iid[i]), {static_cast<long>(iid[i])}, island_head(i));
    if (n_warned > max_warned)
      res.warnings.push_back(std::to_string(n_warned) + " islands carry a warning bit; the gallery shows the " + std::to_string(max_warned) +
                             " with the highest peak SNR: look at the others in the viewer or the catalogue.");
  } else if (have_comps) {
    res.missing.push_back(std::string("no island table ") + N + rn::kIslandsCsv + ": no cut-out gallery, no full resolution in the viewer");
  }
  // Finer pyramid levels: the gallery's boxes first, then every island by peak SNR.
  std::vector<PixBox> detail;
  for (const auto& c : cuts) detail.push_back(c.box);
  if (have_islands) {
    const auto ps = column(islands, rn::kPeakSnr);
    std::vector<std::size_t> idx(islands.rows());
    for (std::size_t i = 0; i < idx.size(); ++i) idx[i] = i;
    std::stable_sort(idx.begin(), idx.end(), [&](std::size_t a, std::size_t b) { return ps[a] > ps[b]; });
    const long m = std::max(8L, std::lround(beam_px));
    for (std::size_t i : idx) detail.push_back({island_box[i].x0 - m, island_box[i].y0 - m, island_box[i].x1 + m, island_box[i].y1 + m});
  }
  ViewerOptions vo;
  vo.overview_px = std::max(512, opt.thumbnail_px);
  vo.detail_budget_px = opt.detail_pixels;
  std::vector<ViewerLayer> layers;
  if (rms_map) {
    layers.push_back(build_layer(rms_map->pixels, "rms", "Noise (rms) map", plot::ColourMap::Sequential,
                                 plot::auto_stretch(rms_map->pixels, false, true), "mJy/beam", 1e3, {}, false, vo));
    layers.back().detail_note = "the rms map is smooth on the scale of its estimation window: embedded at overview resolution only";
    rms_map.reset();
  }
  progress.advance();
  std::optional<SkyImage> residual = read_map(rn::kResidualMap);
  if (!residual) res.missing.push_back(std::string("no residual image ") + N + rn::kResidualMap);
  const char* detail_note = "full resolution is embedded only around catalogued islands (report.detail_pixels): a coarser level is shown here";
  if (residual) {
    layers.insert(layers.begin(), build_layer(residual->pixels, "residual", "Residual (image − model)", plot::ColourMap::Diverging,
                                              plot::auto_stretch(residual->pixels, true), "mJy/beam", 1e3, detail, true, vo));
    layers.front().detail_note = detail_note;
    for (auto& c : cuts) c.patch[2] = cut(residual->pixels, c.box);
  }
  progress.advance();
  std::string image_path;
  if (run.have_record && run.record.contains("inputs"))
    for (const auto& in : run.record["inputs"])
      if (in.value("role", "") == "image") image_path = in.value("path", "");
  const bool image_file = !image_path.empty() && fs::exists(image_path);
  if (image_file) residual.reset();  // not needed to rebuild the image: one map in memory at a time
  std::optional<SkyImage> model = read_map(rn::kModelMap);
  if (model) for (auto& c : cuts) c.patch[1] = cut(model->pixels, c.box);
  if (image_file) model.reset();
  progress.advance();
  std::optional<SkyImage> image;
  if (image_file) {
    try {
      image = read_sky_image(image_path, ro);
      if (geom && (image->pixels.cols() != W || image->pixels.rows() != H)) {
        res.missing.push_back("input image " + image_path + " differs in shape from the run's maps: not shown");
        image.reset();
      } else {
        take_geometry(*image);
      }
    } catch (const std::exception& e) {
      res.missing.push_back("input image unreadable: " + std::string(e.what()));
    }
  }
  if (!image && residual && model) {
    // The input image is residual + model: extract's residual is image - model, with
    // the background left in it (README, "What skerry extract writes").
    image = std::move(model);
    image->pixels += residual->pixels;
  } else if (!image) {
    res.missing.push_back("input image not found" + (image_path.empty() ? std::string() : " (" + image_path + ")"));
  }
  model.reset();
  residual.reset();
  if (image) {
    layers.insert(layers.begin(), build_layer(image->pixels, "image", "Image", plot::ColourMap::Grey,
                                              plot::auto_stretch(image->pixels), "mJy/beam", 1e3, detail, true, vo));
    layers.front().detail_note = detail_note;
    for (auto& c : cuts) c.patch[0] = cut(image->pixels, c.box);
    image.reset();
  }
  progress.advance();

  std::ostringstream body;
  std::vector<std::string> nav;
  auto section = [&](const std::string& id, const std::string& title) {
    nav.push_back("<a href=\"#" + id + "\">" + xml_escape(title) + "</a>");
    body << "<section id=\"" << id << "\"><h2>" << xml_escape(title) << "</h2>\n";
  };

  // ---- the viewer and the gallery
  section("images", "Images");
  if (layers.empty()) {
    body << "<p class=\"missing\">No images in this run folder.</p>";
  } else {
    std::size_t bytes = 0, full = 0;
    for (const auto& L : layers) { bytes += L.bytes; full = std::max(full, L.full_res_pixels); }
    // Pyramid size: complete levels cost at most 4/3 of an overview_px^2 picture per map;
    // full resolution is spent where there is something to look at (islands), up to
    // report.detail_pixels per map, which bounds the page for any image size.
    body << viewer_html(layers, vcat, W, H, std::isfinite(arcsec_per_pix) ? arcsec_per_pix : 1.0, north, east, vo)
         << "<p class=\"note\" id=\"viewer-note\">" << vcat.comps.size() << " components drawn. Tiles of " << vo.tile_px
         << " px in a 2× pyramid, complete down to the level whose longer side is at most " << vo.overview_px
         << " px; finer levels, down to full resolution, only around islands: " << fmt("%.1f", static_cast<double>(full) / 1e6)
         << " of the map's " << fmt("%.1f", static_cast<double>(W) * static_cast<double>(H) / 1e6) << " Mpixel (at most "
         << fmt("%.1f", static_cast<double>(vo.detail_budget_px) / 1e6) << " per map, report.detail_pixels); "
         << fmt("%.1f", static_cast<double>(bytes) / 1e6) << " MB of tiles.</p>\n";
  }
  body << "</section>\n";
  if (!cuts.empty()) {
    section("gallery", "Cut-outs");
    body << "<p class=\"note\">Image, model and residual of the brightest sources, the islands with most components, the "
            "largest residuals, every island with a warning bit and the sources spread over several islands or diffuse. "
            "Orange (black on the residual): component FWHM ellipses.</p>"
         << gallery_html(cuts, vcat, 1e3, "mJy/beam", H) << "</section>\n";
  }
  progress.advance();

  // ---- noise and visibility area
  if (!va.area_sr.empty()) {
    section("noise", "Noise and visibility area");
    const double deg2 = kArcsec2PerSr / 3600.0 / 3600.0;
    std::vector<double> c = rms_counts;
    for (double& v : c) v *= pixel_area_sr * deg2;  // pixels -> deg^2
    Plot h;
    h.id = "plot-rms-hist";
    h.title = "Noise distribution";
    h.x_label = "local rms [mJy/beam]";
    h.y_label = "area [deg²]";
    h.series.push_back({SeriesKind::Bars, rms_edges, c, {}, {}, col::kBlue, "", 2.5, 1.6, false});
    Plot a;
    a.id = "plot-visibility";
    a.title = "Visibility area";
    a.x_label = "rms at most [mJy/beam]";
    a.y_label = "area [deg²]";
    a.series.push_back({SeriesKind::Line, scaled(va.rms_jy_per_beam, 1e3), scaled(va.area_sr, deg2), {}, {}, col::kGreen, "", 2.5, 2.0, false});
    a.note = "total " + fmt("%.4g", va.total_area_sr * deg2) + " deg²";
    body << "<div class=\"row\">" << figure(plot::render_svg(h), "Area of the noise map per rms bin.")
         << figure(plot::render_svg(a),
                   "Cumulative area where the rms is at most the given value: a point source of peak S is detectable over the area with rms ≤ S / " +
                       fmt("%.3g", k_sigma) + ".");
    body << "<table class=\"data\" id=\"visibility-table\"><tr><th>rms ≤ [mJy/beam]</th><th>area [deg²]</th></tr>\n";
    for (std::size_t i = 0; i < va.rms_jy_per_beam.size(); i += 6)
      body << "<tr><td>" << fmt("%.6g", va.rms_jy_per_beam[i] * 1e3) << "</td><td>" << fmt("%.6g", va.area_sr[i] * deg2) << "</td></tr>\n";
    body << "<tr><td>" << fmt("%.6g", va.rms_jy_per_beam.back() * 1e3) << "</td><td>" << fmt("%.6g", va.area_sr.back() * deg2) << "</td></tr>\n";
    body << "</table></div></section>\n";
  }

  // ---- source counts
  section("counts", "Source counts");
  // Counting rule (modules/quality, count_flux_jy): an unresolved component counts by its
  // peak, a resolved one by S_int, a source by the sum over its components. A catalogue
  // without the resolved column (not written by extract) counts by S_int.
  const bool have_rule = comps.find(rn::kResolved) != nullptr;
  const std::vector<double> comp_count_flux = have_rule ? count_flux_jy(s_peak, s_int, resolved) : s_int;
  const bool by_source = have_sources && comps.find(rn::kSourceId) && sources.find(rn::kSourceId);
  const std::vector<double> count_flux =
      by_source ? sum_by_group(comp_count_flux, column(comps, rn::kSourceId), column(sources, rn::kSourceId)) : comp_count_flux;
  std::size_t n_counted = 0;
  for (double s : count_flux) if (std::isfinite(s) && s > 0) ++n_counted;
  if (n_counted == 0) {
    body << "<p class=\"missing\">No catalogued flux densities: no source counts.</p>";
  } else {
    CountsOptions co;
    co.bins_per_decade = opt.count_bins_per_decade;
    const bool have_area = !va.area_sr.empty();
    const double flat_area = geom ? static_cast<double>(W) * static_cast<double>(H) * pixel_area_sr : kNaN;
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
         << "<table class=\"data\" id=\"counts-table\"><tr><th>S lo [mJy]</th><th>S hi [mJy]</th><th>centre [mJy]</th><th>N</th><th>area [deg²]</th><th>S^2.5 dN/dS [Jy^1.5 sr^-1]</th><th>−1σ</th><th>+1σ</th></tr>\n";
    // The plot's units; edges to 6 significant digits (a catalogue value is never
    // ambiguous about its bin), derived numbers to 4.
    const double deg2 = kArcsec2PerSr / 3600.0 / 3600.0;
    for (const auto& b : bins)
      body << "<tr><td>" << fmt("%.6g", b.lo_jy * 1e3) << "</td><td>" << fmt("%.6g", b.hi_jy * 1e3) << "</td><td>" << fmt("%.4g", b.centre_jy * 1e3)
           << "</td><td>" << b.n << "</td><td>" << fmt("%.4g", b.area_sr * deg2) << "</td><td>" << fmt("%.4g", b.euclid) << "</td><td>"
           << fmt("%.3g", b.euclid_lo) << "</td><td>" << fmt("%.3g", b.euclid_hi) << "</td></tr>\n";
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
    p.y_label = "S_int / S_peak";
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
  const bool have_compl = fs::exists(P(rn::kCompletenessCsv)), have_rel = fs::exists(P(rn::kReliabilityCsv));
  double compl90_jy = kNaN;
  section("quality", "Completeness and reliability");
  if (have_compl) {
    const Table t = read_table(P(rn::kCompletenessCsv));
    const auto var = t.find(rn::kCompletenessBinnedBy);
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
    const Table t = read_table(P(rn::kReliabilityCsv));
    const auto x = column(t, "snr_centre"), f = column(t, "reliability"), lo = column(t, "reliability_lo"),
               hi = column(t, "reliability_hi"), fdr = column(t, rn::kNegToPos);
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

  // ---- cross-match (report_match.cpp)
  {
    MatchSections ms = match_sections(dir.string(), N);
    for (const auto& s : ms.sections) {
      section(s.id, s.title);
      body << s.html << "</section>\n";
    }
    res.warnings.insert(res.warnings.end(), ms.warnings.begin(), ms.warnings.end());
    res.missing.insert(res.missing.end(), ms.missing.begin(), ms.missing.end());
  }

  // ---- spectra
  for (const auto& e : fs::directory_iterator(dir)) {
    const std::string f = e.path().filename().string();
    const std::string sfx = rn::kSpectra;
    if (f.size() <= sfx.size() || f.compare(f.size() - sfx.size(), sfx.size(), sfx) != 0) continue;
    const Table t = read_table(e.path().string());
    const auto alpha = column(t, "alpha");
    std::vector<double> flux;
    std::string flux_label = "S [mJy]";
    for (const char* cname : {"s_ref_jy", "s_int_jy", "s_0_jy"})
      if (t.find(cname)) {
        flux = column(t, cname);
        // The power law's flux density at its reference frequency (a column of the table).
        const auto fr = column(t, "ref_freq_mhz");
        const double f0 = median(fr);
        if (std::string(cname) == "s_ref_jy" && std::isfinite(f0)) {
          bool same = true;
          for (double v : fr) same = same && (!std::isfinite(v) || v == f0);
          flux_label = same ? "S at " + fmt("%.0f", f0) + " MHz [mJy]" : "S at each fit's reference frequency (median " + fmt("%.0f", f0) + " MHz) [mJy]";
        }
        break;
      }
    if (flux.empty())
      for (const auto& c : t.columns()) if (c.unit == "Jy" && c.type == ColumnType::Float64) { flux = c.f64; break; }
    section("spectra", "Spectral indices");
    body << "<p class=\"note\">From " << xml_escape(f) << ".</p>";
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
    s.x_label = flux_label;
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
       << ".viewer{display:flex;gap:18px;align-items:flex-start}.vw-main{flex:1 1 auto;min-width:0}.vw-side{flex:0 0 360px;max-height:760px;overflow:auto}\n"
       << "#vw-canvas{display:block;width:100%;height:640px;border:1px solid #888;cursor:crosshair;background:#6d6d6d}\n"
       << ".vw-bar button{font-size:13px;margin:0 4px 6px 0;padding:3px 10px;border:1px solid #89a;background:#eef3f7;border-radius:4px;cursor:pointer}\n"
       << ".vw-bar button.on{background:#14324a;color:#fff}.vw-sep{display:inline-block;width:14px}.vw-bar label{font-size:13px}\n"
       << ".vw-status{font-size:12px;color:#333;margin:4px 0}.vw-hint,.note{font-size:12px;color:#444}\n"
       << ".gallery{display:grid;grid-template-columns:repeat(auto-fill,minmax(560px,1fr));gap:14px}\n"
       << ".cutout{border:1px solid #d4dbe2;border-radius:6px;padding:8px}.ctitle{font-weight:600;font-size:13px;margin-bottom:4px}\n"
       << ".cpanels{display:flex;gap:6px}.cpanel svg{display:block;border:1px solid #888}.clabel{font-size:11px;color:#555}\n"
       << ".lrsum{font-size:14px;background:#eef5fa;border-radius:6px;padding:6px 12px}\n"
       << ".cscale{font-size:11px;color:#555;margin:3px 0}.cnum{font-size:11px}.goto{font-size:12px;margin-top:4px}\n"
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
  if (std::isfinite(median_rms)) card(fmt("%.3g", median_rms * 1e6) + " µJy/beam", "median rms");
  if (geom && geom->beam.valid()) card(fmt("%.3g", geom->beam.maj_arcsec) + "″ × " + fmt("%.3g", geom->beam.min_arcsec) + "″", "beam FWHM, PA " + fmt("%.0f", geom->beam.pa_deg) + "°");
  card(fmt("%.3g", k_sigma) + " σ", "peak detection threshold");
  html << "</div>";
  if (!res.missing.empty()) {
    html << "<ul class=\"missing\" id=\"missing\">";
    for (const auto& m : res.missing) html << "<li>" << xml_escape(m) << "</li>";
    html << "</ul>";
  }
  html << "</section>\n" << body.str() << "</main></body></html>\n";

  res.path = opt.output.empty() ? P(rn::kReportHtml) : opt.output;
  write_text_atomic(res.path, html.str());
  return res;
}

}  // namespace skerry
