// skerry bands IMAGE1 IMAGE2 ... --out DIR
//
// Multi-frequency measurement of one field: forced flux densities of every
// component in every band's own grid, spectral indices and curvature, and a
// spectral index map at a common resolution.
//
// Detection source (in this order): --catalogue FILE (a user catalogue);
// otherwise the catalogue that `skerry extract` makes from
//   detect.mode = band (the default): one band, --detect.band K (1-based), by
//     default the band with the smallest beam area; or
//   detect.mode = combined: a combined signal-to-noise image of all bands.
// The combined image: every band is regridded onto the maps' common grid
// (maps.grid_band) and convolved to the common beam (modules/resolution, as for
// the spectral index map), its rms is re-estimated after convolution (the
// background was subtracted before), and the bands are combined into
//   D = sum_b a_b I_b / sigma_b^2 / sqrt(sum_b a_b^2 / sigma_b^2),
//   a_b = (nu_b/nu_ref)^detect.assumed_spectral_index,
// the matched inverse-variance weighted sum (resolution.h
// combined_detection_image; Szalay, Connolly & Szokoly 1999, AJ 117, 68;
// Bevington & Robinson 2003 eqs. 4.17-4.19). With independent noise in the
// bands D ~ N(0,1) on empty sky, so extract runs on it with a fixed rms of 1 and
// a fixed background of 0 and detect.peak_snr keeps its meaning: the per-pixel
// false-detection probability of a threshold t is erfc(t/sqrt 2)/2 (2.9e-7 for
// t = 5), as in one band. D is linear, so sources keep the common beam's
// Gaussian shape: positions and intrinsic shapes (deconvolved from the common
// beam) come from extract's fits. (The chi-square image sqrt(sum SNR_b^2) of
// Szalay et al. needs no assumed spectrum, but its null is a chi distribution
// with a positive mean and its sources are not Gaussians, so extract's fits
// and thresholds would not hold.)
// Why the single band is the default: the forced model of every band is the
// component's intrinsic shape convolved with that band's beam, so the shapes
// and the separation of blends are best measured at the finest resolution; the
// combined image is at the coarsest (common) beam, where blends merge and
// sizes below that beam are unresolved. The combined image is the choice for
// depth (it reaches sqrt(N) deeper for sources whose spectrum matches the
// assumed one) and for a selection not tied to one frequency (a single
// high-frequency band misses steep-spectrum sources).
//
// Forced measurement (modules/forced): positions fixed by default;
// forced.max_shift_arcsec > 0 lets the centres of the components detected in a
// band move within +-max_shift along each pixel axis (bounded Levenberg-
// Marquardt; forced.h), and the spectral and forced tables gain the fitted
// shift, its error and an at-bound flag. The columns appear only then, so a run
// with max_shift 0 writes the same bytes as one without the option.
//
// Outputs (NAME = output.name, default the first image's OBJECT or file stem):
//   NAME.spectra.{csv,fits,vot}  one row per component: per-band flux densities,
//                                errors and limits, alpha, alpha_err, curvature
//   NAME.forced.{csv,fits,vot}   one row per component and band: the forced fit
//   NAME.alpha_map.fits, NAME.alpha_err_map.fits  spectral index map and its error on the
//                                common grid, with the common beam
//   NAME.detect/                 extract's outputs of the detection (if used);
//                                with detect.mode combined also
//                                NAME.detect_snr_map.fits, the combined image D
//   NAME.run.json                run record
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <iostream>
#include <limits>
#include <map>
#include <set>
#include <sstream>
#include <string>
#include <vector>

#include "app/command.h"
#include "app/console.h"
#include "app/errors.h"
#include "extract/catalogue_tables.h"
#include "extract/extract_job.h"
#include "extract/extract_settings.h"
#include "io/fits_image.h"
#include "io/table_io.h"
#include "app/options.h"
#include "app/run_record.h"
#include "skerry/background.h"
#include "skerry/catalogue.h"
#include "skerry/constants.h"
#include "skerry/forced.h"
#include "skerry/resolution.h"
#include "skerry/spectra.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;

po::options_description bands_options() {
  const ForcedOptions fo{};
  po::options_description d("bands options (options are SECTION.KEY; in a config file, KEY goes under [SECTION])");
  d.add_options()
      ("images", po::value<std::vector<std::string>>()->multitoken(), "input FITS images of one field, one per band (Jy/beam)")
      ("out", po::value<std::string>()->default_value(""), "output folder (default: outputs/NAME)")
      ("catalogue", po::value<std::string>()->default_value(""), "user catalogue (.csv/.fits/.vot) with ra_deg, dec_deg [deg] and optionally intrinsic_maj_arcsec, intrinsic_min_arcsec, intrinsic_pa_deg (intrinsic FWHMs; NaN or absent = point source); replaces detection")
      // [bands]
      ("bands.freq_mhz", po::value<std::string>()->default_value(""), "observing frequencies [MHz], comma-separated per band; empty or 0 entries = from the header")
      ("bands.flux_scale_frac", po::value<std::string>()->default_value("0.03"), "fractional flux-scale uncertainty: one value, or one per band (comma-separated)")
      ("bands.accept_bunit", po::value<bool>()->default_value(false), "accept a BUNIT skerry does not convert (Jy/beam, K and Jy/pixel are converted) and take the values as Jy/beam, no conversion")
      // [detect]
      ("detect.mode", po::value<std::string>()->default_value("band"), "band = detect in one band (detect.band); combined = detect on the matched signal-to-noise image of all bands at the common resolution")
      ("detect.band", po::value<int>()->default_value(0), "detect.mode band: 1-based band whose `skerry extract` catalogue gives the components; 0 = the band with the smallest beam")
      ("detect.assumed_spectral_index", po::value<double>()->default_value(-0.7), "detect.mode combined: spectral index assumed by the band weights (S ~ nu^alpha)")
      ("detect.peak_snr", po::value<double>()->default_value(5.0), "detection threshold passed to extract (island peak SNR; for the combined image in units of its N(0,1) noise)")
      // [noise]
      ("noise.window_beams", po::value<double>()->default_value(30.0), "side of the window over which each band's background/rms statistics are taken [beams]")
      // [forced]
      ("forced.detect_snr", po::value<double>()->default_value(fo.detect_snr), "a band detects a component when fitted peak / local rms >= this; otherwise it gives an upper limit")
      ("forced.limit_snr", po::value<double>()->default_value(fo.limit_snr), "upper limit = this x local rms (on the flux scale of the component's shape)")
      ("forced.fit_radius_sigma", po::value<double>()->default_value(fo.fit_radius_sigma), "pixels within this many model sigmas of a component are fitted")
      ("forced.blend_radius_sigma", po::value<double>()->default_value(fo.blend_radius_sigma), "components closer than this (sigma units of the summed shapes) are fitted together")
      ("forced.max_shift_arcsec", po::value<double>()->default_value(fo.max_shift_arcsec), "largest centre shift per pixel axis [arcsec] the forced fit may make for components detected in the band; 0 = positions fixed")
      // [maps]
      ("maps.enabled", po::value<bool>()->default_value(true), "write the images NAME.alpha_map.fits and NAME.alpha_err_map.fits (spectral index and its error)")
      ("maps.min_snr", po::value<double>()->default_value(5.0), "a map pixel needs I / rms >= this in every band (rms re-estimated after convolution)")
      ("maps.grid_band", po::value<int>()->default_value(0), "1-based band whose grid the maps use; 0 = the band with the largest beam")
      ("maps.enlarge_frac", po::value<double>()->default_value(0.02), "the common beam is the smallest ellipse containing every beam, axes enlarged by this fraction")
      // [output]
      ("output.name", po::value<std::string>()->default_value(""), "NAME of the output files")
      ("output.formats", po::value<std::string>()->default_value("csv,fits,vot"), "table formats, comma-separated: csv, fits, vot");
  return d;
}

std::vector<std::string> split(const std::string& s, char sep) {
  std::vector<std::string> out;
  std::string cur;
  std::istringstream in(s);
  while (std::getline(in, cur, sep)) {
    const auto a = cur.find_first_not_of(" \t"), b = cur.find_last_not_of(" \t");
    out.push_back(a == std::string::npos ? "" : cur.substr(a, b - a + 1));
  }
  return out;
}

double parse_double(const std::string& option, const std::string& text) {
  try {
    std::size_t used = 0;
    const double v = std::stod(text, &used);
    if (used != text.size()) throw std::invalid_argument(text);
    return v;
  } catch (const std::exception&) {
    throw UsageError(option + " = " + text + " is not a number");
  }
}

std::string sanitise(const std::string& s) {
  std::string o;
  for (char c : s) o += (std::isalnum(static_cast<unsigned char>(c)) || c == '-' || c == '_' || c == '.') ? c : '_';
  while (!o.empty() && o.back() == '_') o.pop_back();
  return o;
}

std::string fits_real(double v) {
  char b[64];
  std::snprintf(b, sizeof b, "%.15G", v);
  std::string s = b;
  if (s.find_first_of(".E") == std::string::npos) s += ".0";
  return s;
}

struct Geometry {
  double pixel_arcsec = 0.0;   // sqrt of the pixel area at the centre
  double beam_area_pix = 0.0;  // Omega_beam in pixels
};

Geometry centre_geometry(const SkyImage& im) {
  const auto g = local_geometry(*im.wcs, 0.5 * (im.pixels.cols() - 1), 0.5 * (im.pixels.rows() - 1));
  if (!g) throw InputError(im.path, "the image centre has no sky position");
  Geometry out;
  out.pixel_arcsec = std::sqrt(g->pixel_area_arcsec2);
  out.beam_area_pix = kGaussAreaFactor * im.beam.maj_arcsec * im.beam.min_arcsec / g->pixel_area_arcsec2;
  return out;
}

/// Column tag of a band: its frequency in MHz ("1400mhz", "1400p5mhz"), unique.
std::vector<std::string> band_tags(const std::vector<double>& freq_hz) {
  std::vector<std::string> tags;
  std::set<std::string> seen;
  for (double f : freq_hz) {
    char b[64];
    const double mhz = f / 1e6;
    if (std::abs(mhz - std::round(mhz)) < 1e-6) std::snprintf(b, sizeof b, "%.0fmhz", mhz);
    else std::snprintf(b, sizeof b, "%.3fmhz", mhz);
    std::string t = b;
    std::replace(t.begin(), t.end(), '.', 'p');
    std::string u = t;
    for (int k = 2; seen.count(u); ++k) u = t + "_" + std::to_string(k);
    seen.insert(u);
    tags.push_back(u);
  }
  return tags;
}

/// One component to measure: its position and intrinsic shape. `where` names the
/// catalogue (or image) and row in the message of a bad position. Unresolved
/// components (deconvolved sizes are upper limits) are measured as point sources.
ForcedSource forced_source(double ra_deg, double dec_deg, double intrinsic_maj, double intrinsic_min, double intrinsic_pa,
                           bool unresolved, const std::string& where, std::size_t row) {
  ForcedSource s;
  s.ra_deg = ra_deg;
  s.dec_deg = dec_deg;
  if (!std::isfinite(s.ra_deg) || !std::isfinite(s.dec_deg) || s.dec_deg < -90.0 || s.dec_deg > 90.0)
    throw InputError(where, "row " + std::to_string(row + 1) + ": ra_deg/dec_deg is not a sky position");
  if (!unresolved && std::isfinite(intrinsic_maj) && intrinsic_maj > 0.0) {
    s.intrinsic.maj = intrinsic_maj;
    s.intrinsic.min = (std::isfinite(intrinsic_min) && intrinsic_min > 0.0) ? std::min(intrinsic_min, intrinsic_maj) : 0.0;
    s.intrinsic.pa_deg = std::isfinite(intrinsic_pa) ? intrinsic_pa : 0.0;
  }
  return s;
}

/// The components to measure from a catalogue file: ra, dec and intrinsic shape.
std::vector<ForcedSource> read_components(const std::string& path) {
  const Table t = read_table(path);
  const Column* ra = t.find("ra_deg");
  const Column* dec = t.find("dec_deg");
  if (!ra || !dec) throw InputError(path, "has no ra_deg/dec_deg columns (ICRS degrees)");
  if (ra->type != ColumnType::Float64 || dec->type != ColumnType::Float64)
    throw InputError(path, "ra_deg/dec_deg columns are not numeric");
  const Column* mj = t.find("intrinsic_maj_arcsec");
  const Column* mn = t.find("intrinsic_min_arcsec");
  const Column* pa = t.find("intrinsic_pa_deg");
  const Column* info = t.find("info_bits");
  auto num = [](const Column* c, std::size_t i) {
    if (!c) return std::numeric_limits<double>::quiet_NaN();
    if (c->type == ColumnType::Float64) return c->f64[i];
    if (c->type == ColumnType::Int64) return static_cast<double>(c->i64[i]);
    return std::numeric_limits<double>::quiet_NaN();
  };
  std::vector<ForcedSource> out;
  for (std::size_t i = 0; i < t.rows(); ++i) {
    const bool unresolved = info && info->type == ColumnType::Int64 && (info->i64[i] & kInfoUnresolved);
    out.push_back(forced_source(ra->f64[i], dec->f64[i], num(mj, i), num(mn, i), num(pa, i), unresolved, path, i));
  }
  return out;
}

/// The detection: the extract job on `det_image` (read as `skerry extract` reads
/// it), its component, island and source tables written as CSV into `det_dir`
/// (NAME.detect.*.csv), and the components to measure in every band.
std::vector<ForcedSource> detect_components(const std::string& det_image, const ImageReadOptions& ro,
                                            const ExtractConfig& ec, const std::string& det_dir,
                                            const std::string& det_name, const Provenance& settings) {
  if (const std::string e = ec.islands.validate(); !e.empty()) throw UsageError("detect: " + e);
  // The detection's own run record (NAME.detect.run.json): its settings, input,
  // stage times and counts.
  RunRecord rec("extract");
  rec.set_configuration(std::map<std::string, std::string>(settings.begin(), settings.end()), "");
  StageTimer t_read(rec, "read");
  const SkyImage sky = read_sky_image(det_image, ro);
  check_extract_image(sky, ec);
  t_read.stop();
  ExtractHooks hooks;
  hooks.stage = [&rec](const std::string& stage, double seconds) {
    rec.add_stage(stage, seconds);
    stage_ended("detection " + stage, seconds);
  };
  hooks.stage_started = [](const std::string& stage) { stage_started("detection " + stage); };
  const ExtractResult r = run_extract_job(sky, ExtractInputs{}, ec, hooks);
  StageTimer t_write(rec, "write");
  const std::string sha = rec.add_input("image", det_image);
  Provenance meta = extract_provenance("skerry bands (detection)", sky, det_image, sha, r);
  meta.insert(meta.end(), settings.begin(), settings.end());
  std::error_code ec_dir;
  fs::create_directories(det_dir, ec_dir);
  if (ec_dir) throw OutputError(det_dir, "cannot create the folder: " + ec_dir.message());
  const fs::path d(det_dir);
  const std::string comps_path = (d / (det_name + ".components.csv")).string(),
                    islands_path = (d / (det_name + ".islands.csv")).string(),
                    sources_path = (d / (det_name + ".sources.csv")).string(),
                    run_path = (d / (det_name + ".run.json")).string();
  write_table(make_component_table(r.components, meta, sky.freq_hz), comps_path);
  write_table(make_island_table(r.islands, meta, sky.freq_hz), islands_path);
  write_table(make_source_table(r.sources, meta, sky.freq_hz, ExtractSettings{}.designation_prefix), sources_path);
  t_write.stop();
  rec.set_count("islands", static_cast<std::int64_t>(r.islands.size()));
  rec.set_count("components", static_cast<std::int64_t>(r.components.size()));
  rec.set_count("sources", static_cast<std::int64_t>(r.sources.size()));
  rec.set_count("components_fit_failed", r.components_fit_failed);
  rec.set_count("islands_too_small", r.islands_too_small);
  rec.set_count("noise_passes", r.noise_passes);
  rec.set_count("image_width", sky.pixels.cols());
  rec.set_count("image_height", sky.pixels.rows());
  rec.set_value("peak_snr_used", std::to_string(r.peak_snr_used));
  for (const auto& f : {comps_path, islands_path, sources_path, run_path}) rec.add_output(f);
  rec.write(run_path);
  std::vector<ForcedSource> out;
  for (std::size_t i = 0; i < r.components.size(); ++i) {
    const CatalogueComponent& c = r.components[i];
    out.push_back(forced_source(c.ra_deg, c.dec_deg, c.deconv_arcsec.maj, c.deconv_arcsec.min, c.deconv_arcsec.pa_deg,
                                (c.info_bits & kInfoUnresolved) != 0, det_image, i));
  }
  return out;
}

int run_bands(const std::vector<std::string>& args) {
  const po::options_description desc = bands_options();
  ParsedOptions parsed = parse_options("bands", "IMAGE1 IMAGE2 [...] [--out DIR] [options]", desc,
                                       {{"images", -1}}, args);
  if (parsed.help) return kExitOk;
  const auto& vm = parsed.vm;
  ThreadLimit threads(vm["threads"].as<int>());
  RunRecord record("bands");
  record.set_configuration(parsed.resolved, parsed.config_file);
  record.set_threads(threads.threads());

  // ---- configuration ------------------------------------------------------------
  const std::vector<std::string> paths =
      vm.count("images") ? vm["images"].as<std::vector<std::string>>() : std::vector<std::string>{};
  if (paths.size() < 2) throw UsageError("bands needs at least two images (one per band)");
  const std::size_t nb = paths.size();
  std::vector<double> freq_override(nb, 0.0);
  {
    const std::string f = vm["bands.freq_mhz"].as<std::string>();
    if (!f.empty()) {
      const auto parts = split(f, ',');
      if (parts.size() != nb)
        throw UsageError("bands.freq_mhz = " + f + " breaks 'one entry per image' (" + std::to_string(nb) + " images)");
      for (std::size_t b = 0; b < nb; ++b) {
        if (parts[b].empty()) continue;
        freq_override[b] = parse_double("bands.freq_mhz", parts[b]) * 1e6;
        require(freq_override[b] >= 0.0 && std::isfinite(freq_override[b]), "bands.freq_mhz", f, "frequencies >= 0");
      }
    }
  }
  std::vector<double> scale_frac(nb, 0.0);
  {
    const std::string f = vm["bands.flux_scale_frac"].as<std::string>();
    const auto parts = split(f, ',');
    if (parts.size() != 1 && parts.size() != nb)
      throw UsageError("bands.flux_scale_frac = " + f + " breaks 'one value or one per image'");
    for (std::size_t b = 0; b < nb; ++b) {
      scale_frac[b] = parse_double("bands.flux_scale_frac", parts[parts.size() == 1 ? 0 : b]);
      require(scale_frac[b] >= 0.0 && scale_frac[b] < 1.0, "bands.flux_scale_frac", f, "0 <= value < 1");
    }
  }
  const int detect_band = vm["detect.band"].as<int>();
  const std::string detect_mode = vm["detect.mode"].as<std::string>();
  if (detect_mode != "band" && detect_mode != "combined")
    throw UsageError("detect.mode = " + detect_mode + " breaks 'band or combined'");
  const bool combined = detect_mode == "combined" && vm["catalogue"].as<std::string>().empty();
  DetectionImageOptions dio;
  dio.alpha = vm["detect.assumed_spectral_index"].as<double>();
  require(std::isfinite(dio.alpha) && std::abs(dio.alpha) <= 10.0, "detect.assumed_spectral_index", std::to_string(dio.alpha),
          "|detect.assumed_spectral_index| <= 10");
  require(vm["detect.peak_snr"].as<double>() > 0.0, "detect.peak_snr", std::to_string(vm["detect.peak_snr"].as<double>()),
          "detect.peak_snr > 0");
  require(detect_band >= 0 && detect_band <= static_cast<int>(nb), "detect.band", std::to_string(detect_band),
          "0 <= detect.band <= number of images");
  const int grid_band_opt = vm["maps.grid_band"].as<int>();
  require(grid_band_opt >= 0 && grid_band_opt <= static_cast<int>(nb), "maps.grid_band",
          std::to_string(grid_band_opt), "0 <= maps.grid_band <= number of images");
  ForcedOptions fopt;
  fopt.detect_snr = vm["forced.detect_snr"].as<double>();
  fopt.limit_snr = vm["forced.limit_snr"].as<double>();
  fopt.fit_radius_sigma = vm["forced.fit_radius_sigma"].as<double>();
  fopt.blend_radius_sigma = vm["forced.blend_radius_sigma"].as<double>();
  require(fopt.detect_snr > 0.0, "forced.detect_snr", std::to_string(fopt.detect_snr), "forced.detect_snr > 0");
  require(fopt.limit_snr > 0.0, "forced.limit_snr", std::to_string(fopt.limit_snr), "forced.limit_snr > 0");
  require(fopt.fit_radius_sigma >= 1.0, "forced.fit_radius_sigma", std::to_string(fopt.fit_radius_sigma),
          "forced.fit_radius_sigma >= 1");
  fopt.max_shift_arcsec = vm["forced.max_shift_arcsec"].as<double>();
  require(fopt.max_shift_arcsec >= 0.0 && std::isfinite(fopt.max_shift_arcsec), "forced.max_shift_arcsec",
          std::to_string(fopt.max_shift_arcsec), "forced.max_shift_arcsec >= 0");
  require(fopt.blend_radius_sigma >= 0.0, "forced.blend_radius_sigma", std::to_string(fopt.blend_radius_sigma),
          "forced.blend_radius_sigma >= 0");
  const double map_snr = vm["maps.min_snr"].as<double>();
  require(map_snr > 0.0, "maps.min_snr", std::to_string(map_snr), "maps.min_snr > 0");
  CommonBeamOptions cbo;
  cbo.enlarge_frac = vm["maps.enlarge_frac"].as<double>();
  require(cbo.enlarge_frac > 0.0 && cbo.enlarge_frac < 1.0, "maps.enlarge_frac", std::to_string(cbo.enlarge_frac),
          "0 < maps.enlarge_frac < 1");
  const double box_beams = vm["noise.window_beams"].as<double>();
  bool fmt_csv = false, fmt_fits = false, fmt_vot = false;
  for (const auto& f : split(vm["output.formats"].as<std::string>(), ',')) {
    if (f == "csv") fmt_csv = true;
    else if (f == "fits") fmt_fits = true;
    else if (f == "vot") fmt_vot = true;
    else throw UsageError("output.formats = " + vm["output.formats"].as<std::string>() + " breaks 'csv, fits or vot'");
  }
  const std::string catalogue_path = vm["catalogue"].as<std::string>();

  // ---- read the bands ---------------------------------------------------------------
  StageTimer t_read(record, "read");
  std::vector<SkyImage> bands;
  for (std::size_t b = 0; b < nb; ++b) {
    ImageReadOptions ro;
    ro.accept_any_bunit = vm["bands.accept_bunit"].as<bool>();
    ro.accept_bunit_option = "bands.accept_bunit";
    ro.beam_option = "";
    ro.freq_option = "bands.freq_mhz";
    if (freq_override[b] > 0.0) ro.freq_hz_override = freq_override[b];
    ro.require_beam = true;  // a band without a beam cannot be modelled: InputError naming the file
    bands.push_back(read_sky_image(paths[b], ro));
    SkyImage& im = bands.back();
    if (!im.beam.valid()) throw InputError(im.path, "the restoring beam is missing or degenerate (BMAJ/BMIN/BPA)");
    if (!(im.freq_hz > 0.0) || !std::isfinite(im.freq_hz))
      throw InputError(im.path, "no observing frequency in the header (frequency axis or keyword); give bands.freq_mhz");
    record.add_input("image", im.path);
  }
  for (std::size_t a = 0; a < nb; ++a)
    for (std::size_t b = a + 1; b < nb; ++b)
      if (std::abs(bands[a].freq_hz - bands[b].freq_hz) <= 1e-9 * bands[a].freq_hz)
        throw InputError(bands[b].path, "has the same frequency (" + fits_real(bands[b].freq_hz / 1e6) +
                                            " MHz) as " + bands[a].path + "; the bands must differ in frequency");
  for (std::size_t b = 1; b < nb; ++b) {
    const auto& r = bands[0];
    const auto& s = bands[b];
    const double f1 = overlap_fraction(s.pixels.cols(), s.pixels.rows(), *s.wcs, *r.wcs, r.pixels.cols(), r.pixels.rows());
    const double f2 = overlap_fraction(r.pixels.cols(), r.pixels.rows(), *r.wcs, *s.wcs, s.pixels.cols(), s.pixels.rows());
    if (f1 <= 0.0 && f2 <= 0.0)
      throw InputError(s.path, "does not overlap " + r.path + " on the sky (bands of different fields?)");
  }
  std::string name = vm["output.name"].as<std::string>();
  if (name.empty()) name = sanitise(bands[0].object);
  if (name.empty()) name = sanitise(fs::path(paths[0]).stem().string());
  if (name.empty()) name = "field";
  std::string out_dir = vm["out"].as<std::string>();
  if (out_dir.empty()) out_dir = (fs::path("outputs") / name).string();
  t_read.stop();

  std::vector<double> freq(nb);
  std::vector<Geometry> geom(nb);
  for (std::size_t b = 0; b < nb; ++b) {
    freq[b] = bands[b].freq_hz;
    geom[b] = centre_geometry(bands[b]);
  }

  // ---- noise maps per band (modules/background); the background is subtracted --
  StageTimer t_noise(record, "noise");
  std::vector<ImageF> rms(nb);
  for (std::size_t b = 0; b < nb; ++b) {
    BackgroundOptions bo;
    bo.beam_area_pix = geom[b].beam_area_pix;
    bo.box_beams = box_beams;
    if (const std::string e = bo.validate(); !e.empty()) throw UsageError("noise: " + e);
    BackgroundResult r = estimate_background(bands[b].pixels, bo);
    if (r.status == BackgroundStatus::no_data)
      throw NoDataError(bands[b].path, "no box of the noise grid has enough unblanked pixels: " + r.message);
    if (r.status == BackgroundStatus::zero_rms)
      throw NoDataError(bands[b].path, "the noise rms is zero everywhere (a constant or noiseless image?)");
    bands[b].pixels -= r.maps.background_image();
    rms[b] = r.maps.rms_image();
  }
  t_noise.stop();

  // ---- common resolution (the combined detection image and the maps) ---------------
  // Every band regridded onto the grid of band g (Jy/beam, no pixel-area factor),
  // convolved to the common beam, and its rms re-estimated after convolution.
  struct CommonResolution {
    bool done = false;
    Beam beam;
    std::size_t g = 0;
    std::vector<ImageF> conv, crms;
  } cr;
  auto make_common = [&] {
    if (cr.done) return;
    StageTimer t_common(record, "common_resolution");
    std::vector<Beam> beams;
    for (const auto& im : bands) beams.push_back(im.beam);
    cr.beam = common_beam(beams, cbo);
    if (grid_band_opt > 0) {
      cr.g = static_cast<std::size_t>(grid_band_opt - 1);
    } else {
      double best = -1.0;
      for (std::size_t b = 0; b < nb; ++b) {
        const double area = bands[b].beam.maj_arcsec * bands[b].beam.min_arcsec;
        if (area > best) {
          best = area;
          cr.g = b;
        }
      }
    }
    const SkyImage& grid = bands[cr.g];
    const long gx = grid.pixels.cols(), gy = grid.pixels.rows();
    const Geometry gg = centre_geometry(grid);
    cr.conv.assign(nb, ImageF());
    cr.crms.assign(nb, ImageF());
    for (std::size_t b = 0; b < nb; ++b) {
      // Regrid (Jy/beam, no pixel-area factor) then convolve to the common beam.
      ImageF on = (b == cr.g) ? bands[b].pixels : reproject(bands[b].pixels, *bands[b].wcs, *grid.wcs, gx, gy);
      cr.conv[b] = convolve_to_beam(on, *grid.wcs, bands[b].beam, cr.beam).image;
      // The rms changes with convolution: re-estimate it on the convolved map.
      BackgroundOptions bo;
      bo.beam_area_pix = kGaussAreaFactor * cr.beam.maj_arcsec * cr.beam.min_arcsec / (gg.pixel_arcsec * gg.pixel_arcsec);
      bo.box_beams = box_beams;
      BackgroundResult r = estimate_background(cr.conv[b], bo);
      if (r.status == BackgroundStatus::no_data)
        throw NoDataError(paths[b], "no unblanked pixels on the common grid (band " + std::to_string(cr.g + 1) + "'s)");
      if (r.status == BackgroundStatus::zero_rms)
        throw NoDataError(paths[b], "the noise rms is zero on the common grid (a constant or noiseless image?)");
      cr.crms[b] = r.maps.rms_image();
    }
    cr.done = true;
  };
  auto common_cards = [&] {
    return std::vector<std::pair<std::string, std::string>>{{"BMAJ", fits_real(cr.beam.maj_arcsec / 3600.0)},
                                                            {"BMIN", fits_real(cr.beam.min_arcsec / 3600.0)},
                                                            {"BPA", fits_real(cr.beam.pa_deg)}};
  };

  // ---- components -------------------------------------------------------------------
  StageTimer t_cat(record, "catalogue");
  std::vector<ForcedSource> comps;
  int det_band = 0;  // 1-based, 0 = user catalogue
  if (!catalogue_path.empty()) {
    comps = read_components(catalogue_path);
    record.add_input("catalogue", table_file_path(catalogue_path));
  } else {
    det_band = combined ? 0 : detect_band;
    if (det_band == 0 && !combined) {
      double best = std::numeric_limits<double>::infinity();
      for (std::size_t b = 0; b < nb; ++b) {
        const double area = bands[b].beam.maj_arcsec * bands[b].beam.min_arcsec;
        if (area < best) {
          best = area;
          det_band = static_cast<int>(b) + 1;
        }
      }
    }
    const std::string det_dir = (fs::path(out_dir) / (name + ".detect")).string();
    // The detection image is read as `skerry extract` reads an image; the job runs
    // with extract's defaults and the settings below (recorded in the tables' meta).
    std::string det_image;
    ImageReadOptions det_read;
    det_read.require_beam = true;
    ExtractConfig ec;
    ec.islands.peak_snr = vm["detect.peak_snr"].as<double>();
    ec.render_model = false;
    Provenance settings{{"cfg_detect_peak_snr", fits_real(ec.islands.peak_snr)}};
    if (combined) {
      make_common();
      std::vector<const ImageF*> ims, rmss;
      for (std::size_t b = 0; b < nb; ++b) {
        ims.push_back(&cr.conv[b]);
        rmss.push_back(&cr.crms[b]);
      }
      const DetectionImageResult d = combined_detection_image(ims, rmss, std::vector<double>(nb, 0.0), freq, dio);
      if (d.n_pixels == 0) throw NoDataError(paths[cr.g], "the combined detection image has no pixel with a value");
      double log_ref = 0.0;
      for (double f : freq) log_ref += std::log(f) / static_cast<double>(nb);
      auto cards = common_cards();
      cards.push_back({"DETALPHA", fits_real(dio.alpha)});
      cards.push_back({"DETKIND", "'matched SNR: sum a I/s^2 / sqrt(sum a^2/s^2)'"});
      fs::create_directories(det_dir);
      det_image = (fs::path(det_dir) / (name + ".detect_snr_map.fits")).string();
      write_fits_image(det_image, d.snr, bands[cr.g], "", cards);
      // D is N(0,1) on empty sky: no background or rms to estimate.
      ec.fixed_rms = 1.0;
      ec.fixed_background = 0.0;
      det_read.accept_any_bunit = true;
      det_read.freq_hz_override = std::exp(log_ref) / 1e6 * 1e6;
      settings.push_back({"cfg_noise_fixed_rms", "1"});
      settings.push_back({"cfg_noise_fixed_background", "0"});
      record.set_value("detection_n_partial_pixels", std::to_string(d.n_partial));
    } else {
      det_image = paths[det_band - 1];
      if (freq_override[det_band - 1] > 0.0) det_read.freq_hz_override = freq_override[det_band - 1] / 1e6 * 1e6;
      det_read.accept_any_bunit = vm["bands.accept_bunit"].as<bool>();
      det_read.accept_bunit_option = "bands.accept_bunit";
      det_read.beam_option = "";
      det_read.freq_option = "bands.freq_mhz";
    }
    if (det_read.freq_hz_override)
      settings.push_back({"cfg_image_freq_mhz", fits_real(*det_read.freq_hz_override / 1e6)});
    comps = detect_components(det_image, det_read, ec, det_dir, name + ".detect", settings);
  }
  t_cat.stop();

  // ---- forced measurement in every band's own grid ------------------------------------
  StageTimer t_forced(record, "forced");
  std::vector<std::vector<ForcedMeasurement>> meas(nb);
  for (std::size_t b = 0; b < nb; ++b) {
    ForcedOptions o = fopt;
    o.flux_scale_frac = scale_frac[b];
    meas[b] = forced_measure(bands[b].pixels, rms[b], 0.0, *bands[b].wcs, bands[b].beam, comps, o);
  }
  t_forced.stop();

  // ---- spectra ---------------------------------------------------------------------------
  StageTimer t_spec(record, "spectra");
  SpectraOptions so;
  so.detect_snr = fopt.detect_snr;
  so.limit_snr = fopt.limit_snr;
  std::vector<std::vector<BandFlux>> per(comps.size());
  for (std::size_t i = 0; i < comps.size(); ++i)
    for (std::size_t b = 0; b < nb; ++b) {
      const ForcedMeasurement& m = meas[b][i];
      per[i].push_back({freq[b], m.flux_jy, m.flux_err_jy, m.rms_flux_jy, scale_frac[b]});
    }
  const std::vector<SpectrumResult> spec = fit_spectra(per, so);
  t_spec.stop();

  // ---- tables ------------------------------------------------------------------------------
  StageTimer t_write(record, "write_tables");
  const auto tags = band_tags(freq);
  std::vector<std::pair<std::string, std::string>> meta{
      {"tool", "skerry bands"},
      {"convention_spectral_index", "S proportional to nu^alpha (steep spectra negative)"},
      {"convention_logarithms", "natural; curvature q of ln S = ln S0 + alpha0 ln(nu/nu0) + q ln(nu/nu0)^2; base-10 c2 = q ln 10"},
      {"convention_ref_freq", "nu0 = weighted logarithmic mean frequency of the detected bands, w = (S/sigma)^2"},
      {"convention_flux_scale", "fractional flux-scale error per band added in quadrature, independent between bands"},
      {"convention_limits", "a band with fitted peak < forced.detect_snr x local rms gives an upper limit forced.limit_snr x rms; limits are never logged"},
      {"convention_positions", "ICRS degrees; pixel columns *_pix1 are 1-based FITS pixels"},
      {"detection", combined ? ("combined matched SNR image of all bands (assumed spectral index " + fits_real(dio.alpha) +
                                ", grid of band " + std::to_string(cr.g + 1) + ", common beam) via skerry extract")
                    : det_band ? ("band " + std::to_string(det_band) + " (" + paths[det_band - 1] + ") via skerry extract")
                               : ("user catalogue " + catalogue_path)}};
  for (std::size_t b = 0; b < nb; ++b) {
    meta.push_back({"band" + std::to_string(b + 1) + "_file", paths[b]});
    meta.push_back({"band" + std::to_string(b + 1) + "_freq_mhz", fits_real(freq[b] / 1e6)});
    meta.push_back({"band" + std::to_string(b + 1) + "_beam_arcsec",
                    fits_real(bands[b].beam.maj_arcsec) + "," + fits_real(bands[b].beam.min_arcsec) + "," +
                        fits_real(bands[b].beam.pa_deg)});
    meta.push_back({"band" + std::to_string(b + 1) + "_flux_scale_frac", fits_real(scale_frac[b])});
  }
  const std::size_t n = comps.size();
  const bool shift_on = fopt.max_shift_arcsec > 0.0;  // the shift columns appear only then
  std::vector<std::string> written;
  auto write_all = [&](Table& t, const std::string& stem) {
    t.meta = meta;
    t.check_consistent();
    if (fmt_csv) { write_table(t, (fs::path(out_dir) / (stem + ".csv")).string()); written.push_back(stem + ".csv"); }
    if (fmt_fits) { write_table(t, (fs::path(out_dir) / (stem + ".fits")).string()); written.push_back(stem + ".fits"); }
    if (fmt_vot) { write_table(t, (fs::path(out_dir) / (stem + ".vot")).string()); written.push_back(stem + ".vot"); }
  };
  fs::create_directories(out_dir);
  {
    Table t;
    t.name = "spectra";
    std::vector<std::int64_t> id(n);
    std::vector<double> ra(n), dec(n);
    for (std::size_t i = 0; i < n; ++i) {
      id[i] = static_cast<std::int64_t>(i) + 1;
      ra[i] = comps[i].ra_deg;
      dec[i] = comps[i].dec_deg;
    }
    t.add_i64("component_id", "", "meta.id;meta.main", "1-based row of the component in the detection catalogue", id);
    t.add_f64("ra_deg", "deg", "pos.eq.ra;meta.main", "Right ascension (ICRS) where the bands were measured", ra);
    t.add_f64("dec_deg", "deg", "pos.eq.dec;meta.main", "Declination (ICRS) where the bands were measured", dec);
    for (std::size_t b = 0; b < nb; ++b) {
      std::vector<double> s(n), e(n), u(n);
      std::vector<std::int64_t> d(n);
      for (std::size_t i = 0; i < n; ++i) {
        s[i] = meas[b][i].flux_jy;
        e[i] = meas[b][i].flux_err_total_jy;
        u[i] = meas[b][i].upper_limit_jy;
        d[i] = meas[b][i].detected ? 1 : 0;
      }
      const std::string fmhz = fits_real(freq[b] / 1e6) + " MHz";
      t.add_f64("s_" + tags[b] + "_jy", "Jy", "phot.flux.density;em.radio", "Forced integrated flux density at " + fmhz + " (may be <= 0)", s);
      t.add_f64("s_" + tags[b] + "_err_jy", "Jy", "stat.error;phot.flux.density", "1-sigma error at " + fmhz + ", flux-scale term included", e);
      t.add_f64("ulim_" + tags[b] + "_jy", "Jy", "phot.flux.density;stat.max", "Upper limit at " + fmhz + " (forced.limit_snr x local rms)", u);
      t.add_i64("det_" + tags[b], "", "meta.code", "1 when detected at " + fmhz + " (else use the upper limit)", d);
      if (shift_on) {
        std::vector<double> se(n), sn(n), see(n), sne(n);
        std::vector<std::int64_t> sb(n);
        for (std::size_t i = 0; i < n; ++i) {
          const ForcedMeasurement& m = meas[b][i];
          se[i] = m.shift_east_arcsec;
          sn[i] = m.shift_north_arcsec;
          see[i] = m.shift_east_err_arcsec;
          sne[i] = m.shift_north_err_arcsec;
          sb[i] = (m.flags & kForcedShiftAtBound) ? 1 : 0;
        }
        t.add_f64("shift_" + tags[b] + "_east_arcsec", "arcsec", "pos.eq.ra;arith.diff", "Fitted centre shift at " + fmhz + ": delta RA cos(Dec) (0 = centre kept fixed)", se);
        t.add_f64("shift_" + tags[b] + "_east_err_arcsec", "arcsec", "stat.error", "1-sigma error of the east shift (NaN = centre kept fixed)", see);
        t.add_f64("shift_" + tags[b] + "_north_arcsec", "arcsec", "pos.eq.dec;arith.diff", "Fitted centre shift at " + fmhz + ": delta Dec", sn);
        t.add_f64("shift_" + tags[b] + "_north_err_arcsec", "arcsec", "stat.error", "1-sigma error of the north shift", sne);
        t.add_i64("shift_" + tags[b] + "_at_bound", "", "meta.code.qual", "1 when the shift reached forced.max_shift_arcsec on a pixel axis", sb);
      }
    }
    auto col = [&](auto f) {
      std::vector<double> v(n);
      for (std::size_t i = 0; i < n; ++i) v[i] = f(spec[i]);
      return v;
    };
    t.add_f64("alpha", "", "spect.index", "Power-law spectral index, S ~ nu^alpha, weighted least squares in ln S over the detected bands", col([](const SpectrumResult& r) { return r.alpha; }));
    t.add_f64("alpha_err", "", "stat.error;spect.index", "1-sigma error of alpha (flux-scale terms included)", col([](const SpectrumResult& r) { return r.alpha_err; }));
    t.add_f64("ref_freq_mhz", "MHz", "em.freq", "Reference frequency nu0: weighted logarithmic mean of the detected bands", col([](const SpectrumResult& r) { return r.ref_freq_hz / 1e6; }));
    t.add_f64("s_ref_jy", "Jy", "phot.flux.density;em.radio", "Power-law flux density at nu0", col([](const SpectrumResult& r) { return r.flux_ref_jy; }));
    t.add_f64("s_ref_err_jy", "Jy", "stat.error;phot.flux.density", "1-sigma error of s_ref_jy", col([](const SpectrumResult& r) { return r.flux_ref_err_jy; }));
    t.add_f64("chi2_powerlaw", "", "stat.fit.chi2", "chi-square of the power law (NaN with 2 bands)", col([](const SpectrumResult& r) { return r.chi2_power_law; }));
    t.add_i64("dof_powerlaw", "", "stat.fit.dof", "degrees of freedom of the power law (detected bands - 2)", [&] { std::vector<std::int64_t> v(n); for (std::size_t i = 0; i < n; ++i) v[i] = spec[i].dof_power_law; return v; }());
    t.add_f64("alpha_curved", "", "spect.index", "Local index at nu0 from the log-parabola (>= 3 detected bands)", col([](const SpectrumResult& r) { return r.curv_alpha0; }));
    t.add_f64("alpha_curved_err", "", "stat.error;spect.index", "1-sigma error of alpha_curved", col([](const SpectrumResult& r) { return r.curv_alpha0_err; }));
    t.add_f64("curv_q", "", "spect.index;arith.diff", "Log-parabola curvature q (natural logarithms; base-10 curvature = q ln 10)", col([](const SpectrumResult& r) { return r.curv_q; }));
    t.add_f64("curv_q_err", "", "stat.error", "1-sigma error of curv_q", col([](const SpectrumResult& r) { return r.curv_q_err; }));
    t.add_f64("chi2_curved", "", "stat.fit.chi2", "chi-square of the log-parabola (NaN with 3 bands)", col([](const SpectrumResult& r) { return r.chi2_curved; }));
    t.add_f64("alpha_ulim", "", "spect.index;stat.max", "alpha is below this (one detection and a limit band at higher frequency)", col([](const SpectrumResult& r) { return r.alpha_upper_limit; }));
    t.add_f64("alpha_llim", "", "spect.index;stat.min", "alpha is above this (one detection and a limit band at lower frequency)", col([](const SpectrumResult& r) { return r.alpha_lower_limit; }));
    std::vector<std::int64_t> nd(n), nl(n), fl(n);
    std::vector<std::string> st(n);
    for (std::size_t i = 0; i < n; ++i) {
      nd[i] = spec[i].n_detected;
      nl[i] = spec[i].n_limits;
      fl[i] = spec[i].flags;
      st[i] = to_string(spec[i].status);
    }
    t.add_i64("n_detected", "", "meta.number", "Bands in which the component is detected (used in the fits)", nd);
    t.add_i64("n_limits", "", "meta.number", "Bands that give an upper limit", nl);
    t.add_text("spec_status", "", "meta.code.status", "fitted | limit_only | no_data", st);
    t.add_i64("spec_flags", "", "meta.code.qual", "Bitmask: 1 has_limits (some bands are upper limits), 2 poor_power_law (p < 0.001), 4 curvature_fitted, 8 limit_conflict (a limit below the power law), 16 invalid_band (a band without a value)", fl);
    write_all(t, name + ".spectra");
  }
  {
    Table t;
    t.name = "forced";
    const std::size_t rows = n * nb;
    std::vector<std::int64_t> id(rows), band(rows), det(rows), grp(rows), gsz(rows), flg(rows);
    std::vector<double> fq(rows), xp(rows), yp(rows), pk(rows), pke(rows), s(rows), se(rows), st(rows), rm(rows), ul(rows),
        cmj(rows), cmn(rows), cpa(rows);
    for (std::size_t i = 0; i < n; ++i)
      for (std::size_t b = 0; b < nb; ++b) {
        const std::size_t r = i * nb + b;
        const ForcedMeasurement& m = meas[b][i];
        id[r] = static_cast<std::int64_t>(i) + 1;
        band[r] = static_cast<std::int64_t>(b) + 1;
        fq[r] = freq[b] / 1e6;
        xp[r] = m.x + 1.0;
        yp[r] = m.y + 1.0;
        pk[r] = m.peak_jy_per_beam;
        pke[r] = m.peak_err_jy_per_beam;
        s[r] = m.flux_jy;
        se[r] = m.flux_err_jy;
        st[r] = m.flux_err_total_jy;
        rm[r] = m.rms_jy_per_beam;
        ul[r] = m.upper_limit_jy;
        det[r] = m.detected ? 1 : 0;
        grp[r] = m.group >= 0 ? m.group + 1 : 0;
        gsz[r] = m.group_size;
        flg[r] = m.flags;
        cmj[r] = m.convolved_maj_arcsec;
        cmn[r] = m.convolved_min_arcsec;
        cpa[r] = m.convolved_pa_deg;
      }
    t.add_i64("component_id", "", "meta.id", "1-based row of the component in the detection catalogue", id);
    t.add_i64("band", "", "meta.id", "1-based band (order of the images on the command line)", band);
    t.add_f64("freq_mhz", "MHz", "em.freq", "Observing frequency of the band", fq);
    t.add_f64("x_pix1", "pix", "pos.cartesian.x", "Position in the band's own grid, FITS 1-based", xp);
    t.add_f64("y_pix1", "pix", "pos.cartesian.y", "Position in the band's own grid, FITS 1-based", yp);
    t.add_f64("peak_jy_per_beam", "Jy/beam", "phot.flux.density;stat.max", "Fitted amplitude of the fixed-shape model", pk);
    t.add_f64("peak_err_jy_per_beam", "Jy/beam", "stat.error", "1-sigma error of the amplitude (beam-correlated noise, sandwich form)", pke);
    t.add_f64("s_jy", "Jy", "phot.flux.density;em.radio", "Integrated flux density = peak x (maj min)/(bmaj bmin) (may be <= 0)", s);
    t.add_f64("s_err_jy", "Jy", "stat.error;phot.flux.density", "Statistical 1-sigma error of s_jy", se);
    t.add_f64("s_err_total_jy", "Jy", "stat.error;phot.flux.density", "Error with the flux-scale term in quadrature", st);
    t.add_f64("rms_jy_per_beam", "Jy/beam", "stat.stdev;phot.flux.density", "Local rms at the position", rm);
    t.add_f64("ulim_jy", "Jy", "phot.flux.density;stat.max", "Upper limit forced.limit_snr x rms on the flux scale of the shape", ul);
    t.add_i64("detected", "", "meta.code", "1 when peak >= forced.detect_snr x rms", det);
    t.add_f64("model_maj_arcsec", "arcsec", "phys.angSize.smajAxis", "Model FWHM: intrinsic shape convolved with this band's beam", cmj);
    t.add_f64("model_min_arcsec", "arcsec", "phys.angSize.sminAxis", "Model minor FWHM", cmn);
    t.add_f64("model_pa_deg", "deg", "pos.posAng", "Model PA east of north", cpa);
    t.add_i64("blend_group_id", "", "meta.id", "Blend group (components fitted together; 1-based id of its first member; 0 = none)", grp);
    t.add_i64("blend_group_members", "", "meta.number", "Number of components in the blend group", gsz);
    t.add_i64("forced_flags", "", "meta.code.qual", "Bitmask: no value: 1 off_image (outside or blank), 2 masked, 4 degenerate_blend; caveat: 8 footprint_clipped (edge or blank), 16 shift_failed (fixed values kept), 32 shift_at_bound; information: 64 not_detected (use the upper limit), 128 joint_fit (fitted with its blend group), 256 blend_split", flg);
    if (shift_on) {
      std::vector<double> sh_e(rows), sh_n(rows), sh_ee(rows), sh_ne(rows);
      for (std::size_t i = 0; i < n; ++i)
        for (std::size_t b = 0; b < nb; ++b) {
          const ForcedMeasurement& m = meas[b][i];
          const std::size_t r = i * nb + b;
          sh_e[r] = m.shift_east_arcsec;
          sh_n[r] = m.shift_north_arcsec;
          sh_ee[r] = m.shift_east_err_arcsec;
          sh_ne[r] = m.shift_north_err_arcsec;
        }
      t.add_f64("shift_east_arcsec", "arcsec", "pos.eq.ra;arith.diff", "Fitted centre shift delta RA cos(Dec) (0 = centre kept fixed)", sh_e);
      t.add_f64("shift_east_err_arcsec", "arcsec", "stat.error", "1-sigma error of the east shift (NaN = centre kept fixed)", sh_ee);
      t.add_f64("shift_north_arcsec", "arcsec", "pos.eq.dec;arith.diff", "Fitted centre shift delta Dec", sh_n);
      t.add_f64("shift_north_err_arcsec", "arcsec", "stat.error", "1-sigma error of the north shift", sh_ne);
    }
    write_all(t, name + ".forced");
  }
  t_write.stop();

  // ---- common resolution and the spectral index map --------------------------------------
  long map_pixels = 0;
  if (vm["maps.enabled"].as<bool>()) {
    make_common();
    StageTimer t_maps(record, "maps");
    const Beam& common = cr.beam;
    const std::size_t g = cr.g;
    const SkyImage& grid = bands[g];
    const std::vector<ImageF>& conv = cr.conv;
    const std::vector<ImageF>& crms = cr.crms;
    SpixMapOptions mo;
    mo.min_snr = map_snr;
    std::vector<const ImageF*> ims, rmss;
    for (std::size_t b = 0; b < nb; ++b) {
      ims.push_back(&conv[b]);
      rmss.push_back(&crms[b]);
    }
    const SpixMapResult sm = spectral_index_map(ims, rmss, std::vector<double>(nb, 0.0), freq, scale_frac, mo);
    map_pixels = sm.n_pixels;
    const std::vector<std::pair<std::string, std::string>> cards{
        {"BMAJ", fits_real(common.maj_arcsec / 3600.0)},
        {"BMIN", fits_real(common.min_arcsec / 3600.0)},
        {"BPA", fits_real(common.pa_deg)},
        {"SPIXCONV", "'S proportional to nu^alpha'"},
        {"SPIXSNR", fits_real(map_snr)}};
    write_fits_image((fs::path(out_dir) / (name + ".alpha_map.fits")).string(), sm.alpha, grid, "", cards);
    write_fits_image((fs::path(out_dir) / (name + ".alpha_err_map.fits")).string(), sm.alpha_err, grid, "", cards);
    written.push_back(name + ".alpha_map.fits");
    written.push_back(name + ".alpha_err_map.fits");
    record.set_value("common_beam_arcsec", fits_real(common.maj_arcsec) + "," + fits_real(common.min_arcsec) + "," +
                                               fits_real(common.pa_deg));
    record.set_value("map_grid_band", std::to_string(g + 1));
  }

  // ---- run record ---------------------------------------------------------------------------
  std::int64_t n_fitted = 0, n_curved = 0;
  for (const auto& s : spec) {
    n_fitted += s.status == SpectrumStatus::Fitted;
    n_curved += (s.flags & kSpecCurvatureFitted) ? 1 : 0;
  }
  record.set_count("bands", static_cast<std::int64_t>(nb));
  record.set_count("components", static_cast<std::int64_t>(n));
  record.set_count("spectra_fitted", n_fitted);
  record.set_count("spectra_curved", n_curved);
  record.set_count("map_pixels", map_pixels);
  record.set_value("detection_band", std::to_string(det_band));
  record.set_value("detection", combined ? "combined" : det_band ? "band" : "catalogue");
  for (const auto& w : written) record.add_output((fs::path(out_dir) / w).string());
  const std::string run_path = (fs::path(out_dir) / (name + ".run.json")).string();
  record.add_output(run_path);
  record.write(run_path);
  char line[512];
  std::snprintf(line, sizeof line, "bands %s: %zu bands, %zu components, %lld spectra fitted, %ld map pixels -> %s\n",
                name.c_str(), nb, n, static_cast<long long>(n_fitted), map_pixels, out_dir.c_str());
  say(line);
  return kExitOk;
}

const CommandRegistrar kRegistrar{"bands", "images of one field in several bands -> forced flux densities, spectra, spectral index map",
                                  &run_bands};

}  // namespace
}  // namespace skerry
