// `skerry extract IMAGE --out DIR`: one radio image to noise maps, islands,
// fitted components, sources, residual and model images and a run record.
//
// The numerics are the extract job (extract_job.h); this file turns options into
// an ExtractConfig, reads the inputs, runs the job and writes its results.
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
#include <algorithm>
#include <cctype>
#include <charconv>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <future>
#include <iostream>
#include <limits>
#include <optional>
#include <sstream>

#include "app/command.h"
#include "app/console.h"
#include "app/errors.h"
#include "app/options.h"
#include "app/progress.h"
#include "app/run_record.h"
#include "app/version.h"
#include "extract/catalogue_tables.h"
#include "extract/extract_job.h"
#include "extract/extract_settings.h"
#include "io/atomic_file.h"
#include "io/fits_image.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "skerry/gaussian.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;

// ---- Configuration ------------------------------------------------------------

/// What a survey wants by default (README, "Output maps"): the smooth noise maps
/// quantised far below the noise, labels and model lossless (mostly zeros), and
/// the residual, whose noise is what it is inspected for, as it was.
constexpr const char* kDefaultMapStorage =
    "rms:quantised,background:quantised,islands:lossless,model:lossless,residual:plain";

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
      ("image.hdu", po::value<std::string>()->default_value(""), "HDU: number (1 = primary) or EXTNAME; empty = first image HDU. IMAGE[N] (0 = primary, as CFITSIO and astropy count) or IMAGE[EXTNAME] does the same")
      ("image.plane", po::value<std::string>()->default_value(""), "0-based plane per non-degenerate extra axis, comma-separated (e.g. 2,0)")
      ("image.beam_arcsec", po::value<std::string>()->default_value(""), "restoring beam 'maj,min,pa' [arcsec, arcsec, deg east of north]; replaces BMAJ/BMIN/BPA and CLEAN HISTORY cards")
      ("image.freq_mhz", po::value<double>()->default_value(0.0), "observing frequency [MHz]; 0 = from the header")
      ("image.accept_bunit", po::value<bool>()->default_value(false), "accept a BUNIT skerry does not convert (Jy/beam, K and Jy/pixel are converted) and take the values as Jy/beam, no conversion")
      ("image.primary_beam", po::value<std::string>()->default_value(""), "primary-beam image on the same grid (values in (0, 1]); enables corrected flux densities")
      ("image.pb_cut", po::value<double>()->default_value(0.2), "components where the primary beam is below this get the below_pb_cut flag")
      // [noise]
      ("noise.window_beams", po::value<double>()->default_value(bg.box_beams), "side of the window over which each background/rms statistic is taken [beams]")
      ("noise.window_pixels", po::value<int>()->default_value(0), "window side [pixels]; overrides noise.window_beams when > 0")
      ("noise.grid_spacing_beams", po::value<double>()->default_value(bg.step_beams), "spacing of the grid of window centres [beams]; 0 = the window side (windows tile the image)")
      ("noise.clip_sigma", po::value<double>()->default_value(bg.clip_sigma), "sigma-clipping level k (>= 2: iterated clipping collapses below about 1.8)")
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
      ("fit.residual_search", po::value<bool>()->default_value(fit.residual_search), "after the fit of the island's peaks, add a component at a significant residual or split an elongated component, kept on the likelihood-ratio statistic (blends closer than a beam, extended emission)")
      ("fit.residual_snr", po::value<double>()->default_value(fit.residual_snr), "a whitened residual (data - model)/rms of at least this proposes an added component")
      ("fit.split_min_excess", po::value<double>()->default_value(fit.split_min_excess), "a component whose variance along its major axis exceeds the beam's by more than this fraction is proposed for a split")
      ("fit.add_min_lr", po::value<double>()->default_value(fit.add_min_lr), "smallest likelihood-ratio statistic 2 (chi2_k - chi2_k+1) / beam area [pix] that keeps a proposed component")
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
      ("catalogue.residual_flux_snr", po::value<double>()->default_value(gr.residual_flux_snr), "a source's s_int is its apertures' pixel flux when their residual flux sum(data - model) reaches this many errors, else the components' sum")
      ("catalogue.aperture_margin_beams", po::value<double>()->default_value(gr.aperture_margin_beams), "flux aperture of an island: the island grown by this many beam FWHMs, other islands left out")
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
      ("output.map_storage", po::value<std::string>()->default_value(kDefaultMapStorage),
       "how each map is stored, comma-separated MAP:HOW with MAP one of rms, background, islands, model, residual and "
       "HOW one of plain (uncompressed float32/int32), lossless (FITS tile compression, every bit kept), quantised "
       "(tile compression of values rounded to output.quantise_step; rms, background and residual only)")
      ("output.quantise_step", po::value<double>()->default_value(0.004),
       "step of the quantised maps, as a fraction of the smallest rms in the rms map (a value read back is within half a step)")
      ("output.report", po::value<bool>()->default_value(false), "also write the run report NAME.report.html at the end (skerry report)");
  return d;
}

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

/// How each output map is stored; a Quantised step is set at write time from the
/// rms map (step_fraction x its smallest value).
struct MapPolicy {
  MapStorage rms, background, islands, model, residual;
  double step_fraction = 0.004;
};

MapPolicy parse_map_policy(const std::string& text, double step_fraction) {
  MapPolicy p;
  p.step_fraction = step_fraction;
  if (!(step_fraction > 0.0 && step_fraction <= 1.0))
    throw UsageError("output.quantise_step = " + std::to_string(step_fraction) +
                     ": must be > 0 and <= 1 (a fraction of the smallest rms)");
  for (const auto& item : split(text, ',')) {
    if (item.empty()) continue;
    const auto colon = item.find(':');
    const std::string map = item.substr(0, colon), how = colon == std::string::npos ? "" : item.substr(colon + 1);
    MapStorage* target = map == "rms"          ? &p.rms
                         : map == "background" ? &p.background
                         : map == "islands"    ? &p.islands
                         : map == "model"      ? &p.model
                         : map == "residual"   ? &p.residual
                                               : nullptr;
    if (!target)
      throw UsageError("output.map_storage: unknown map '" + map + "' in '" + item +
                       "' (rms, background, islands, model, residual)");
    if (how == "plain") target->kind = MapStorage::Kind::Plain;
    else if (how == "lossless") target->kind = MapStorage::Kind::Lossless;
    else if (how == "quantised" && (target == &p.islands || target == &p.model))
      throw UsageError("output.map_storage: '" + item + "': the " + map + " map is stored plain or lossless");
    else if (how == "quantised") target->kind = MapStorage::Kind::Quantised;
    else
      throw UsageError("output.map_storage: '" + item + "' needs MAP:HOW with HOW one of plain, lossless, quantised");
  }
  return p;
}

/// The smallest positive finite value of the rms map [Jy/beam], the reference of
/// the quantisation step; 0 when there is none (then nothing is quantised).
double smallest_rms(const ImageF& rms) {
  double m = std::numeric_limits<double>::infinity();
  for (Eigen::Index i = 0; i < rms.size(); ++i) {
    const double v = rms.data()[i];
    if (v > 0.0 && v < m) m = v;
  }
  return std::isfinite(m) ? m : 0.0;
}

/// The storage of one map with its step in Jy/beam; a quantised map whose rms
/// reference is missing is stored lossless instead.
MapStorage with_step(MapStorage s, double step_fraction, double rms_min) {
  if (s.kind != MapStorage::Kind::Quantised) return s;
  if (!(rms_min > 0.0)) return {MapStorage::Kind::Lossless, 0.0};
  s.step = step_fraction * rms_min;
  return s;
}

/// The command's settings: what to read, the job's configuration, what to write.
struct Config : ExtractSettings {
  MapPolicy maps;
  std::string image, out_dir, name;
  bool fmt_csv = false, fmt_fits = false, fmt_vot = false;
  bool write_maps = true, write_model = true, write_residual = true, report = false;
};

/// Option values of one parse, with the option named in every message.
struct OptionReader {
  const po::variables_map& vm;
  std::string S(const char* k) const { return vm[k].as<std::string>(); }
  double D(const char* k) const { return vm[k].as<double>(); }
  bool B(const char* k) const { return vm[k].as<bool>(); }
  int I(const char* k) const { return vm[k].as<int>(); }
  /// A value in a message: the shortest text that reads back as the same double
  /// (1.7, not 1.7000000000000002).
  static std::string txt(double v) {
    char buf[32];
    const auto r = std::to_chars(buf, buf + sizeof buf, v);
    return std::string(buf, r.ptr);
  }
};

void read_image_config(const OptionReader& o, ExtractSettings& c) {
  c.read.hdu = o.S("image.hdu");
  for (const auto& s : split(o.S("image.plane"), ',')) {
    if (s.empty()) continue;
    const double v = parse_number("image.plane", s);
    require(v >= 0 && v == std::floor(v), "image.plane", s, "a 0-based integer plane index");
    c.read.plane.push_back(static_cast<long>(v));
  }
  if (!o.S("image.beam_arcsec").empty()) {
    const auto parts = split(o.S("image.beam_arcsec"), ',');
    if (parts.size() != 3)
      throw UsageError("image.beam_arcsec = '" + o.S("image.beam_arcsec") + "' needs three values 'maj,min,pa'");
    Beam b{parse_number("image.beam_arcsec", parts[0]), parse_number("image.beam_arcsec", parts[1]),
           parse_number("image.beam_arcsec", parts[2])};
    require(b.valid(), "image.beam_arcsec", o.S("image.beam_arcsec"), "0 < min <= maj (arcsec)");
    b.pa_deg = wrap_pa_180(b.pa_deg);
    c.read.beam_override = b;
  }
  c.job.beam_pa_in_image_frame = !c.read.beam_override.has_value();
  require(o.D("image.freq_mhz") >= 0.0, "image.freq_mhz", o.txt(o.D("image.freq_mhz")), "image.freq_mhz >= 0");
  if (o.D("image.freq_mhz") > 0.0) c.read.freq_hz_override = o.D("image.freq_mhz") * 1e6;
  c.read.accept_any_bunit = o.B("image.accept_bunit");
  c.read.require_beam = true;
  c.primary_beam = o.S("image.primary_beam");
  c.job.pb_cut = o.D("image.pb_cut");
  require(c.job.pb_cut >= 0.0 && c.job.pb_cut <= 1.0, "image.pb_cut", o.txt(c.job.pb_cut), "0 <= image.pb_cut <= 1");
}

void read_noise_config(const OptionReader& o, ExtractSettings& c) {
  BackgroundOptions& bg = c.job.noise;
  bg.box_beams = o.D("noise.window_beams");
  bg.box_pixels = o.I("noise.window_pixels");
  bg.step_beams = o.D("noise.grid_spacing_beams");
  bg.clip_sigma = o.D("noise.clip_sigma");
  require(bg.box_beams > 0.0, "noise.window_beams", o.txt(bg.box_beams), "noise.window_beams > 0");
  require(bg.box_pixels >= 0, "noise.window_pixels", std::to_string(bg.box_pixels), "noise.window_pixels >= 0");
  require(bg.step_beams >= 0.0, "noise.grid_spacing_beams", o.txt(bg.step_beams), "noise.grid_spacing_beams >= 0");
  require(bg.clip_sigma >= 2.0 && std::isfinite(bg.clip_sigma), "noise.clip_sigma", o.txt(bg.clip_sigma),
          "noise.clip_sigma >= 2 (iterated clipping collapses below about 1.8)");
  c.job.second_pass = o.B("noise.second_pass");
  c.job.mask_margin_beams = o.D("noise.mask_margin_beams");
  require(c.job.mask_margin_beams >= 0.0, "noise.mask_margin_beams", o.txt(c.job.mask_margin_beams),
          "noise.mask_margin_beams >= 0");
  c.rms_map = o.S("noise.rms_map");
  c.background_map = o.S("noise.background_map");
  const double fixed_rms = o.D("noise.fixed_rms");
  require(fixed_rms >= 0.0, "noise.fixed_rms", o.txt(fixed_rms), "noise.fixed_rms >= 0 (0 = estimate)");
  if (fixed_rms > 0.0) c.job.fixed_rms = fixed_rms;
  if (fixed_rms > 0.0 && !c.rms_map.empty())
    throw UsageError("noise.fixed_rms and noise.rms_map are both given; choose one");
  if (!o.S("noise.fixed_background").empty()) {
    c.job.fixed_background = parse_number("noise.fixed_background", o.S("noise.fixed_background"));
    if (!c.background_map.empty())
      throw UsageError("noise.fixed_background and noise.background_map are both given; choose one");
  }
}

void read_detect_fit_config(const OptionReader& o, ExtractSettings& c) {
  IslandOptions& is = c.job.islands;
  is.peak_snr = o.D("detect.peak_snr");
  is.grow_snr = o.D("detect.grow_snr");
  const double alpha = o.D("detect.false_discovery_rate");
  require(alpha >= 0.0 && alpha < 1.0, "detect.false_discovery_rate", o.txt(alpha), "0 <= detect.false_discovery_rate < 1 (0 = fixed threshold)");
  if (alpha > 0.0) {
    is.peak_threshold = PeakThreshold::fdr;
    is.fdr_alpha = alpha;
  }
  is.fdr_arbitrary_dependence = o.B("detect.false_discovery_any_dependence");
  is.min_pixels = o.vm["detect.min_pixels"].as<long>();
  if (const std::string e = is.validate(); !e.empty()) throw UsageError("detect: " + e);

  FitOptions& fit = c.job.fit;
  fit.max_components = o.I("fit.max_components");
  require(fit.max_components >= 1 && fit.max_components <= 50, "fit.max_components",
          std::to_string(fit.max_components), "1 <= fit.max_components <= 50");
  fit.prominence_snr = o.D("fit.prominence_snr");
  require(fit.prominence_snr >= 0.0, "fit.prominence_snr", o.txt(fit.prominence_snr), "fit.prominence_snr >= 0");
  fit.min_size_beam_fraction = o.D("fit.min_size_beam_fraction");
  require(fit.min_size_beam_fraction > 0.0 && fit.min_size_beam_fraction <= 1.0, "fit.min_size_beam_fraction",
          o.txt(fit.min_size_beam_fraction), "0 < fit.min_size_beam_fraction <= 1");
  fit.fix_shape_to_beam = o.B("fit.fixed_shape");
  fit.fit_margin_beam_sigma = o.D("fit.region_margin_beam_sigma");
  require(fit.fit_margin_beam_sigma >= 0.0 && fit.fit_margin_beam_sigma <= 10.0, "fit.region_margin_beam_sigma",
          o.txt(fit.fit_margin_beam_sigma), "0 <= fit.region_margin_beam_sigma <= 10");
  fit.use_information_criterion = o.B("fit.information_criterion");
  fit.residual_search = o.B("fit.residual_search");
  fit.residual_snr = o.D("fit.residual_snr");
  require(fit.residual_snr > 0.0, "fit.residual_snr", o.txt(fit.residual_snr), "fit.residual_snr > 0");
  fit.split_min_excess = o.D("fit.split_min_excess");
  require(fit.split_min_excess >= 0.0, "fit.split_min_excess", o.txt(fit.split_min_excess), "fit.split_min_excess >= 0");
  fit.add_min_lr = o.D("fit.add_min_lr");
  require(fit.add_min_lr >= 0.0, "fit.add_min_lr", o.txt(fit.add_min_lr), "fit.add_min_lr >= 0");
  fit.lm.max_iterations = o.I("fit.max_iterations");
  require(fit.lm.max_iterations >= 1, "fit.max_iterations", std::to_string(fit.lm.max_iterations), "fit.max_iterations >= 1");

  SkyOptions& sky = c.job.sky;
  sky.use_condon_errors = o.B("fit.condon_errors");
  sky.flux_scale_frac = o.D("errors.flux_scale_frac");
  require(sky.flux_scale_frac >= 0.0 && sky.flux_scale_frac < 1.0, "errors.flux_scale_frac",
          o.txt(sky.flux_scale_frac), "0 <= errors.flux_scale_frac < 1");
  sky.astrometric_floor_arcsec = o.D("errors.astrometry_arcsec");
  require(sky.astrometric_floor_arcsec >= 0.0, "errors.astrometry_arcsec", o.txt(sky.astrometric_floor_arcsec),
          "errors.astrometry_arcsec >= 0");
  sky.unresolved_nsigma = o.D("errors.unresolved_nsigma");
  require(sky.unresolved_nsigma >= 0.0, "errors.unresolved_nsigma", o.txt(sky.unresolved_nsigma), "errors.unresolved_nsigma >= 0");
  sky.envelope_a = o.D("resolved.envelope_a");
  sky.envelope_b = o.D("resolved.envelope_b");
  require(sky.envelope_a >= 0.0, "resolved.envelope_a", o.txt(sky.envelope_a), "resolved.envelope_a >= 0");
  require(sky.envelope_b >= 0.0, "resolved.envelope_b", o.txt(sky.envelope_b), "resolved.envelope_b >= 0");
}

void read_catalogue_config(const OptionReader& o, ExtractSettings& c) {
  GroupingOptions& gr = c.job.grouping;
  gr.link_gap_beams = o.D("catalogue.group_gap_beams");
  gr.link_max_flux_ratio = o.D("catalogue.group_max_flux_ratio");
  require(gr.link_max_flux_ratio == 0.0 || gr.link_max_flux_ratio >= 1.0, "catalogue.group_max_flux_ratio",
          o.txt(gr.link_max_flux_ratio), "0 (any) or >= 1");
  gr.diffuse_residual_ratio = o.D("catalogue.diffuse_residual_ratio");
  require(gr.diffuse_residual_ratio > 0.0, "catalogue.diffuse_residual_ratio", o.txt(gr.diffuse_residual_ratio),
          "catalogue.diffuse_residual_ratio > 0");
  gr.diffuse_min_beams = o.D("catalogue.diffuse_min_beams");
  require(gr.diffuse_min_beams >= 0.0, "catalogue.diffuse_min_beams", o.txt(gr.diffuse_min_beams), ">= 0");
  gr.aperture_margin_beams = o.D("catalogue.aperture_margin_beams");
  require(gr.aperture_margin_beams >= 0.0 && gr.aperture_margin_beams <= 10.0, "catalogue.aperture_margin_beams",
          o.txt(gr.aperture_margin_beams), "0 <= catalogue.aperture_margin_beams <= 10");
  gr.residual_flux_snr = o.D("catalogue.residual_flux_snr");
  require(gr.residual_flux_snr > 0.0, "catalogue.residual_flux_snr", o.txt(gr.residual_flux_snr),
          "catalogue.residual_flux_snr > 0");
  FlagOptions& fl = c.job.flags;
  fl.edge_margin_beams = o.D("catalogue.edge_margin_beams");
  fl.blank_margin_beams = o.D("catalogue.blank_margin_beams");
  fl.bright_radius_beams = o.D("catalogue.bright_radius_beams");
  fl.bright_ratio = o.D("catalogue.bright_ratio");
  require(fl.edge_margin_beams >= 0.0, "catalogue.edge_margin_beams", o.txt(fl.edge_margin_beams), ">= 0");
  require(fl.blank_margin_beams >= 0.0 && fl.blank_margin_beams <= 100.0, "catalogue.blank_margin_beams",
          o.txt(fl.blank_margin_beams), "0 <= value <= 100");
  require(fl.bright_radius_beams >= 0.0, "catalogue.bright_radius_beams", o.txt(fl.bright_radius_beams), ">= 0");
  require(fl.bright_ratio >= 1.0, "catalogue.bright_ratio", o.txt(fl.bright_ratio), "catalogue.bright_ratio >= 1");
  c.designation_prefix = o.S("catalogue.designation_prefix");
}

void read_output_config(const OptionReader& o, Config& c) {
  for (const auto& f : split(o.S("output.formats"), ',')) {
    if (f == "csv") c.fmt_csv = true;
    else if (f == "fits") c.fmt_fits = true;
    else if (f == "vot") c.fmt_vot = true;
    else if (!f.empty()) throw UsageError("output.formats: unknown format '" + f + "' (csv, fits, vot)");
  }
  c.maps = parse_map_policy(o.S("output.map_storage"), o.D("output.quantise_step"));
  c.write_maps = o.B("output.maps");
  c.write_model = o.B("output.model");
  c.write_residual = o.B("output.residual");
  c.report = o.B("output.report");
  c.job.render_model = c.write_model || c.write_residual;
  c.name = o.S("output.name");
  if (c.name.empty()) c.name = file_stem(c.image);
  if (c.name.empty() || c.name.find('/') != std::string::npos || c.name.front() == '.')
    throw UsageError("output.name = '" + c.name + "' must be a plain file name not starting with '.'");
  c.out_dir = o.S("out");
  if (c.out_dir.empty()) c.out_dir = (fs::path("outputs") / c.name).string();
}

void read_settings(const OptionReader& o, ExtractSettings& s) {
  read_image_config(o, s);
  read_noise_config(o, s);
  read_detect_fit_config(o, s);
  read_catalogue_config(o, s);
}

/// IMAGE[HDU], the extended file name of the FITS world (CFITSIO's syntax, as
/// astropy counts): `f.fits[0]` is the primary HDU, `f.fits[1]` the first
/// extension, `f.fits[SKY]` the extension named SKY. Taken only when no file
/// has the literal name; `image.hdu` counts from 1 = primary, so [N] becomes
/// image.hdu N + 1. Giving both is refused.
void split_hdu_suffix(std::string& image, std::string& hdu) {
  if (image.size() < 4 || image.back() != ']') return;
  std::error_code ec;
  if (fs::exists(image, ec)) return;
  const std::size_t open = image.rfind('[');
  if (open == std::string::npos || open == 0 || open + 2 > image.size() - 1) return;
  const std::string base = image.substr(0, open), spec = image.substr(open + 1, image.size() - open - 2);
  if (!fs::exists(base, ec)) return;  // the reader names the missing file
  if (!hdu.empty())
    throw UsageError("image " + image + ": the HDU is given twice (in brackets and as --image.hdu " + hdu +
                     "); give one");
  if (std::all_of(spec.begin(), spec.end(), [](char ch) { return std::isdigit(static_cast<unsigned char>(ch)); })) {
    if (spec.size() > 6) throw UsageError("image " + image + ": HDU number [" + spec + "] is too large");
    hdu = std::to_string(std::stol(spec) + 1);  // [0] = primary = image.hdu 1
  } else {
    hdu = spec;  // EXTNAME
  }
  image = base;
}

Config read_config(const ParsedOptions& p) {
  const OptionReader o{p.vm};
  Config c;
  if (!p.vm.count("image")) throw UsageError("no input image given (usage: skerry extract IMAGE --out DIR)");
  c.image = o.S("image");
  read_settings(o, c);
  split_hdu_suffix(c.image, c.read.hdu);  // before the output names, which follow the file's stem
  read_output_config(o, c);
  return c;
}

// ---- Inputs ---------------------------------------------------------------------------------

ImageF read_map(const std::string& path, const SkyImage& like, const char* what) {
  ImageReadOptions o;
  o.accept_any_bunit = true;
  o.require_beam = false;
  o.allow_all_blank = true;
  // A map on the image's grid in K or Jy/pixel is converted with the image's own
  // beam and frequency, as the image is.
  if (like.beam.valid()) o.beam_override = like.beam;
  if (std::isfinite(like.freq_hz)) o.freq_hz_override = like.freq_hz;
  SkyImage m = read_sky_image(path, o);
  if (m.pixels.rows() != like.pixels.rows() || m.pixels.cols() != like.pixels.cols())
    throw InputError(path, std::string(what) + " is " + std::to_string(m.pixels.cols()) + " x " +
                               std::to_string(m.pixels.rows()) + " pixels but the image is " +
                               std::to_string(like.pixels.cols()) + " x " + std::to_string(like.pixels.rows()));
  return std::move(m.pixels);
}

// ---- Outputs --------------------------------------------------------------------------------

/// Provenance of every table: tool, inputs, beam, thresholds and the configuration.
Provenance table_meta(const Config& cfg, const ParsedOptions& parsed, const SkyImage& sky, const ExtractResult& r,
                      const std::string& image_sha256) {
  Provenance meta = extract_provenance("skerry extract", sky, cfg.image, image_sha256, r);
  for (const auto& [k, v] : parsed.resolved) {
    if (k == "threads" || k == "out" || k == "image") continue;  // never in outputs: not about the result
    std::string key = "cfg_" + k;
    std::replace(key.begin(), key.end(), '.', '_');
    meta.emplace_back(key, v);
  }
  return meta;
}

/// Writes the model and residual images (on two threads) and the tables.
void write_results(const Config& cfg, const SkyImage& sky, const ExtractResult& r, const Provenance& meta,
                   const std::vector<std::pair<std::string, std::string>>& cards, StagedOutputs& stage,
                   double rms_min) {
  // The image writes are disk-bound (O_DIRECT, see write_fits_image) and the
  // tables CPU-bound, so they overlap. Output paths are taken here, in a fixed
  // order, so that the run record lists the files in the same order whatever
  // finishes first. A throw below joins the writers (future destructors) before
  // the model they read is gone.
  const std::string& N = cfg.name;
  const ImageF& model = r.model;
  std::future<void> model_write, residual_write;
  if (cfg.write_model) {
    const std::string model_path = stage.path(N + ".model_map.fits");
    const MapStorage how = with_step(cfg.maps.model, cfg.maps.step_fraction, rms_min);
    model_write = std::async(std::launch::async, [&model, &sky, &cards, model_path, how] {
      write_fits_image(model_path, model, sky, "Jy/beam", cards, how);
    });
  }
  if (cfg.write_residual) {
    const std::string residual_path = stage.path(N + ".residual_map.fits");
    const MapStorage how = with_step(cfg.maps.residual, cfg.maps.step_fraction, rms_min);
    residual_write = std::async(std::launch::async, [&model, &sky, &cards, residual_path, how] {
      const ImageF residual = sky.pixels - model;  // residual = image - model (background kept)
      write_fits_image(residual_path, residual, sky, "Jy/beam", cards, how);
    });
  }
  const double freq = sky.freq_hz;
  {
    const Table t = make_component_table(r.components, meta, freq);
    if (cfg.fmt_csv) write_table(t, stage.path(N + ".components.csv"));
    if (cfg.fmt_fits) write_table(t, stage.path(N + ".components.fits"));
    if (cfg.fmt_vot) write_table(t, stage.path(N + ".components.vot"));
  }
  {
    // The island table is always CSV (the report reads it), and FITS/VOTable as
    // asked; NAME.island_map.fits is the label image.
    const Table t = make_island_table(r.islands, meta, freq);
    write_table(t, stage.path(N + ".islands.csv"));
    if (cfg.fmt_fits) write_table(t, stage.path(N + ".islands.fits"));
    if (cfg.fmt_vot) write_table(t, stage.path(N + ".islands.vot"));
  }
  {
    const Table t = make_source_table(r.sources, meta, freq, cfg.designation_prefix);
    if (cfg.fmt_csv) write_table(t, stage.path(N + ".sources.csv"));
    if (cfg.fmt_fits) write_table(t, stage.path(N + ".sources.fits"));
    if (cfg.fmt_vot) write_table(t, stage.path(N + ".sources.vot"));
  }
  if (model_write.valid()) model_write.get();  // rethrows the writer's error, if any
  if (residual_write.valid()) residual_write.get();
}

void record_counts(RunRecord& record, const Config& cfg, const SkyImage& sky, const ExtractResult& r) {
  record.set_count("islands", static_cast<std::int64_t>(r.islands.size()));
  record.set_count("components", static_cast<std::int64_t>(r.components.size()));
  record.set_count("sources", static_cast<std::int64_t>(r.sources.size()));
  record.set_count("components_fit_failed", r.components_fit_failed);
  record.set_count("islands_too_small", r.islands_too_small);
  record.set_count("noise_passes", r.noise_passes);
  record.set_count("image_width", sky.pixels.cols());
  record.set_count("image_height", sky.pixels.rows());
  record.set_value("peak_snr_used", std::to_string(r.peak_snr_used));
  record.set_value("output_folder", cfg.out_dir);
  // How the image's values and beam were read (README, "Image units and beams").
  record.set_value("image_bunit", sky.bunit);
  record.set_value("image_bunit_conversion", sky.bunit_rule);
  record.set_value("image_bunit_scale", fits_real(sky.bunit_scale));
  record.set_value("beam_origin", sky.beam_origin);
}

// ---- The command ----------------------------------------------------------------------

int run_extract(const std::vector<std::string>& args) {
  const po::options_description desc = extract_options();
  ParsedOptions parsed = parse_options("extract", "IMAGE [--out DIR] [options]", desc, {{"image", 1}}, args);
  if (parsed.help) return kExitOk;
  const Config cfg = read_config(parsed);
  ThreadLimit threads(parsed.vm["threads"].as<int>());
  const auto t_start = std::chrono::steady_clock::now();

  RunRecord record("extract");
  record.set_configuration(parsed.resolved, parsed.config_file);
  record.set_threads(threads.threads());

  // ---- read ------------------------------------------------------------------
  // The image's SHA-256 (run record, table meta) is computed in a background
  // thread while the image is measured. It starts only once the reader has
  // accepted the file: a refused file (e.g. a header claiming terabytes) must
  // fail at once, not after the future's destructor waited for a full hash.
  StageTimer t_read(record, "read");
  const SkyImage sky = read_sky_image(cfg.image, cfg.read);
  std::future<std::string> image_sha = std::async(std::launch::async, [&] {
    std::error_code ec;
    return fs::is_regular_file(cfg.image, ec) ? sha256_file(cfg.image) : std::string();
  });
  check_extract_image(sky, cfg.job);
  const ExtractInputs inputs = read_extract_inputs(cfg, sky, &record);
  t_read.stop();

  // ---- the job; the maps are written while the islands are fitted ---------------------
  // The rms, background and island-label maps do not change once the islands are
  // found: they are written (each durably, see AtomicOutput) on a background
  // thread while the islands are fitted, so that the disk-bound writing overlaps
  // the CPU-bound fit. A future from std::async waits in its destructor, and
  // map_writes is declared after `stage`, so a throw joins the writer before the
  // staging folder is removed.
  const std::string& N = cfg.name;
  const std::vector<std::pair<std::string, std::string>> cards = {
      {"ORIGIN", fits_string(std::string("skerry ") + SKERRY_VERSION + " (" + SKERRY_GIT_REVISION + ")")}};
  std::optional<StagedOutputs> stage;
  std::future<void> map_writes, label_writes;
  std::optional<Progress> progress;
  ExtractHooks hooks;
  hooks.stage = [&](const std::string& name, double s) {
    record.add_stage(name, s);
    stage_ended(name, s);
  };
  hooks.stage_started = [](const std::string& name) { stage_started(name); };
  // The quantisation step's reference (smallest rms) is taken from the rms map once
  // it is final; read by write_results after map_writes is joined.
  double rms_min = 0.0;
  hooks.maps_final = [&](const NoiseMaps& maps, std::shared_ptr<const LabelsI32> labels) {
    stage.emplace(cfg.out_dir, cfg.name, "extract");
    if (!cfg.write_maps) {
      if (cfg.write_model || cfg.write_residual) rms_min = smallest_rms(maps.rms_image());
      return;
    }
    const std::string rms_path = stage->path(N + ".rms_map.fits"), bg_path = stage->path(N + ".background_map.fits"),
                      labels_path = stage->path(N + ".island_map.fits");
    // Two writers: the rms and background maps (quantised: CPU-bound compression)
    // and the labels, so that compression does not hold up the other map.
    map_writes = std::async(std::launch::async, [maps, &sky, &cards, &cfg, &rms_min, rms_path, bg_path] {
      {
        // One full-resolution map at a time: the rms image is gone before the
        // background image is made (each is as large as the input image).
        const ImageF rms = maps.rms_image();
        rms_min = smallest_rms(rms);
        write_fits_image(rms_path, rms, sky, "Jy/beam", cards, with_step(cfg.maps.rms, cfg.maps.step_fraction, rms_min));
      }
      write_fits_image(bg_path, maps.background_image(), sky, "Jy/beam", cards,
                       with_step(cfg.maps.background, cfg.maps.step_fraction, rms_min));
    });
    label_writes = std::async(std::launch::async, [labels, &sky, &cards, &cfg, labels_path]() mutable {
      write_fits_labels(labels_path, *labels, sky, cards, cfg.maps.islands);
      labels.reset();  // the label map is not kept after its write
    });
  };
  std::size_t fitted = 0;
  hooks.fit_progress = [&](std::size_t done, std::size_t total) {
    if (!progress) progress.emplace("fitting islands", total);
    progress->advance(done - fitted);
    fitted = done;
    if (done == total) progress->finish();
  };
  const ExtractResult result = run_extract_job(sky, inputs, cfg.job, hooks);

  // ---- write ------------------------------------------------------------------------------
  {
    StageTimer t_wait(record, "write_maps_wait");  // what the map writer still needed after the fit
    if (map_writes.valid()) map_writes.get();       // rethrows the writer's error, if any
    if (label_writes.valid()) label_writes.get();
  }
  StageTimer t_write(record, "write");
  const std::string image_sha256 = record.add_input("image", cfg.image, image_sha.get());
  write_results(cfg, sky, result, table_meta(cfg, parsed, sky, result, image_sha256), cards, *stage, rms_min);
  t_write.stop();
  record_counts(record, cfg, sky, result);
  for (const auto& f : stage->files()) record.add_output(stage->final_path(f));
  const std::string run_name = N + ".run.json";
  record.add_output(stage->final_path(run_name));
  record.write(stage->path(run_name));
  // An earlier run of the same NAME in this folder is replaced as a whole: its
  // files that this run does not write are removed after the commit (README,
  // "What skerry extract writes").
  stage->commit(outputs_listed_in(stage->final_path(run_name)));
  {
    // The replaced run's report page (written by `skerry report`, so not in the
    // run record) describes outputs that are gone; output.report or `skerry
    // report` writes the new run's page.
    std::error_code ec;
    fs::remove(stage->final_path(N + ".report.html"), ec);
  }

  const double secs = std::chrono::duration<double>(std::chrono::steady_clock::now() - t_start).count();
  char line[512];
  std::snprintf(line, sizeof line, "extract %s: %zu islands, %zu components, %zu sources in %.2f s -> %s\n",
                N.c_str(), result.islands.size(), result.components.size(), result.sources.size(), secs,
                cfg.out_dir.c_str());
  say(line);
  if (cfg.report) {
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

ExtractSettings extract_settings_from_file(const std::string& config_file) {
  std::vector<std::string> args;
  if (!config_file.empty()) args = {"--config", config_file};
  const ParsedOptions p = parse_options("extract", "IMAGE [--out DIR] [options]", extract_options(), {{"image", 1}}, args);
  ExtractSettings s;
  read_settings(OptionReader{p.vm}, s);
  return s;
}

ExtractInputs read_extract_inputs(const ExtractSettings& s, const SkyImage& sky, RunRecord* record) {
  ExtractInputs in;
  if (!s.primary_beam.empty()) {
    in.primary_beam = read_primary_beam(s.primary_beam, sky);
    if (record) record->add_input("primary_beam", s.primary_beam);
  }
  if (!s.rms_map.empty()) {
    in.rms_map = read_map(s.rms_map, sky, "the rms map");
    if (const std::string e = check_rms_map(sky.pixels, in.rms_map); !e.empty()) throw InputError(s.rms_map, e);
    if (record) record->add_input("rms_map", s.rms_map);
  }
  if (!s.background_map.empty()) {
    in.background_map = read_map(s.background_map, sky, "the background map");
    if (const std::string e = check_background_map(sky.pixels, in.background_map); !e.empty())
      throw InputError(s.background_map, e);
    if (record) record->add_input("background_map", s.background_map);
  }
  return in;
}

}  // namespace skerry
