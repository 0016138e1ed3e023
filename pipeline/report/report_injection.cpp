// Completeness by injection, reliability from the negated image (report_injection.h).
#include "report/report_injection.h"

#include <tbb/parallel_for.h>

#include <Eigen/Dense>
#include <algorithm>
#include <atomic>
#include <cerrno>
#include <cstring>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <limits>
#include <random>
#include <sstream>

#include "app/errors.h"
#include "extract/extract_job.h"
#include "extract/extract_settings.h"
#include "io/atomic_file.h"
#include "io/fits_image.h"
#include "io/table_io.h"
#include "app/progress.h"
#include "skerry/gaussian.h"
#include "skerry/plot.h"
#include "skerry/sky.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

struct Comp { double x, y, s_peak, snr; };

/// The components of a job's result: 0-based centre, peak and SNR.
std::vector<Comp> components_of(const ExtractResult& r) {
  std::vector<Comp> out;
  for (const auto& c : r.components) out.push_back({c.x_pix, c.y_pix, c.s_peak_jy_per_beam, c.snr});
  return out;
}

/// `like` (WCS, beam, frequency, path for messages) with other pixels.
SkyImage with_pixels(const SkyImage& like_without_pixels, ImageF pixels) {
  SkyImage s = like_without_pixels;
  s.pixels = std::move(pixels);
  return s;
}

struct Injection {
  int round = 0;
  double x = 0, y = 0, s_true = 0, rms = 0, s_meas = kNaN;
  bool found = false;
};

/// Edges between log-spaced grid values (geometric midpoints), plus outer edges.
std::vector<double> edges_around(const std::vector<double>& grid) {
  std::vector<double> e;
  const std::size_t n = grid.size();
  if (n == 0) return e;
  const double r = n > 1 ? std::sqrt(grid[1] / grid[0]) : 1.2;
  e.push_back(grid[0] / r);
  for (std::size_t i = 1; i < n; ++i) e.push_back(std::sqrt(grid[i - 1] * grid[i]));
  e.push_back(grid[n - 1] * r);
  return e;
}

/// NAME.completeness.csv, NAME.reliability.csv, NAME.injections.csv and
/// NAME.completeness.svg (paths appended to res.outputs).
void write_outputs(const InjectionOptions& o, const std::string& name,
                   const std::vector<std::vector<Injection>>& rounds, InjectionResult& res) {
  const fs::path od(o.out_dir);
  {
    Table t;
    t.name = "completeness";
    std::vector<std::string> var;
    std::vector<double> lo, hi, c, f, flo, fhi, mr;
    std::vector<std::int64_t> n, k;
    for (int pass = 0; pass < 2; ++pass)
      for (const auto& b : pass == 0 ? res.by_flux : res.by_snr) {
        var.push_back(pass == 0 ? "s_peak_jy_per_beam" : "snr");
        lo.push_back(b.lo); hi.push_back(b.hi); c.push_back(b.centre);
        n.push_back(static_cast<std::int64_t>(b.n)); k.push_back(static_cast<std::int64_t>(b.k));
        f.push_back(b.fraction); flo.push_back(b.fraction_lo); fhi.push_back(b.fraction_hi); mr.push_back(b.mean_ratio);
      }
    t.add_text("binned_by", "", "meta.code", "Quantity the rows are binned by: injected s_peak_jy_per_beam [Jy/beam] or injected snr (peak / local rms)", var);
    t.add_f64("lo", "", "stat.min", "Bin lower edge (unit of the variable)", lo);
    t.add_f64("hi", "", "stat.max", "Bin upper edge (unit of the variable)", hi);
    t.add_f64("centre", "", "stat.value", "Bin centre (arithmetic mean of the edges)", c);
    t.add_i64("n_injected", "", "meta.number", "Point sources injected in the bin", n);
    t.add_i64("n_recovered", "", "meta.number", "Injections with a fitted component within the match radius", k);
    t.add_f64("completeness", "", "stat.value", "n_recovered / n_injected", f);
    t.add_f64("completeness_lo", "", "stat.error", "Lower 1-sigma Wilson (1927) limit", flo);
    t.add_f64("completeness_hi", "", "stat.error", "Upper 1-sigma Wilson (1927) limit", fhi);
    t.add_f64("mean_flux_ratio", "", "stat.value", "Mean measured / injected peak of the recovered injections (Eddington bias)", mr);
    t.set_meta("seed", std::to_string(o.seed));
    t.set_meta("rounds", std::to_string(o.rounds));
    t.set_meta("per_round", std::to_string(o.per_round));
    t.set_meta("median_rms_jy_per_beam", std::to_string(res.median_rms_jy_per_beam));
    t.set_meta("method", "point sources of the restoring beam injected into the image, skerry extract re-run per round");
    const std::string p = (od / (name + ".completeness.csv")).string();
    write_table(t, p);
    res.outputs.push_back(p);
  }
  {
    Table t;
    t.name = "reliability";
    std::vector<double> lo, hi, c, f, flo, fhi, fdr;
    std::vector<std::int64_t> np, nn;
    for (const auto& b : res.reliability) {
      lo.push_back(b.lo); hi.push_back(b.hi); c.push_back(std::sqrt(b.lo * b.hi));
      np.push_back(static_cast<std::int64_t>(b.n)); nn.push_back(static_cast<std::int64_t>(b.k));
      f.push_back(b.fraction); flo.push_back(b.fraction_lo); fhi.push_back(b.fraction_hi);
      fdr.push_back(b.n ? static_cast<double>(b.k) / static_cast<double>(b.n) : kNaN);
    }
    t.add_f64("snr_lo", "", "stat.min", "Bin lower edge, component SNR", lo);
    t.add_f64("snr_hi", "", "stat.max", "Bin upper edge, component SNR", hi);
    t.add_f64("snr_centre", "", "stat.value", "Geometric bin centre", c);
    t.add_i64("n_positive", "", "meta.number", "Components found on the image", np);
    t.add_i64("n_negative", "", "meta.number", "Components found on the negated image", nn);
    t.add_f64("reliability", "", "stat.value", "1 - n_negative / n_positive, clipped to [0, 1]", f);
    t.add_f64("reliability_lo", "", "stat.error", "Lower limit from the Gehrels (1986) upper limit on n_negative", flo);
    t.add_f64("reliability_hi", "", "stat.error", "Upper limit from the Gehrels (1986) lower limit on n_negative", fhi);
    t.add_f64("negative_to_positive_ratio", "", "stat.value", "n_negative / n_positive: detections on the negated image per detection on the image", fdr);
    const std::string p = (od / (name + ".reliability.csv")).string();
    write_table(t, p);
    res.outputs.push_back(p);
  }
  {
    Table t;
    t.name = "injections";
    std::vector<std::int64_t> rd, dt;
    std::vector<double> x, y, st, sn, sm;
    for (const auto& rr : rounds)
      for (const auto& j : rr) {
        rd.push_back(j.round); x.push_back(j.x + 1); y.push_back(j.y + 1); st.push_back(j.s_true);
        sn.push_back(j.s_true / j.rms); dt.push_back(j.found); sm.push_back(j.s_meas);
      }
    t.add_i64("round", "", "meta.number", "Injection round", rd);
    t.add_f64("x_pix1", "pixel", "pos.cartesian.x", "Injected centre along FITS axis 1, 1-based", x);
    t.add_f64("y_pix1", "pixel", "pos.cartesian.y", "Injected centre along FITS axis 2, 1-based", y);
    t.add_f64("s_peak_true_jy_per_beam", "Jy/beam", "phot.flux.density", "Injected peak flux density", st);
    t.add_f64("snr_true", "", "stat.snr", "Injected peak / local rms", sn);
    t.add_i64("recovered", "", "meta.code", "1 when a component lies within the match radius", dt);
    t.add_f64("s_peak_measured_jy_per_beam", "Jy/beam", "phot.flux.density", "Fitted peak of the matched component (NaN: none)", sm);
    const std::string p = (od / (name + ".injections.csv")).string();
    write_table(t, p);
    res.outputs.push_back(p);
  }
  {
    plot::Plot p;
    p.id = "plot-completeness";
    p.title = "Completeness by injection";
    p.x_label = "injected peak / local rms";
    p.y_label = "fraction recovered";
    p.x_log = true;
    p.y_min = 0;
    p.y_max = 1.05;
    plot::Series s{plot::SeriesKind::ErrorPoints, {}, {}, {}, {}, plot::colour::kBlue, "completeness", 3.5, 1.6, false};
    for (const auto& b : res.by_snr) { s.x.push_back(b.centre); s.y.push_back(b.fraction); s.y_lo.push_back(b.fraction_lo); s.y_hi.push_back(b.fraction_hi); }
    p.series = {s};
    p.v_lines = {res.peak_snr_threshold};
    p.h_lines = {0.5};
    const std::string path = (od / (name + ".completeness.svg")).string();
    write_text_atomic(path, plot::render_svg(p));
    res.outputs.push_back(path);
  }
}

}  // namespace

InjectionResult run_injection(const InjectionOptions& o) {
  InjectionResult res;
  if (o.rounds < 1 || o.per_round < 1 || o.levels < 2 || !(o.snr_max > o.snr_min) || !(o.snr_min > 0))
    throw UsageError("completeness: rounds, per_round >= 1, levels >= 2 and 0 < snr_min < snr_max are required");
  // Every extract job runs with the settings of o.extract_config (defaults where
  // it is silent), on the image as `skerry extract` reads it.
  const ExtractSettings settings = extract_settings_from_file(o.extract_config);
  ExtractConfig job = settings.job;
  job.render_model = false;
  const SkyImage sky = read_sky_image(o.image, settings.read);
  check_extract_image(sky, job);
  const ExtractInputs inputs = read_extract_inputs(settings, sky, nullptr);
  SkyImage like = sky;
  like.pixels = ImageF();
  std::string name = o.name;
  if (name.empty()) {
    name = fs::path(o.image).filename().string();
    for (const char* ext : {".fits.gz", ".fits", ".fit", ".fts"})
      if (name.size() > std::strlen(ext) && name.compare(name.size() - std::strlen(ext), std::strlen(ext), ext) == 0) {
        name.resize(name.size() - std::strlen(ext));
        break;
      }
  }
  fs::create_directories(o.out_dir);

  const std::size_t n_units = static_cast<std::size_t>(o.rounds) + (o.reliability ? 2 : 1);
  Progress progress("completeness", n_units);

  // ---- the real run: catalogued sources (to avoid) and the rms map.
  const ExtractResult base_run = run_extract_job(sky, inputs, job);
  progress.advance();
  const auto base = components_of(base_run);
  res.peak_snr_threshold = base_run.peak_snr_used;
  const ImageF rms = base_run.maps.rms_image();
  std::vector<float> rv;
  for (Eigen::Index i = 0; i < rms.size(); ++i)
    if (std::isfinite(rms.data()[i]) && rms.data()[i] > 0) rv.push_back(rms.data()[i]);
  if (rv.empty()) throw NoDataError(o.image, "the noise map has no finite pixels: nothing to inject into");
  std::nth_element(rv.begin(), rv.begin() + static_cast<long>(rv.size() / 2), rv.end());
  res.median_rms_jy_per_beam = rv[rv.size() / 2];

  const long nx = sky.pixels.cols(), ny = sky.pixels.rows();
  const auto g0 = local_geometry(*sky.wcs, 0.5 * (nx - 1), 0.5 * (ny - 1));
  if (!g0) throw InputError(o.image, "the image centre has no sky position");
  const double beam_pix = sky.beam.maj_arcsec / std::sqrt(g0->pixel_area_arcsec2);

  // ---- reliability: the negated image (common practice: noise is symmetric, sources positive).
  std::vector<double> snr_neg;
  if (o.reliability) {
    const ExtractResult negated = run_extract_job(with_pixels(like, -sky.pixels), inputs, job);
    for (const auto& c : components_of(negated)) snr_neg.push_back(c.snr);
    progress.advance();
  }

  // ---- injection rounds (independent; each its own seed; results kept in round order).
  std::vector<double> grid;
  for (int i = 0; i < o.levels; ++i)
    grid.push_back(res.median_rms_jy_per_beam * o.snr_min * std::pow(o.snr_max / o.snr_min, static_cast<double>(i) / (o.levels - 1)));
  std::vector<std::vector<Injection>> rounds(static_cast<std::size_t>(o.rounds));
  std::vector<std::string> errors(rounds.size());
  tbb::parallel_for(std::size_t(0), rounds.size(), [&](std::size_t r) {
    try {
      std::mt19937_64 rng(o.seed * 0x9E3779B97F4A7C15ULL + r);
      std::uniform_real_distribution<double> ux(0.0, static_cast<double>(nx - 1)), uy(0.0, static_cast<double>(ny - 1));
      auto& inj = rounds[r];
      const double avoid = o.avoid_beams * beam_pix, margin = 2.0 * beam_pix;
      for (int k = 0, tries = 0; k < o.per_round && tries < o.per_round * 200; ++tries) {
        const double x = ux(rng), y = uy(rng);
        if (x < margin || y < margin || x > nx - 1 - margin || y > ny - 1 - margin) continue;
        const float lr = rms(static_cast<long>(std::lround(y)), static_cast<long>(std::lround(x)));
        if (!std::isfinite(lr) || !(lr > 0)) continue;
        bool ok = true;
        for (const auto& c : base) if (std::hypot(c.x - x, c.y - y) < avoid) { ok = false; break; }
        for (const auto& c : inj) if (ok && std::hypot(c.x - x, c.y - y) < avoid) ok = false;
        if (!ok) continue;
        Injection j;
        j.round = static_cast<int>(r);
        j.x = x;
        j.y = y;
        j.s_true = grid[static_cast<std::size_t>(k) % grid.size()];
        j.rms = lr;
        inj.push_back(j);
        ++k;
      }
      // Point sources of the restoring beam's shape: S_peak exp(-1/2 d^T C_pix^-1 d),
      // C_pix the beam covariance turned into the local pixel frame (sky.h).
      ImageF img = sky.pixels;
      for (const auto& j : inj) {
        const auto g = local_geometry(*sky.wcs, j.x, j.y);
        if (!g) continue;
        const Eigen::Matrix2d cp = g->sky_cov_to_pixel(ellipse_to_cov(to_ellipse(sky.beam)));
        const Eigen::Matrix2d ci = cp.inverse();
        const double half = 5.0 * std::sqrt(std::max(cp(0, 0), cp(1, 1)));
        const long x0 = std::max(0L, static_cast<long>(std::floor(j.x - half))), x1 = std::min(nx - 1, static_cast<long>(std::ceil(j.x + half)));
        const long y0 = std::max(0L, static_cast<long>(std::floor(j.y - half))), y1 = std::min(ny - 1, static_cast<long>(std::ceil(j.y + half)));
        for (long yy = y0; yy <= y1; ++yy)
          for (long xx = x0; xx <= x1; ++xx) {
            const double dx = xx - j.x, dy = yy - j.y;
            const double q = ci(0, 0) * dx * dx + 2 * ci(0, 1) * dx * dy + ci(1, 1) * dy * dy;
            img(yy, xx) += static_cast<float>(j.s_true * std::exp(-0.5 * q));
          }
      }
      const auto found = components_of(run_extract_job(with_pixels(like, std::move(img)), inputs, job));
      const double rmatch = o.match_beams * beam_pix;
      for (auto& j : inj) {
        double best = rmatch;
        for (const auto& c : found) {
          const double d = std::hypot(c.x - j.x, c.y - j.y);
          if (d <= best) { best = d; j.found = true; j.s_meas = c.s_peak; }
        }
      }
    } catch (const std::exception& e) {
      errors[r] = e.what();
    }
    progress.advance();
  });
  progress.finish();
  for (const auto& e : errors) if (!e.empty()) throw std::runtime_error(e);

  // ---- curves
  std::vector<double> flux, snr, ratio;
  std::vector<bool> det;
  for (const auto& rr : rounds)
    for (const auto& j : rr) {
      flux.push_back(j.s_true);
      snr.push_back(j.s_true / j.rms);
      det.push_back(j.found);
      ratio.push_back(j.found ? j.s_meas / j.s_true : kNaN);
      ++res.injected;
      res.recovered += j.found;
    }
  std::vector<double> snr_grid;
  for (double s : grid) snr_grid.push_back(s / res.median_rms_jy_per_beam);
  res.by_flux = fraction_curve(flux, det, ratio, edges_around(grid));
  res.by_snr = fraction_curve(snr, det, ratio, edges_around(snr_grid));
  std::vector<double> snr_pos;
  for (const auto& c : base) snr_pos.push_back(c.snr);
  std::vector<double> redges;
  for (int i = 0; i <= 12; ++i) redges.push_back(res.peak_snr_threshold * std::pow(10.0, i / 8.0));
  res.reliability = reliability_curve(snr_pos, snr_neg, redges);

  write_outputs(o, name, rounds, res);
  return res;
}

}  // namespace skerry
