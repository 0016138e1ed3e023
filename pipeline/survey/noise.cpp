// `skerry survey`: each tile's local noise on HEALPix cells (tiles/NAME/noise_cells.csv),
// written by the tile worker from the rms map `skerry extract` wrote, read by
// the merge to give every sky position to the tile that measures it best
// (skerry/survey.h, "Ownership by measurement quality").
#include <algorithm>
#include <cmath>
#include <filesystem>
#include <map>
#include <mutex>

#include "app/errors.h"
#include "io/atomic_file.h"
#include "io/fits_image.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "survey/engine.h"

namespace skerry::surveyrun {

namespace fs = std::filesystem;

namespace {
constexpr const char* kNoiseFile = "noise_cells.csv";

/// The rms map extract wrote into `dir` (NAME.rms_map.fits); "" when none.
std::string find_rms_map(const fs::path& dir) {
  std::error_code ec;
  std::vector<std::string> found;
  for (const auto& e : fs::directory_iterator(dir, ec)) {
    const std::string n = e.path().filename().string();
    if (n.ends_with(".rms_map.fits") && !is_temporary_name(n))
      found.push_back(e.path().string());
  }
  std::sort(found.begin(), found.end());
  return found.empty() ? "" : found.front();
}
}  // namespace

std::string tile_noise_file() { return kNoiseFile; }

void write_tile_noise(const std::string& dir) {
  const std::string rms_path = find_rms_map(dir);
  if (rms_path.empty())
    throw InputError(dir, "skerry extract wrote no rms map (NAME.rms_map.fits); the survey merge needs it "
                          "(output.maps must stay true)");
  ImageReadOptions ro;
  ro.require_beam = false;
  ro.accept_any_bunit = true;
  ro.allow_all_blank = true;
  const SkyImage rms = read_sky_image(rms_path, ro);
  const long ny = rms.pixels.rows(), nx = rms.pixels.cols();
  // Pixel scale at the grid centre [rad]: the larger of the two axis steps.
  double ra0, dec0, ra1, dec1, ra2, dec2;
  const double cx = 0.5 * static_cast<double>(nx - 1), cy = 0.5 * static_cast<double>(ny - 1);
  if (!rms.wcs->pix_to_sky(cx, cy, ra0, dec0) || !rms.wcs->pix_to_sky(cx + 1, cy, ra1, dec1) ||
      !rms.wcs->pix_to_sky(cx, cy + 1, ra2, dec2))
    throw InputError(rms_path, "the central pixel has no sky position");
  auto sep = [](double a1, double d1, double a2, double d2) {
    const double k = M_PI / 180.0;
    const double s = std::sin(0.5 * (d2 - d1) * k), t = std::sin(0.5 * (a2 - a1) * k);
    return 2.0 * std::asin(std::min(1.0, std::sqrt(s * s + std::cos(d1 * k) * std::cos(d2 * k) * t * t)));
  };
  const double pix = std::max(sep(ra0, dec0, ra1, dec1), sep(ra0, dec0, ra2, dec2));
  // Cells of at least 16 map pixels across: HEALPix pixel side sqrt(pi/3) / 2^order
  // [rad] (Gorski et al. 2005, ApJ 622, 759; REF-HEALPIX-01), sampled every 4th
  // map pixel on each axis (>= 16 samples per cell).
  int order = 0;
  while (order < 29 && std::sqrt(M_PI / 3.0) / std::ldexp(1.0, order + 1) >= 16.0 * pix) ++order;
  const long step = 4;
  std::vector<double> xs, ys;
  std::vector<float> vals;
  for (long y = 0; y < ny; y += step)
    for (long x = 0; x < nx; x += step) {
      const float v = rms.pixels(y, x);
      if (!(std::isfinite(v) && v > 0.0f)) continue;
      xs.push_back(static_cast<double>(x));
      ys.push_back(static_cast<double>(y));
      vals.push_back(v);
    }
  std::vector<double> ra(xs.size()), dec(xs.size());
  if (!xs.empty()) pix_to_sky_many(*rms.wcs, xs.size(), xs.data(), ys.data(), ra.data(), dec.data());
  std::vector<std::pair<std::int64_t, float>> cv;
  cv.reserve(xs.size());
  const int shift = 2 * (29 - order);
  for (std::size_t i = 0; i < xs.size(); ++i) {
    if (!std::isfinite(ra[i]) || !std::isfinite(dec[i])) continue;
    cv.emplace_back(survey::sky_sort_key(ra[i], dec[i]) >> shift, vals[i]);
  }
  std::sort(cv.begin(), cv.end());
  std::vector<std::int64_t> cells;
  std::vector<double> med;
  for (std::size_t b = 0; b < cv.size();) {
    std::size_t e = b;
    while (e < cv.size() && cv[e].first == cv[b].first) ++e;
    // Median (the lower middle value for an even count; values are sorted).
    // read_sky_image has already converted the values to Jy/beam (bunit_scale).
    med.push_back(static_cast<double>(cv[b + (e - b - 1) / 2].second));
    cells.push_back(cv[b].first);
    b = e;
  }
  Table t;
  t.name = "noise_cells";
  t.add_i64("cell", "", "pos.healpix", "HEALPix NESTED cell at healpix_order", cells);
  t.add_f64("rms", "Jy/beam", "stat.stdev;phot.flux.density", "median of the tile's rms map in the cell", med);
  // The order as a column (CSV keeps columns, not table metadata).
  t.add_i64("healpix_order", "", "meta.number", "HEALPix order of the cells",
            std::vector<std::int64_t>(cells.size(), order));
  write_table(t, (fs::path(dir) / kNoiseFile).string());
}

survey::TileNoise read_tile_noise(const SurveyConfig& cfg, const std::string& tile) {
  const std::string path = (fs::path(cfg.output_root) / "tiles" / tile / kNoiseFile).string();
  std::error_code ec;
  if (!fs::is_regular_file(path, ec)) return {};  // no valid data known anywhere
  const Table t = read_table(path);
  const Column* c = t.find("cell");
  const Column* v = t.find("rms");
  const Column* o = t.find("healpix_order");
  if (!c || !v || !o || c->type != ColumnType::Int64 || v->type != ColumnType::Float64 ||
      o->type != ColumnType::Int64)
    throw InputError(path, "not a noise-cell table (columns cell, rms, healpix_order)");
  if (t.rows() == 0) return {};
  const std::int64_t order = o->i64[0];
  for (std::size_t i = 0; i < t.rows(); ++i)
    if (o->i64[i] != order || order < 0 || order > 29)
      throw InputError(path, "row " + std::to_string(i + 1) + ": healpix_order not one value in 0..29");
  std::vector<std::pair<std::int64_t, double>> cells;
  for (std::size_t i = 0; i < t.rows(); ++i) cells.emplace_back(c->i64[i], v->f64[i]);
  try {
    return survey::make_tile_noise(static_cast<int>(order), std::move(cells));
  } catch (const std::invalid_argument& e) {
    throw InputError(path, e.what());
  }
}

}  // namespace skerry::surveyrun
