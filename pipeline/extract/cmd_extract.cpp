// `skerry extract IMAGE --out DIR`: one radio image to noise maps, islands,
// fitted components, sources, residual and model images and a run record.
//
// Stages (each timed in NAME.run.json):
//   read        the image (io/fits_image), optional primary beam and user maps
//   noise       background and rms maps: two passes, the second with the
//               first pass's islands (grown by noise.mask_margin_beams) masked
//   islands     hysteresis islands in SNR (detect.*)
//   fit         cut-outs of (image - background), multi-Gaussian fits (fit.*),
//               sky measurements with errors (errors.*, resolved.*)
//   catalogue   position flags, island statistics, source grouping (catalogue.*)
//   write       model, residual, tables; then the run record (the rms,
//               background and label maps are written by a background thread
//               from the end of `islands` on, overlapping the fit)
//
// Outputs are written into a hidden staging folder inside DIR and moved into
// place only after every one of them was written, so a failed run leaves the
// previous outputs (if any) untouched and no partial file behind. Every check of
// the inputs and options happens before the first output is written.
#include <unistd.h>

#include <oneapi/tbb/blocked_range.h>
#include <oneapi/tbb/parallel_for.h>

#include <Eigen/Eigenvalues>
#include <Eigen/LU>
#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <future>
#include <iostream>
#include <sstream>

#include "extract/catalogue_tables.h"
#include "app/command.h"
#include "app/errors.h"
#include "io/atomic_file.h"
#include "io/fits_image.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "app/options.h"
#include "app/progress.h"
#include "app/run_record.h"
#include "skerry/background.h"
#include "skerry/catalogue.h"
#include "skerry/constants.h"
#include "skerry/fitting.h"
#include "skerry/gaussian.h"
#include "skerry/islands.h"
#include "app/version.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;

// ---- Configuration ------------------------------------------------------------

po::options_description extract_options() {
  const BackgroundOptions bg{};
  const IslandOptions isl{};
  const FitOptions fit{};
  const SkyOptions sky{};
  const FlagOptions fl{};
  const GroupingOptions gr{};
  po::options_description d("extract options (options are SECTION.KEY; in a config file, KEY goes under [SECTION])");
  d.add_options()
      ("image", po::value<std::string>(), "input FITS image (Jy/beam)")
      ("out", po::value<std::string>()->default_value(""), "output folder (default: outputs/NAME)")
      // [image]
      ("image.hdu", po::value<std::string>()->default_value(""), "HDU: number (1 = primary) or EXTNAME; empty = first image HDU")
      ("image.plane", po::value<std::string>()->default_value(""), "0-based plane per non-degenerate extra axis, comma-separated (e.g. 2,0)")
      ("image.beam_arcsec", po::value<std::string>()->default_value(""), "restoring beam 'maj,min,pa' [arcsec, arcsec, deg east of north]; replaces BMAJ/BMIN/BPA")
      ("image.freq_mhz", po::value<double>()->default_value(0.0), "observing frequency [MHz]; 0 = from the header")
      ("image.accept_bunit", po::value<bool>()->default_value(false), "accept any BUNIT and treat the values as Jy/beam")
      ("image.primary_beam", po::value<std::string>()->default_value(""), "primary-beam image on the same grid (values in (0, 1]); enables corrected flux densities")
      ("image.pb_cut", po::value<double>()->default_value(0.2), "components where the primary beam is below this get the below_pb_cut flag")
      // [noise]
      ("noise.window_beams", po::value<double>()->default_value(bg.box_beams), "side of the window over which each background/rms statistic is taken [beams]")
      ("noise.window_pixels", po::value<int>()->default_value(0), "window side [pixels]; overrides noise.window_beams when > 0")
      ("noise.grid_spacing_beams", po::value<double>()->default_value(bg.step_beams), "spacing of the grid of window centres [beams]; 0 = the window side (windows tile the image)")
      ("noise.clip_sigma", po::value<double>()->default_value(bg.clip_sigma), "sigma-clipping level k (>= 1.5)")
      ("noise.second_pass", po::value<bool>()->default_value(true), "re-estimate the maps with the first pass's islands masked")
      ("noise.mask_margin_beams", po::value<double>()->default_value(1.0), "margin grown around islands for the second pass [beams]")
      ("noise.rms_map", po::value<std::string>()->default_value(""), "user rms map (FITS, same grid, Jy/beam) instead of an estimate")
      ("noise.background_map", po::value<std::string>()->default_value(""), "user background map (FITS, same grid, Jy/beam) instead of an estimate")
      ("noise.fixed_rms", po::value<double>()->default_value(0.0), "constant rms [Jy/beam] instead of an estimate; 0 = estimate")
      ("noise.fixed_background", po::value<std::string>()->default_value(""), "constant background [Jy/beam] instead of an estimate; empty = estimate")
      // [detect]
      ("detect.peak_snr", po::value<double>()->default_value(isl.peak_snr), "an island needs a pixel with (I - B)/rms at least this")
      ("detect.grow_snr", po::value<double>()->default_value(isl.grow_snr), "islands grow through 8-connected pixels with (I - B)/rms at least this")
      ("detect.false_discovery_rate", po::value<double>()->default_value(0.0), "if > 0: the peak threshold keeps the expected fraction of false islands at this rate (Benjamini & Hochberg 1995) instead of detect.peak_snr")
      ("detect.false_discovery_any_dependence", po::value<bool>()->default_value(false), "with detect.false_discovery_rate: use the Benjamini & Yekutieli (2001) constant for arbitrary dependence")
      ("detect.min_pixels", po::value<long>()->default_value(3), "smallest island kept [pixels]")
      // [fit]
      ("fit.max_components", po::value<int>()->default_value(fit.max_components), "largest number of Gaussian components per island")
      ("fit.prominence_snr", po::value<double>()->default_value(fit.prominence_snr), "a local maximum starts a component when its prominence exceeds this many local rms")
      ("fit.min_size_beam_fraction", po::value<double>()->default_value(fit.min_size_beam_fraction), "lower bound of both fitted Gaussian sigmas, as a fraction (0 < f <= 1) of the restoring beam's minor-axis sigma (not a number of beams)")
      ("fit.fixed_shape", po::value<bool>()->default_value(fit.fix_shape_to_beam), "fit amplitude and position only, shape fixed to the beam")
      ("fit.region_margin_beam_sigma", po::value<double>()->default_value(fit.fit_margin_beam_sigma), "fit region = the island's pixels plus every pixel outside all islands (finite, positive rms) within this many beam sigmas (Mahalanobis distance with the beam covariance) of an island pixel; 0 = island pixels only")
      ("fit.information_criterion", po::value<bool>()->default_value(fit.use_information_criterion), "compare k and k-1 components by the information criterion; false = keep all maxima")
      ("fit.max_iterations", po::value<int>()->default_value(fit.lm.max_iterations), "Levenberg-Marquardt step limit per fit")
      ("fit.condon_errors", po::value<bool>()->default_value(sky.use_condon_errors), "report Condon (1997) expected errors instead of the fit's corrected covariance")
      // [errors]
      ("errors.flux_scale_frac", po::value<double>()->default_value(sky.flux_scale_frac), "fractional flux-scale error added in quadrature to peak and integrated errors")
      ("errors.astrometry_arcsec", po::value<double>()->default_value(sky.astrometric_floor_arcsec), "astrometric error floor added in quadrature to RA and Dec errors [arcsec]")
      ("errors.unresolved_nsigma", po::value<double>()->default_value(sky.unresolved_nsigma), "an axis within this many of its errors of the beam is unresolved (upper limit)")
      // [resolved]
      ("resolved.envelope_a", po::value<double>()->default_value(sky.envelope_a), "resolved when S_int/S_peak > 1 + a SNR^-b: a")
      ("resolved.envelope_b", po::value<double>()->default_value(sky.envelope_b), "resolved when S_int/S_peak > 1 + a SNR^-b: b")
      // [catalogue]
      ("catalogue.group_gap_beams", po::value<double>()->default_value(gr.link_gap_beams), "components of different islands join one source when the gap between their extents is at most this [beams]; < 0 = islands only")
      ("catalogue.group_max_flux_ratio", po::value<double>()->default_value(gr.link_max_flux_ratio), "... and their integrated flux densities differ by at most this factor (0 = any)")
      ("catalogue.diffuse_residual_ratio", po::value<double>()->default_value(gr.diffuse_residual_ratio), "an island is diffuse when its residual rms exceeds this x the local rms")
      ("catalogue.diffuse_min_beams", po::value<double>()->default_value(gr.diffuse_min_beams), "islands smaller than this many beams are never diffuse")
      ("catalogue.edge_margin_beams", po::value<double>()->default_value(fl.edge_margin_beams), "near_edge flag distance [beams]")
      ("catalogue.blank_margin_beams", po::value<double>()->default_value(fl.blank_margin_beams), "near_blank flag distance [beams]")
      ("catalogue.bright_radius_beams", po::value<double>()->default_value(fl.bright_radius_beams), "near_bright flag search radius [beams]")
      ("catalogue.bright_ratio", po::value<double>()->default_value(fl.bright_ratio), "near_bright when a neighbour's peak is at least this x brighter")
      ("catalogue.designation_prefix", po::value<std::string>()->default_value("SKDC"), "prefix of the source designations (PREFIX JHHMMSS.s+DDMMSS)")
      // [output]
      ("output.name", po::value<std::string>()->default_value(""), "NAME of the output files; default: the image file's stem")
      ("output.formats", po::value<std::string>()->default_value("csv,fits,vot"), "table formats, comma-separated: csv, fits, vot")
      ("output.maps", po::value<bool>()->default_value(true), "write the images NAME.rms_map.fits, NAME.background_map.fits and NAME.island_map.fits (island labels)")
      ("output.model", po::value<bool>()->default_value(true), "write the image NAME.model_map.fits (sum of the fitted components)")
      ("output.residual", po::value<bool>()->default_value(true), "write the image NAME.residual_map.fits (image - model)")
      ("output.report", po::value<bool>()->default_value(false), "also write the run report NAME.report.html at the end (skerry report)");
  return d;
}

struct Config {
  std::string image, out_dir, name;
  ImageReadOptions read;
  std::string primary_beam;
  double pb_cut = 0.2;
  BackgroundOptions bg;
  bool second_pass = true;
  double mask_margin_beams = 1.0;
  std::string rms_map, background_map;
  double fixed_rms = 0.0;
  bool have_fixed_background = false;
  double fixed_background = 0.0;
  IslandOptions islands;
  FitOptions fit;
  SkyOptions sky;
  FlagOptions flags;
  GroupingOptions grouping;
  std::string designation_prefix;
  bool fmt_csv = false, fmt_fits = false, fmt_vot = false;
  bool write_maps = true, write_model = true, write_residual = true;
};

std::vector<std::string> split(const std::string& s, char sep) {
  std::vector<std::string> out;
  std::string cur;
  std::istringstream in(s);
  while (std::getline(in, cur, sep)) {
    const auto b = cur.find_first_not_of(" \t");
    const auto e = cur.find_last_not_of(" \t");
    out.push_back(b == std::string::npos ? "" : cur.substr(b, e - b + 1));
  }
  return out;
}

double parse_number(const std::string& option, const std::string& text) {
  try {
    std::size_t used = 0;
    const double v = std::stod(text, &used);
    if (used != text.size() || !std::isfinite(v)) throw std::invalid_argument("junk");
    return v;
  } catch (const std::exception&) {
    throw UsageError(option + " = '" + text + "' is not a number");
  }
}

std::string file_stem(const std::string& path) {
  std::string n = fs::path(path).filename().string();
  for (const char* ext : {".gz", ".fz", ".bz2"})
    if (n.size() > std::strlen(ext) && n.ends_with(ext)) n.resize(n.size() - std::strlen(ext));
  for (const char* ext : {".fits", ".fit", ".fts", ".FITS", ".FIT"})
    if (n.size() > std::strlen(ext) && n.ends_with(ext)) { n.resize(n.size() - std::strlen(ext)); break; }
  return n;
}

Config read_config(const ParsedOptions& p) {
  const auto& vm = p.vm;
  auto S = [&](const char* k) { return vm[k].as<std::string>(); };
  auto D = [&](const char* k) { return vm[k].as<double>(); };
  auto B = [&](const char* k) { return vm[k].as<bool>(); };
  auto I = [&](const char* k) { return vm[k].as<int>(); };
  auto txt = [](double v) { std::ostringstream o; o.precision(17); o << v; return o.str(); };
  Config c;
  if (!vm.count("image")) throw UsageError("no input image given (usage: skerry extract IMAGE --out DIR)");
  c.image = S("image");

  c.read.hdu = S("image.hdu");
  for (const auto& s : split(S("image.plane"), ',')) {
    if (s.empty()) continue;
    const double v = parse_number("image.plane", s);
    require(v >= 0 && v == std::floor(v), "image.plane", s, "a 0-based integer plane index");
    c.read.plane.push_back(static_cast<long>(v));
  }
  if (!S("image.beam_arcsec").empty()) {
    const auto parts = split(S("image.beam_arcsec"), ',');
    if (parts.size() != 3) throw UsageError("image.beam_arcsec = '" + S("image.beam_arcsec") + "' needs three values 'maj,min,pa'");
    Beam b{parse_number("image.beam_arcsec", parts[0]), parse_number("image.beam_arcsec", parts[1]),
           parse_number("image.beam_arcsec", parts[2])};
    require(b.valid(), "image.beam_arcsec", S("image.beam_arcsec"), "0 < min <= maj (arcsec)");
    b.pa_deg = wrap_pa_180(b.pa_deg);
    c.read.beam_override = b;
  }
  require(D("image.freq_mhz") >= 0.0, "image.freq_mhz", txt(D("image.freq_mhz")), "image.freq_mhz >= 0");
  if (D("image.freq_mhz") > 0.0) c.read.freq_hz_override = D("image.freq_mhz") * 1e6;
  c.read.accept_any_bunit = B("image.accept_bunit");
  c.read.require_beam = true;
  c.primary_beam = S("image.primary_beam");
  c.pb_cut = D("image.pb_cut");
  require(c.pb_cut >= 0.0 && c.pb_cut <= 1.0, "image.pb_cut", txt(c.pb_cut), "0 <= image.pb_cut <= 1");

  c.bg.box_beams = D("noise.window_beams");
  c.bg.box_pixels = I("noise.window_pixels");
  c.bg.step_beams = D("noise.grid_spacing_beams");
  c.bg.clip_sigma = D("noise.clip_sigma");
  require(c.bg.box_beams > 0.0, "noise.window_beams", txt(c.bg.box_beams), "noise.window_beams > 0");
  require(c.bg.box_pixels >= 0, "noise.window_pixels", std::to_string(c.bg.box_pixels), "noise.window_pixels >= 0");
  require(c.bg.step_beams >= 0.0, "noise.grid_spacing_beams", txt(c.bg.step_beams), "noise.grid_spacing_beams >= 0");
  require(c.bg.clip_sigma >= 1.5, "noise.clip_sigma", txt(c.bg.clip_sigma), "noise.clip_sigma >= 1.5");
  c.second_pass = B("noise.second_pass");
  c.mask_margin_beams = D("noise.mask_margin_beams");
  require(c.mask_margin_beams >= 0.0, "noise.mask_margin_beams", txt(c.mask_margin_beams), "noise.mask_margin_beams >= 0");
  c.rms_map = S("noise.rms_map");
  c.background_map = S("noise.background_map");
  c.fixed_rms = D("noise.fixed_rms");
  require(c.fixed_rms >= 0.0, "noise.fixed_rms", txt(c.fixed_rms), "noise.fixed_rms >= 0 (0 = estimate)");
  if (c.fixed_rms > 0.0 && !c.rms_map.empty())
    throw UsageError("noise.fixed_rms and noise.rms_map are both given; choose one");
  if (!S("noise.fixed_background").empty()) {
    c.have_fixed_background = true;
    c.fixed_background = parse_number("noise.fixed_background", S("noise.fixed_background"));
    if (!c.background_map.empty())
      throw UsageError("noise.fixed_background and noise.background_map are both given; choose one");
  }

  c.islands.peak_snr = D("detect.peak_snr");
  c.islands.grow_snr = D("detect.grow_snr");
  const double alpha = D("detect.false_discovery_rate");
  require(alpha >= 0.0 && alpha < 1.0, "detect.false_discovery_rate", txt(alpha), "0 <= detect.false_discovery_rate < 1 (0 = fixed threshold)");
  if (alpha > 0.0) {
    c.islands.peak_threshold = PeakThreshold::fdr;
    c.islands.fdr_alpha = alpha;
  }
  c.islands.fdr_arbitrary_dependence = B("detect.false_discovery_any_dependence");
  c.islands.min_pixels = vm["detect.min_pixels"].as<long>();
  if (const std::string e = c.islands.validate(); !e.empty()) throw UsageError("detect: " + e);

  c.fit.max_components = I("fit.max_components");
  require(c.fit.max_components >= 1 && c.fit.max_components <= 50, "fit.max_components",
          std::to_string(c.fit.max_components), "1 <= fit.max_components <= 50");
  c.fit.prominence_snr = D("fit.prominence_snr");
  require(c.fit.prominence_snr >= 0.0, "fit.prominence_snr", txt(c.fit.prominence_snr), "fit.prominence_snr >= 0");
  c.fit.min_size_beam_fraction = D("fit.min_size_beam_fraction");
  require(c.fit.min_size_beam_fraction > 0.0 && c.fit.min_size_beam_fraction <= 1.0, "fit.min_size_beam_fraction",
          txt(c.fit.min_size_beam_fraction), "0 < fit.min_size_beam_fraction <= 1");
  c.fit.fix_shape_to_beam = B("fit.fixed_shape");
  c.fit.fit_margin_beam_sigma = D("fit.region_margin_beam_sigma");
  require(c.fit.fit_margin_beam_sigma >= 0.0 && c.fit.fit_margin_beam_sigma <= 10.0, "fit.region_margin_beam_sigma",
          txt(c.fit.fit_margin_beam_sigma), "0 <= fit.region_margin_beam_sigma <= 10");
  c.fit.use_information_criterion = B("fit.information_criterion");
  c.fit.lm.max_iterations = I("fit.max_iterations");
  require(c.fit.lm.max_iterations >= 1, "fit.max_iterations", std::to_string(c.fit.lm.max_iterations), "fit.max_iterations >= 1");
  c.sky.use_condon_errors = B("fit.condon_errors");

  c.sky.flux_scale_frac = D("errors.flux_scale_frac");
  require(c.sky.flux_scale_frac >= 0.0 && c.sky.flux_scale_frac < 1.0, "errors.flux_scale_frac",
          txt(c.sky.flux_scale_frac), "0 <= errors.flux_scale_frac < 1");
  c.sky.astrometric_floor_arcsec = D("errors.astrometry_arcsec");
  require(c.sky.astrometric_floor_arcsec >= 0.0, "errors.astrometry_arcsec", txt(c.sky.astrometric_floor_arcsec),
          "errors.astrometry_arcsec >= 0");
  c.sky.unresolved_nsigma = D("errors.unresolved_nsigma");
  require(c.sky.unresolved_nsigma >= 0.0, "errors.unresolved_nsigma", txt(c.sky.unresolved_nsigma), "errors.unresolved_nsigma >= 0");
  c.sky.envelope_a = D("resolved.envelope_a");
  c.sky.envelope_b = D("resolved.envelope_b");
  require(c.sky.envelope_a >= 0.0, "resolved.envelope_a", txt(c.sky.envelope_a), "resolved.envelope_a >= 0");
  require(c.sky.envelope_b >= 0.0, "resolved.envelope_b", txt(c.sky.envelope_b), "resolved.envelope_b >= 0");

  c.grouping.link_gap_beams = D("catalogue.group_gap_beams");
  c.grouping.link_max_flux_ratio = D("catalogue.group_max_flux_ratio");
  require(c.grouping.link_max_flux_ratio == 0.0 || c.grouping.link_max_flux_ratio >= 1.0, "catalogue.group_max_flux_ratio",
          txt(c.grouping.link_max_flux_ratio), "0 (any) or >= 1");
  c.grouping.diffuse_residual_ratio = D("catalogue.diffuse_residual_ratio");
  require(c.grouping.diffuse_residual_ratio > 0.0, "catalogue.diffuse_residual_ratio",
          txt(c.grouping.diffuse_residual_ratio), "catalogue.diffuse_residual_ratio > 0");
  c.grouping.diffuse_min_beams = D("catalogue.diffuse_min_beams");
  require(c.grouping.diffuse_min_beams >= 0.0, "catalogue.diffuse_min_beams", txt(c.grouping.diffuse_min_beams), ">= 0");
  c.flags.edge_margin_beams = D("catalogue.edge_margin_beams");
  c.flags.blank_margin_beams = D("catalogue.blank_margin_beams");
  c.flags.bright_radius_beams = D("catalogue.bright_radius_beams");
  c.flags.bright_ratio = D("catalogue.bright_ratio");
  require(c.flags.edge_margin_beams >= 0.0, "catalogue.edge_margin_beams", txt(c.flags.edge_margin_beams), ">= 0");
  require(c.flags.blank_margin_beams >= 0.0 && c.flags.blank_margin_beams <= 100.0, "catalogue.blank_margin_beams",
          txt(c.flags.blank_margin_beams), "0 <= value <= 100");
  require(c.flags.bright_radius_beams >= 0.0, "catalogue.bright_radius_beams", txt(c.flags.bright_radius_beams), ">= 0");
  require(c.flags.bright_ratio >= 1.0, "catalogue.bright_ratio", txt(c.flags.bright_ratio), "catalogue.bright_ratio >= 1");
  c.designation_prefix = S("catalogue.designation_prefix");

  for (const auto& f : split(S("output.formats"), ',')) {
    if (f == "csv") c.fmt_csv = true;
    else if (f == "fits") c.fmt_fits = true;
    else if (f == "vot") c.fmt_vot = true;
    else if (!f.empty()) throw UsageError("output.formats: unknown format '" + f + "' (csv, fits, vot)");
  }
  c.write_maps = B("output.maps");
  c.write_model = B("output.model");
  c.write_residual = B("output.residual");
  c.name = S("output.name");
  if (c.name.empty()) c.name = file_stem(c.image);
  if (c.name.empty() || c.name.find('/') != std::string::npos || c.name.front() == '.')
    throw UsageError("output.name = '" + c.name + "' must be a plain file name not starting with '.'");
  c.out_dir = S("out");
  if (c.out_dir.empty()) c.out_dir = (fs::path("outputs") / c.name).string();
  return c;
}

// ---- Staged outputs -------------------------------------------------------------

/// A hidden folder inside the output folder that receives every output; commit()
/// moves them into place (one rename each), the destructor removes what is left.
class Staging {
 public:
  explicit Staging(const std::string& out_dir, const std::string& name) : final_(out_dir) {
    std::error_code ec;
    fs::create_directories(final_, ec);
    if (ec) throw OutputError(out_dir, "cannot create the output folder: " + ec.message());
    dir_ = final_ / ("." + name + ".extract-" + std::to_string(::getpid()) + ".partial");
    fs::remove_all(dir_, ec);
    fs::create_directories(dir_, ec);
    if (ec) throw OutputError(dir_.string(), "cannot create a staging folder: " + ec.message());
  }
  ~Staging() {
    std::error_code ec;
    fs::remove_all(dir_, ec);
  }
  Staging(const Staging&) = delete;
  Staging& operator=(const Staging&) = delete;
  /// Path in the staging folder for the output file `file_name`.
  std::string path(const std::string& file_name) {
    files_.push_back(file_name);
    return (dir_ / file_name).string();
  }
  std::string final_path(const std::string& file_name) const { return (final_ / file_name).string(); }
  const std::vector<std::string>& files() const { return files_; }
  void commit() {
    for (const auto& f : files_) {
      std::error_code ec;
      fs::rename(dir_ / f, final_ / f, ec);
      if (ec) throw OutputError((final_ / f).string(), "cannot move into place: " + ec.message());
    }
  }

 private:
  fs::path final_, dir_;
  std::vector<std::string> files_;
};

// ---- Helpers ------------------------------------------------------------------------

struct Geometry {
  LocalGeometry local;
  Eigen::Matrix2d beam_cov_pix;   ///< beam covariance [pix^2]
  double beam_area_pix = 0.0;     ///< 2 pi sqrt(det C) = pi bmaj bmin / (4 ln 2 |dx dy|) (REF-GAUSS-03)
  double beam_fwhm_pix = 0.0;     ///< geometric-mean FWHM sqrt(bmaj bmin) [pix]
  double beam_maj_pix = 0.0;      ///< major FWHM [pix]
};

std::optional<Geometry> geometry_at(const SkyImage& img, const Beam& beam, double x, double y) {
  auto lg = local_geometry(*img.wcs, x, y);
  if (!lg) return std::nullopt;
  Geometry g;
  g.local = *lg;
  g.beam_cov_pix = lg->sky_cov_to_pixel(ellipse_to_cov(to_ellipse(beam)));
  const double det = g.beam_cov_pix.determinant();
  if (!(det > 0.0) || !std::isfinite(det)) return std::nullopt;
  g.beam_area_pix = 2.0 * kPi * std::sqrt(det);
  // FWHM^2 = 8 ln 2 * eigenvalue (gaussian.h): geometric mean from the determinant.
  g.beam_fwhm_pix = std::sqrt(8.0 * kLn2 * std::sqrt(det));
  Eigen::SelfAdjointEigenSolver<Eigen::Matrix2d> es(g.beam_cov_pix);
  g.beam_maj_pix = std::sqrt(8.0 * kLn2 * es.eigenvalues()(1));
  return g;
}


/// BPA in a header is measured from the north of the image's own frame (FITS
/// beam keywords, REF-FITS-03; common practice). Catalogue angles are east of
/// ICRS north, so for a Galactic image the beam is turned, at each position, by
/// the ICRS position angle of Galactic north there. That direction is found in
/// the pixel frame by reading the same header with the longitude/latitude axes
/// taken as a plain (RA, Dec) frame (the native +latitude direction); its ICRS
/// PA comes from the real WCS. Other frames: the beam as read.
class SkyBeam {
 public:
  SkyBeam(const SkyImage& sky, bool header_beam) : sky_(sky), beam_(sky.beam) {
    if (!header_beam || sky.frame != "GALACTIC") return;
    std::string h = sky.wcs_header;
    for (auto [from, to] : {std::pair<const char*, const char*>{"'GLON-", "'RA---"}, {"'GLAT-", "'DEC--"}}) {
      for (std::size_t pos = h.find(from); pos != std::string::npos; pos = h.find(from, pos + 1))
        h.replace(pos, std::strlen(from), to);
    }
    try {
      native_ = wcs_from_header(h);
    } catch (const std::exception& e) {
      throw InputError(sky.path, std::string("cannot turn the Galactic beam PA into ICRS: ") + e.what());
    }
  }
  /// The beam with its PA east of ICRS north at 0-based pixel (x, y).
  std::optional<Beam> at(double x, double y) const {
    if (!native_) return beam_;
    const auto ln = local_geometry(*native_, x, y);
    const auto li = local_geometry(*sky_.wcs, x, y);
    if (!ln || !li) return std::nullopt;
    const Eigen::Vector2d north_pix = ln->jac_arcsec_per_pix.inverse() * Eigen::Vector2d(0.0, 1.0);
    Beam b = beam_;
    b.pa_deg = wrap_pa_180(b.pa_deg + li->pa_of_pixel_direction_deg(north_pix(0), north_pix(1)));
    return b;
  }

 private:
  const SkyImage& sky_;
  Beam beam_;
  std::shared_ptr<const PixelSky> native_;
};

ImageF read_map(const std::string& path, const SkyImage& like, const char* what) {
  ImageReadOptions o;
  o.accept_any_bunit = true;
  o.require_beam = false;
  o.allow_all_blank = true;
  SkyImage m = read_sky_image(path, o);
  if (m.pixels.rows() != like.pixels.rows() || m.pixels.cols() != like.pixels.cols())
    throw InputError(path, std::string(what) + " is " + std::to_string(m.pixels.cols()) + " x " +
                               std::to_string(m.pixels.rows()) + " pixels but the image is " +
                               std::to_string(like.pixels.cols()) + " x " + std::to_string(like.pixels.rows()));
  return std::move(m.pixels);
}

std::string fits_string(const std::string& s) {
  std::string out = "'";
  for (char ch : s) {
    out += ch;
    if (ch == '\'') out += '\'';
  }
  return out + "'";
}

/// Model image: every component rendered out to `extent_sigma` major sigmas,
/// added pixel by pixel in component order. Rows are split into fixed strips;
/// each strip adds, in component order, the components that reach it, so the
/// sums (and the bytes) do not depend on the thread count.
ImageF render_model(long nx, long ny, const std::vector<PixelComponent>& comps, double extent_sigma) {
  ImageF model = ImageF::Zero(ny, nx);
  constexpr long kStrip = 64;
  const long n_strips = (ny + kStrip - 1) / kStrip;
  struct Box { long x0, x1, y0, y1; };
  std::vector<Box> boxes(comps.size());
  std::vector<std::vector<std::size_t>> by_strip(static_cast<std::size_t>(std::max(0L, n_strips)));
  for (std::size_t i = 0; i < comps.size(); ++i) {
    const auto& c = comps[i];
    const double r = extent_sigma * c.sigma_major_pix;
    if (!std::isfinite(c.x) || !std::isfinite(c.y) || !std::isfinite(r) || !std::isfinite(c.amplitude)) {
      boxes[i] = {0, -1, 0, -1};
      continue;
    }
    Box b{std::max(0L, static_cast<long>(std::floor(c.x - r))), std::min(nx - 1, static_cast<long>(std::ceil(c.x + r))),
          std::max(0L, static_cast<long>(std::floor(c.y - r))), std::min(ny - 1, static_cast<long>(std::ceil(c.y + r)))};
    boxes[i] = b;
    if (b.x1 < b.x0 || b.y1 < b.y0) continue;
    for (long s = b.y0 / kStrip; s <= b.y1 / kStrip; ++s) by_strip[static_cast<std::size_t>(s)].push_back(i);
  }
  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<long>(0, n_strips, 1), [&](const auto& range) {
    for (long s = range.begin(); s != range.end(); ++s) {
      const long ys = s * kStrip, ye = std::min(ny, ys + kStrip) - 1;
      for (std::size_t i : by_strip[static_cast<std::size_t>(s)]) {
        const Box& b = boxes[i];
        for (long y = std::max(ys, b.y0); y <= std::min(ye, b.y1); ++y)
          for (long x = b.x0; x <= b.x1; ++x)
            model(y, x) += static_cast<float>(component_value(comps[i], static_cast<double>(x), static_cast<double>(y)));
      }
    }
  });
  return model;
}

std::uint32_t flags_from_fit(const PixelComponent& c) {
  std::uint32_t f = 0;
  if (c.status == ComponentStatus::kMoments || c.status == ComponentStatus::kBadInput ||
      c.status == ComponentStatus::kNotConverged)
    f |= kFlagFitFailed;
  if (c.fit_flags & (kFitMomentsFallback | kFitNotConverged)) f |= kFlagFitFailed;
  if (c.fit_flags & (kFitAtSizeBound | kFitAtPositionBound)) f |= kFlagAtBound;
  return f;
}

std::uint32_t info_bits_from_fit(const PixelComponent& c) {
  std::uint32_t b = 0;
  if (c.fit_flags & kFitShapeFixed) b |= kInfoFixedShape;
  if (c.fit_flags & kFitReducedComponents) b |= kInfoFewerComponents;
  return b;
}

double nan_if(bool cond, double v) { return cond ? std::numeric_limits<double>::quiet_NaN() : v; }

// ---- The command ----------------------------------------------------------------------

int run_extract(const std::vector<std::string>& args) {
  const po::options_description desc = extract_options();
  ParsedOptions parsed = parse_options("extract", "IMAGE [--out DIR] [options]", desc, {{"image", 1}}, args);
  if (parsed.help) return kExitOk;
  const Config cfg = read_config(parsed);
  ThreadLimit threads(parsed.vm["threads"].as<int>());
  const auto t_start = std::chrono::steady_clock::now();

  RunRecord record("extract");
  {
    auto resolved = parsed.resolved;
    record.set_configuration(resolved, parsed.config_file);
  }
  record.set_threads(threads.threads());

  // ---- read ------------------------------------------------------------------
  // The image's SHA-256 (run record, table meta) is computed in a background
  // thread while the image is measured. It starts only once the reader has
  // accepted the file: a refused file (e.g. a header claiming terabytes) must
  // fail at once, not after the future's destructor waited for a full hash.
  StageTimer t_read(record, "read");
  SkyImage sky = read_sky_image(cfg.image, cfg.read);
  std::future<std::string> image_sha = std::async(std::launch::async, [&] {
    std::error_code ec;
    return fs::is_regular_file(cfg.image, ec) ? sha256_file(cfg.image) : std::string();
  });
  if (!sky.beam.valid())
    throw InputError(cfg.image, "restoring beam is degenerate (BMAJ/BMIN must be positive, BMIN <= BMAJ)");
  const SkyBeam sky_beam(sky, !cfg.read.beam_override.has_value());
  const long nx = sky.pixels.cols(), ny = sky.pixels.rows();
  if (const auto b = sky_beam.at(0.5 * (nx - 1), 0.5 * (ny - 1))) sky.beam = *b;  // the image's beam at its centre
  {
    bool any = false;
    for (long i = 0; i < sky.pixels.size() && !any; ++i) any = std::isfinite(sky.pixels.data()[i]);
    if (!any) throw NoDataError(cfg.image, "every pixel is blank (NaN or BLANK)");
  }
  const auto centre_geom = geometry_at(sky, sky.beam, 0.5 * (nx - 1), 0.5 * (ny - 1));
  if (!centre_geom)
    throw InputError(cfg.image, "the image centre has no sky position or the beam has no extent in pixels");
  if (centre_geom->beam_fwhm_pix < 1.0)
    throw InputError(cfg.image, "restoring beam spans " + std::to_string(centre_geom->beam_fwhm_pix) +
                                    " pixels (FWHM): the image is undersampled (need >= 1 pixel per beam)");
  ImageF pb;
  if (!cfg.primary_beam.empty()) {
    pb = read_primary_beam(cfg.primary_beam, sky);
    record.add_input("primary_beam", cfg.primary_beam);
  }
  ImageF user_rms, user_bg;
  if (!cfg.rms_map.empty()) {
    user_rms = read_map(cfg.rms_map, sky, "the rms map");
    if (const std::string e = check_rms_map(sky.pixels, user_rms); !e.empty()) throw InputError(cfg.rms_map, e);
    record.add_input("rms_map", cfg.rms_map);
  }
  if (!cfg.background_map.empty()) {
    user_bg = read_map(cfg.background_map, sky, "the background map");
    if (const std::string e = check_background_map(sky.pixels, user_bg); !e.empty())
      throw InputError(cfg.background_map, e);
    record.add_input("background_map", cfg.background_map);
  }
  t_read.stop();

  // ---- noise maps and islands -------------------------------------------------------
  BackgroundOptions bgo = cfg.bg;
  bgo.beam_fwhm_pix = centre_geom->beam_fwhm_pix;
  bgo.beam_area_pix = centre_geom->beam_area_pix;
  if (const std::string e = bgo.validate(); !e.empty()) throw UsageError("noise: " + e);
  const bool estimate_bg = cfg.background_map.empty() && !cfg.have_fixed_background;
  const bool estimate_rms = cfg.rms_map.empty() && !(cfg.fixed_rms > 0.0);

  auto estimate = [&](const MaskU8* mask) {
    BackgroundResult r = estimate_background(sky.pixels, bgo, mask);
    if (r.status == BackgroundStatus::no_data)
      throw NoDataError(cfg.image, "no box of the noise grid has enough unblanked pixels: " + r.message);
    if (r.status == BackgroundStatus::zero_rms && estimate_rms)
      throw NoDataError(cfg.image, "the noise rms is zero everywhere (a constant or noiseless image?); "
                                   "give noise.fixed_rms or noise.rms_map");
    return r;
  };
  // Combine estimated, user and fixed parts into one NoiseMaps.
  auto combine = [&](const NoiseMaps* est) -> NoiseMaps {
    if (!estimate_bg && !estimate_rms && user_bg.size() == 0 && user_rms.size() == 0)
      return NoiseMaps::constant(static_cast<int>(nx), static_cast<int>(ny), static_cast<float>(cfg.fixed_background),
                                 static_cast<float>(cfg.fixed_rms));
    if (estimate_bg && estimate_rms) return *est;
    ImageF b = user_bg.size() ? user_bg
               : cfg.have_fixed_background ? ImageF::Constant(ny, nx, static_cast<float>(cfg.fixed_background))
                                           : est->background_image();
    ImageF s = user_rms.size() ? user_rms
               : cfg.fixed_rms > 0.0 ? ImageF::Constant(ny, nx, static_cast<float>(cfg.fixed_rms))
                                     : est->rms_image();
    return NoiseMaps::from_images(std::move(b), std::move(s));
  };

  StageTimer t_noise(record, "noise_pass1");
  NoiseMaps maps;
  int noise_passes = 0;
  if (estimate_bg || estimate_rms) {
    BackgroundResult r1 = estimate(nullptr);
    noise_passes = 1;
    maps = combine(&r1.maps);
  } else {
    maps = combine(nullptr);
  }
  t_noise.stop();
  IslandResult isl;
  if ((estimate_bg || estimate_rms) && cfg.second_pass) {
    StageTimer t_i1(record, "islands_pass1");
    IslandResult first = find_islands(sky.pixels, maps, cfg.islands);
    t_i1.stop();
    StageTimer t_n2(record, "noise_pass2");
    const int margin = static_cast<int>(std::ceil(cfg.mask_margin_beams * centre_geom->beam_fwhm_pix));
    MaskU8 mask = grow_mask(first.labels, margin);
    first = IslandResult{};
    BackgroundResult r2 = estimate(&mask);
    mask = MaskU8();
    noise_passes = 2;
    maps = combine(&r2.maps);
    t_n2.stop();
  }
  StageTimer t_isl(record, "islands");
  isl = find_islands(sky.pixels, maps, cfg.islands);
  t_isl.stop();
  const std::size_t n_isl = isl.islands.size();

  // ---- maps that are final already -----------------------------------------------------
  // The rms, background and island-label maps do not change from here on: they are
  // written (each durably, see AtomicOutput) on a background thread while the
  // islands are fitted, so that the disk-bound writing overlaps the CPU-bound fit.
  // Below, `maps` and `isl.labels` are only read until map_writes.get() has joined
  // the writer. A future from std::async waits in its destructor, and map_writes is
  // declared after `stage`, so a throw below joins the writer before the staging
  // folder is removed.
  Staging stage(cfg.out_dir, cfg.name);
  const std::string& N = cfg.name;
  const std::vector<std::pair<std::string, std::string>> cards = {
      {"ORIGIN", fits_string(std::string("skerry ") + SKERRY_VERSION + " (" + SKERRY_GIT_REVISION + ")")}};
  std::future<void> map_writes;
  if (cfg.write_maps) {
    const std::string rms_path = stage.path(N + ".rms_map.fits"), bg_path = stage.path(N + ".background_map.fits"),
                      labels_path = stage.path(N + ".island_map.fits");
    map_writes = std::async(std::launch::async, [&maps, &isl, &sky, &cards, rms_path, bg_path, labels_path] {
      write_fits_image(rms_path, maps.rms_image(), sky, "JY/BEAM", cards);
      write_fits_image(bg_path, maps.background_image(), sky, "JY/BEAM", cards);
      write_fits_labels(labels_path, isl.labels, sky, cards);
    });
  }

  // ---- cut-outs and fits -------------------------------------------------------------
  StageTimer t_cut(record, "cutouts");
  std::vector<IslandCutout> cutouts(n_isl);
  std::vector<Geometry> island_geom(n_isl);
  std::vector<Beam> island_beam(n_isl, sky.beam);
  std::vector<double> island_flux_err(n_isl, NAN), island_mean_rms(n_isl, NAN);
  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<std::size_t>(0, n_isl, 8), [&](const auto& range) {
    for (std::size_t k = range.begin(); k != range.end(); ++k) {
      const Island& is = isl.islands[k];
      if (const auto b = sky_beam.at(is.peak_x, is.peak_y)) island_beam[k] = *b;
      auto g = geometry_at(sky, island_beam[k], is.peak_x, is.peak_y);
      island_geom[k] = g ? *g : *centre_geom;
      const Geometry& gg = island_geom[k];
      // Margin: free pixels within fit.region_margin_beam_sigma beam sigmas, plus one.
      Eigen::SelfAdjointEigenSolver<Eigen::Matrix2d> es(gg.beam_cov_pix);
      const long m = 1 + static_cast<long>(std::ceil(cfg.fit.fit_margin_beam_sigma * std::sqrt(es.eigenvalues()(1))));
      const long x0 = std::max(0L, static_cast<long>(is.x_min) - m), x1 = std::min(nx - 1, static_cast<long>(is.x_max) + m);
      const long y0 = std::max(0L, static_cast<long>(is.y_min) - m), y1 = std::min(ny - 1, static_cast<long>(is.y_max) + m);
      IslandCutout& c = cutouts[k];
      c.island_id = is.label;
      c.x_origin = static_cast<int>(x0);
      c.y_origin = static_cast<int>(y0);
      c.beam_cov_pix = gg.beam_cov_pix;
      const long w = x1 - x0 + 1, h = y1 - y0 + 1;
      c.data.resize(h, w);
      c.rms.resize(h, w);
      c.mask.resize(h, w);
      MaskU8 in_island = MaskU8::Zero(h, w);
      double rms_sum = 0.0;
      long rms_n = 0;
      for (long y = y0; y <= y1; ++y) {
        for (long x = x0; x <= x1; ++x) {
          const float v = sky.pixels(y, x);
          const float b = maps.background_at(static_cast<int>(x), static_cast<int>(y));
          const float s = maps.rms_at(static_cast<int>(x), static_cast<int>(y));
          const long r = y - y0, q = x - x0;
          c.data(r, q) = v - b;
          c.rms(r, q) = s;
          const bool usable = std::isfinite(v) && std::isfinite(b) && std::isfinite(s) && s > 0.0f;
          const std::int32_t lab = isl.labels(y, x);
          if (lab == is.label) {
            c.mask(r, q) = usable ? kCutoutIsland : kCutoutExcluded;
            if (usable) {
              in_island(r, q) = 1;
              rms_sum += s;
              ++rms_n;
            }
          } else {
            c.mask(r, q) = (usable && lab == 0) ? kCutoutFree : kCutoutExcluded;
          }
        }
      }
      island_mean_rms[k] = rms_n ? rms_sum / rms_n : NAN;
      island_flux_err[k] = pixel_sum_flux_error(c.rms, in_island, gg.beam_cov_pix, gg.beam_area_pix);
    }
  });
  t_cut.stop();

  StageTimer t_fit(record, "fit");
  std::vector<IslandFit> fits;
  fits.reserve(n_isl);
  {
    Progress progress("fitting islands", n_isl);
    constexpr std::size_t kChunk = 2048;
    for (std::size_t s = 0; s < n_isl; s += kChunk) {
      const std::size_t e = std::min(n_isl, s + kChunk);
      std::vector<IslandCutout> chunk(std::make_move_iterator(cutouts.begin() + static_cast<long>(s)),
                                      std::make_move_iterator(cutouts.begin() + static_cast<long>(e)));
      std::vector<IslandFit> part = fit_islands(chunk, cfg.fit);
      for (auto& f : part) fits.push_back(std::move(f));
      progress.advance(e - s);
    }
    progress.finish();
  }
  cutouts = {};
  // fit_islands sorts by id within a chunk; chunks are in id order already.
  if (fits.size() != n_isl) throw std::logic_error("fit_islands returned a different number of islands");
  for (std::size_t k = 0; k < n_isl; ++k)
    if (fits[k].island_id != isl.islands[k].label) throw std::logic_error("fit results out of island order");

  // Sky measurements per component (parallel over islands, results in island order).
  std::vector<std::vector<ComponentRecord>> per_island(n_isl);
  std::vector<std::vector<CatalogueComponent>> per_island_cat(n_isl);
  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<std::size_t>(0, n_isl, 8), [&](const auto& range) {
    for (std::size_t k = range.begin(); k != range.end(); ++k) {
      const IslandFit& f = fits[k];
      const Island& is = isl.islands[k];
      for (std::size_t j = 0; j < f.components.size(); ++j) {
        const PixelComponent& pc = f.components[j];
        ComponentRecord r;
        r.island_id = is.label;
        r.component = static_cast<std::int64_t>(j + 1);
        r.x_pix = pc.x;
        r.y_pix = pc.y;
        std::uint32_t flags = flags_from_fit(pc);
        std::uint32_t info = info_bits_from_fit(pc);
        if (f.n_maxima > cfg.fit.max_components) flags |= kFlagComponentCap;
        const long px = std::clamp(std::lround(pc.x), 0L, nx - 1), py = std::clamp(std::lround(pc.y), 0L, ny - 1);
        const bool pos_ok = std::isfinite(pc.x) && std::isfinite(pc.y);
        double pbv = NAN;
        if (pb.size() && pos_ok) {
          pbv = pb(py, px);
          if (!(pbv > 0.0) || !std::isfinite(pbv)) {
            flags |= kFlagNoPrimaryBeam;
            pbv = NAN;
          } else if (pbv < cfg.pb_cut) {
            flags |= kFlagBelowPbCut;
          }
        }
        const SkyComponent sc = measure_on_sky(pc, *sky.wcs, island_beam[k], cfg.sky, std::isfinite(pbv) ? pbv : 1.0);
        r.ra_deg = nan_if(!sc.valid, sc.ra_deg);
        r.dec_deg = nan_if(!sc.valid, sc.dec_deg);
        r.ra_err_arcsec = sc.ra_err_arcsec;
        r.dec_err_arcsec = sc.dec_err_arcsec;
        r.s_peak_jy_per_beam = sc.peak_jy_per_beam;
        r.s_peak_err_jy_per_beam = sc.peak_err_jy_per_beam;
        r.s_int_jy = sc.s_int_jy;
        r.s_int_err_jy = sc.s_int_err_jy;
        r.maj_arcsec = sc.maj_arcsec;
        r.maj_err_arcsec = sc.maj_err_arcsec;
        r.min_arcsec = sc.min_arcsec;
        r.min_err_arcsec = sc.min_err_arcsec;
        r.pa_deg = sc.pa_deg;
        r.pa_err_deg = sc.pa_err_deg;
        r.intrinsic_maj_arcsec = sc.deconv_maj_arcsec;
        r.intrinsic_maj_err_arcsec = nan_if(sc.deconv_maj_upper_limit, sc.deconv_maj_err_arcsec);
        r.intrinsic_min_arcsec = sc.deconv_min_arcsec;
        r.intrinsic_min_err_arcsec = nan_if(sc.deconv_min_upper_limit, sc.deconv_min_err_arcsec);
        r.intrinsic_pa_deg = sc.deconv_pa_deg;
        r.intrinsic_pa_err_deg = nan_if(sc.deconv_maj_upper_limit, sc.deconv_pa_err_deg);
        if (sc.deconv_maj_upper_limit) info |= kInfoUnresolved;
        r.background_jy_per_beam = pos_ok ? maps.background_at(static_cast<int>(px), static_cast<int>(py)) : NAN;
        r.rms_jy_per_beam = sc.local_rms_jy_per_beam;
        if (!(r.rms_jy_per_beam > 0.0) || !std::isfinite(r.rms_jy_per_beam)) {
          flags |= kFlagBadRms;
          r.snr = NAN;
        } else {
          r.snr = sc.snr;
        }
        r.chi2_red = f.reduced_chi2;
        r.resolved = sc.resolved;
        r.pb = pbv;
        const bool pbc = std::isfinite(pbv);
        r.s_peak_pbcor_jy_per_beam = pbc ? sc.peak_pbcor_jy_per_beam : NAN;
        r.s_int_pbcor_jy = pbc ? sc.s_int_pbcor_jy : NAN;
        r.s_int_pbcor_err_jy = pbc ? sc.s_int_pbcor_err_jy : NAN;
        r.flags = flags;
        r.info_bits = info;
        per_island[k].push_back(r);

        CatalogueComponent cc;
        cc.island_id = r.island_id;
        cc.x_pix = r.x_pix;
        cc.y_pix = r.y_pix;
        cc.ra_deg = r.ra_deg;
        cc.dec_deg = r.dec_deg;
        cc.ra_err_arcsec = r.ra_err_arcsec;
        cc.dec_err_arcsec = r.dec_err_arcsec;
        cc.s_peak_jy_per_beam = r.s_peak_jy_per_beam;
        cc.s_int_jy = r.s_int_jy;
        cc.s_int_err_jy = r.s_int_err_jy;
        cc.fitted_arcsec = {r.maj_arcsec, r.min_arcsec, r.pa_deg};
        cc.deconv_arcsec = sc.deconv_maj_upper_limit ? Ellipse{0.0, 0.0, 0.0}
                           : Ellipse{sc.deconv_maj_arcsec, sc.deconv_min_upper_limit ? 0.0 : sc.deconv_min_arcsec,
                                     sc.deconv_pa_deg};
        cc.flags = flags;
        cc.info_bits = info;
        per_island_cat[k].push_back(cc);
      }
    }
  });
  std::vector<ComponentRecord> comps;
  std::vector<CatalogueComponent> cat;
  std::vector<PixelComponent> all_pix;
  for (std::size_t k = 0; k < n_isl; ++k) {
    for (auto& r : per_island[k]) comps.push_back(r);
    for (auto& c : per_island_cat[k]) cat.push_back(c);
    for (const auto& pc : fits[k].components) all_pix.push_back(pc);
  }
  per_island = {};
  per_island_cat = {};
  t_fit.stop();

  // ---- catalogue ------------------------------------------------------------------------
  StageTimer t_cat(record, "catalogue");
  flag_components(cat, sky.pixels, centre_geom->local.jac_arcsec_per_pix, sky.beam, cfg.flags);
  std::vector<IslandRecord> islands(n_isl);
  std::vector<CatalogueIsland> cat_isl(n_isl);
  for (std::size_t k = 0; k < n_isl; ++k) {
    const Island& is = isl.islands[k];
    const Geometry& g = island_geom[k];
    IslandRecord& r = islands[k];
    r.island_id = is.label;
    r.n_components = static_cast<std::int64_t>(fits[k].components.size());
    r.n_pixels = is.pixels;
    // Pixel sum / beam area in pixels: Jy/beam * pixel -> Jy (REF-GAUSS-04).
    r.s_pix_jy = is.sum_minus_background / g.beam_area_pix;
    r.s_pix_err_jy = island_flux_err[k];
    r.peak_jy_per_beam = static_cast<double>(is.peak_value) - static_cast<double>(is.peak_background);
    r.peak_snr = is.peak_snr;
    r.peak_x_pix = is.peak_x;
    r.peak_y_pix = is.peak_y;
    if (!sky.wcs->pix_to_sky(is.peak_x, is.peak_y, r.peak_ra_deg, r.peak_dec_deg))
      r.peak_ra_deg = r.peak_dec_deg = NAN;
    r.x0 = is.x_min;
    r.x1 = is.x_max;
    r.y0 = is.y_min;
    r.y1 = is.y_max;
    r.residual_rms_jy_per_beam = fits[k].residual_rms;
    r.mean_rms_jy_per_beam = island_mean_rms[k];
    CatalogueIsland& ci = cat_isl[k];
    ci.id = is.label;
    ci.n_pixels = static_cast<long>(is.pixels);
    ci.n_beams = static_cast<double>(is.pixels) / g.beam_area_pix;
    ci.residual_rms_jy_per_beam = r.residual_rms_jy_per_beam;
    ci.mean_rms_jy_per_beam = r.mean_rms_jy_per_beam;
    std::uint32_t f = 0;
    if (is.touches_edge) f |= kFlagNearEdge;
    if (is.touches_blank) f |= kFlagNearBlank;
    if (island_is_diffuse(ci, cfg.grouping)) f |= kFlagDiffuse;
    for (const auto& pc : fits[k].components) f |= flags_from_fit(pc) & kFlagFitFailed;
    if (fits[k].n_maxima > cfg.fit.max_components) f |= kFlagComponentCap;
    r.flags = f;
    ci.flags = f;
  }
  for (std::size_t i = 0; i < comps.size(); ++i) comps[i].flags = cat[i].flags;
  const std::vector<CatalogueSource> sources = group_sources(cat, cat_isl, sky.beam, cfg.grouping);
  for (const auto& s : sources)
    for (std::size_t i : s.components) comps[i].source_id = s.id;
  sort_components(comps);  // already in (island, component) order; keeps the rule explicit
  t_cat.stop();

  // ---- write ------------------------------------------------------------------------------
  {
    StageTimer t_wait(record, "write_maps_wait");  // what the map writer still needed after the fit
    if (map_writes.valid()) map_writes.get();       // rethrows the writer's error, if any
  }
  StageTimer t_write(record, "write");
  const std::string image_sha256 = record.add_input("image", cfg.image, image_sha.get());
  Provenance meta = {
      {"tool", "skerry extract"},
      {"version", SKERRY_VERSION},
      {"git_revision", SKERRY_GIT_REVISION},
      {"input_image", fs::path(cfg.image).filename().string()},
      {"input_image_sha256", image_sha256},
      {"image_frame", sky.frame},
      {"beam_maj_arcsec", std::to_string(sky.beam.maj_arcsec)},
      {"beam_min_arcsec", std::to_string(sky.beam.min_arcsec)},
      {"beam_pa_deg", std::to_string(sky.beam.pa_deg)},
      {"freq_mhz", std::isfinite(sky.freq_hz) ? std::to_string(sky.freq_hz / 1e6) : std::string("unknown")},
      {"peak_snr_used", std::to_string(isl.peak_snr_used)},
      {"grow_snr_used", std::to_string(isl.grow_snr_used)},
      {"noise_passes", std::to_string(noise_passes)},
  };
  for (const auto& [k, v] : parsed.resolved) {
    if (k == "threads" || k == "out" || k == "image") continue;  // never in outputs: not about the result
    std::string key = "cfg_" + k;
    std::replace(key.begin(), key.end(), '.', '_');
    meta.emplace_back(key, v);
  }
  isl.labels = LabelsI32();
  // The model and the residual are written on two threads while the tables are
  // formed and written here: the image writes are disk-bound (O_DIRECT, see
  // write_fits_image) and the tables CPU-bound, so they overlap. The label map is
  // freed first, so that the two images add no more memory than the maps did.
  // Output paths are taken here, in a fixed order, so that the run record lists
  // the files in the same order whatever finishes first. The futures are declared
  // after `model`: a throw below joins the writers before the model is freed.
  ImageF model;
  if (cfg.write_model || cfg.write_residual) model = render_model(nx, ny, all_pix, 6.0);
  std::future<void> model_write, residual_write;
  if (cfg.write_model) {
    const std::string model_path = stage.path(N + ".model_map.fits");
    model_write = std::async(std::launch::async, [&model, &sky, &cards, model_path] {
      write_fits_image(model_path, model, sky, "JY/BEAM", cards);
    });
  }
  if (cfg.write_residual) {
    const std::string residual_path = stage.path(N + ".residual_map.fits");
    residual_write = std::async(std::launch::async, [&model, &sky, &cards, residual_path] {
      const ImageF residual = sky.pixels - model;  // residual = image - model (background kept)
      write_fits_image(residual_path, residual, sky, "JY/BEAM", cards);
    });
  }
  const double freq = sky.freq_hz;
  {
    const Table t = make_component_table(comps, meta, freq);
    if (cfg.fmt_csv) write_table(t, stage.path(N + ".components.csv"));
    if (cfg.fmt_fits) write_table(t, stage.path(N + ".components.fits"));
    if (cfg.fmt_vot) write_table(t, stage.path(N + ".components.vot"));
  }
  {
    // The island table is always CSV (the report reads it), and FITS/VOTable as
    // asked; NAME.island_map.fits is the label image.
    const Table t = make_island_table(islands, meta, freq);
    write_table(t, stage.path(N + ".islands.csv"));
    if (cfg.fmt_fits) write_table(t, stage.path(N + ".islands.fits"));
    if (cfg.fmt_vot) write_table(t, stage.path(N + ".islands.vot"));
  }
  {
    const Table t = make_source_table(sources, meta, freq, cfg.designation_prefix);
    if (cfg.fmt_csv) write_table(t, stage.path(N + ".sources.csv"));
    if (cfg.fmt_fits) write_table(t, stage.path(N + ".sources.fits"));
    if (cfg.fmt_vot) write_table(t, stage.path(N + ".sources.vot"));
  }
  if (model_write.valid()) model_write.get();  // rethrows the writer's error, if any
  if (residual_write.valid()) residual_write.get();
  t_write.stop();
  std::int64_t n_failed = 0;
  for (const auto& c : comps) n_failed += (c.flags & kFlagFitFailed) ? 1 : 0;
  record.set_count("islands", static_cast<std::int64_t>(n_isl));
  record.set_count("components", static_cast<std::int64_t>(comps.size()));
  record.set_count("sources", static_cast<std::int64_t>(sources.size()));
  record.set_count("components_fit_failed", n_failed);
  record.set_count("islands_too_small", isl.islands_too_small);
  record.set_count("noise_passes", noise_passes);
  record.set_count("image_width", nx);
  record.set_count("image_height", ny);
  record.set_value("peak_snr_used", std::to_string(isl.peak_snr_used));
  record.set_value("output_folder", cfg.out_dir);
  for (const auto& f : stage.files()) record.add_output(stage.final_path(f));
  const std::string run_name = N + ".run.json";
  record.add_output(stage.final_path(run_name));
  record.write(stage.path(run_name));
  stage.commit();

  const double secs = std::chrono::duration<double>(std::chrono::steady_clock::now() - t_start).count();
  char line[512];
  std::snprintf(line, sizeof line, "extract %s: %zu islands, %zu components, %zu sources in %.2f s -> %s\n",
                N.c_str(), n_isl, comps.size(), sources.size(), secs, cfg.out_dir.c_str());
  std::cout << line << std::flush;
  if (parsed.vm["output.report"].as<bool>()) {
    // The same page `skerry report DIR --report.name NAME` writes.
    for (const auto& c : command_registry())
      if (c.name == "report") return c.run({cfg.out_dir, "--report.name", N});
    throw std::logic_error("extract: output.report needs the report sub-command, which is not built in");
  }
  return kExitOk;
}

const CommandRegistrar kRegistrar{"extract", "one image -> noise maps, islands, components, sources",
                                  &run_extract};

}  // namespace
}  // namespace skerry
