// `skerry stack IMAGE [IMAGE ...] --catalogue FILE --out DIR`: median stacking
// of images at the positions of a catalogue.
//
// For every image (one per band, each stacked on its own):
//   read    the image as `skerry extract` reads it (BUNIT conversions, beam,
//           frequency; io/fits_image.h); an rms map given with noise.rms_map
//   noise   the background and rms maps of extract's noise stage
//           (extract_job.h run_noise_stage: the same options and defaults,
//           two passes, the second with the first pass's islands masked); the
//           background is subtracted
//   stack   modules/forced forced_at_positions: a point-source forced value at
//           each position and the pixel-wise median of cut-outs of
//           (image - background) sampled at the exact sub-pixel positions; the
//           stacked flux density is the amplitude of the beam fitted at the
//           stack's centre (S = peak for a point source), its error from the
//           robust rms (1.4826 MAD) of the stack beyond stack.rms_inner_beams
//           beam FWHMs, with the beam-correlated noise (forced.h).
// Positions come from any table format the project reads (io/table_io.h), their
// columns found by the shared finder (io/sky_columns.h) that `skerry match` uses.
//
// Outputs (NAME = output.name, default the catalogue file's stem), all staged
// and moved into DIR together (io/atomic_file.h StagedOutputs):
//   NAME.stack_K.fits           the median stack of image K (1-based, command-line
//                               order) [Jy/beam] on a tangent-plane (TAN) grid with
//                               the image's pixel axes and pixel size at its
//                               centre, reference pixel at the stack centre and
//                               reference value (0, 0): the coordinates are offsets
//                               from the stacked positions (FITS WCS Papers I-II,
//                               Greisen & Calabretta 2002, Calabretta & Greisen
//                               2002; REF-FITS-04)
//   NAME.stack.{csv,fits,vot}   one row per image (output.formats)
//   NAME.run.json               run record
#include <algorithm>
#include <cctype>
#include <cmath>
#include <cstdio>
#include <filesystem>
#include <iostream>
#include <limits>
#include <optional>
#include <sstream>
#include <string>
#include <vector>

#include "app/command.h"
#include "app/errors.h"
#include "app/options.h"
#include "app/run_record.h"
#include "app/version.h"
#include "extract/extract_job.h"
#include "extract/extract_settings.h"
#include "io/atomic_file.h"
#include "io/fits_image.h"
#include "io/sky_columns.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "skerry/constants.h"
#include "skerry/forced.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;

po::options_description stack_options() {
  const BackgroundOptions bg{};
  const StackOptions so{};
  po::options_description d("stack options (options are SECTION.KEY; in a config file, KEY goes under [SECTION])");
  d.add_options()
      ("images", po::value<std::vector<std::string>>()->multitoken(), "input FITS images (Jy/beam); each is stacked on its own (one per band)")
      ("catalogue", po::value<std::string>()->default_value(""), "the positions to stack at: a table (.csv, .fits, .vot/.xml incl. BINARY/BINARY2, .ecsv); FILE[SEL] picks one TABLE of a VOTable")
      ("out", po::value<std::string>()->default_value(""), "output folder (default: outputs/NAME)")
      // [positions]
      ("positions.ra_column", po::value<std::string>()->default_value(""), "RA (or Galactic longitude) column of the catalogue; empty = found by UCD pos.eq.ra or names like ra_deg, ra, RAJ2000")
      ("positions.dec_column", po::value<std::string>()->default_value(""), "Dec (or Galactic latitude) column; empty = found by UCD pos.eq.dec or names like dec_deg, dec, DEJ2000")
      ("positions.frame", po::value<std::string>()->default_value("auto"), "frame of the position columns: auto (equatorial columns, else Galactic), icrs or galactic")
      // [image]
      ("image.freq_mhz", po::value<std::string>()->default_value(""), "observing frequencies [MHz], comma-separated, one per image; empty or 0 entries = from the header")
      ("image.accept_bunit", po::value<bool>()->default_value(false), "accept a BUNIT skerry does not convert (Jy/beam, K and Jy/pixel are converted) and take the values as Jy/beam, no conversion")
      // [noise]
      ("noise.window_beams", po::value<double>()->default_value(bg.box_beams), "side of the window over which each background/rms statistic is taken [beams]")
      ("noise.window_pixels", po::value<int>()->default_value(0), "window side [pixels]; overrides noise.window_beams when > 0")
      ("noise.grid_spacing_beams", po::value<double>()->default_value(bg.step_beams), "spacing of the grid of window centres [beams]; 0 = the window side (windows tile the image)")
      ("noise.clip_sigma", po::value<double>()->default_value(bg.clip_sigma), "sigma-clipping level k (>= 2: iterated clipping collapses below about 1.8)")
      ("noise.second_pass", po::value<bool>()->default_value(true), "re-estimate the maps with the first pass's islands masked")
      ("noise.mask_margin_beams", po::value<double>()->default_value(1.0), "margin grown around islands for the second pass [beams]")
      ("noise.rms_map", po::value<std::string>()->default_value(""), "user rms maps (FITS, each on its image's grid, Jy/beam), comma-separated, one per image; empty entries = estimate")
      // [stack]
      ("stack.half_size_pix", po::value<int>()->default_value(so.half_size_pix), "half side of the stacked cut-out [pixels]; the stack is 2 N + 1 pixels wide; 0 = 3 beam FWHMs (major axis)")
      ("stack.rms_inner_beams", po::value<double>()->default_value(so.rms_inner_beams), "the stack's rms is measured on its pixels at least this many beam FWHMs (major axis) from the centre")
      // [output]
      ("output.name", po::value<std::string>()->default_value(""), "NAME of the output files; default: the catalogue file's stem")
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

double parse_number(const std::string& option, const std::string& text) {
  try {
    std::size_t used = 0;
    const double v = std::stod(text, &used);
    if (used != text.size() || !std::isfinite(v)) throw std::invalid_argument(text);
    return v;
  } catch (const std::exception&) {
    throw UsageError(option + " = '" + text + "' is not a number");
  }
}

/// One entry per image from a comma-separated option ("" = none given).
std::vector<std::string> per_image(const std::string& option, const std::string& text, std::size_t n) {
  if (text.empty()) return std::vector<std::string>(n);
  std::vector<std::string> parts = split(text, ',');
  if (parts.size() != n)
    throw UsageError(option + " = " + text + " breaks 'one entry per image' (" + std::to_string(n) + " images)");
  return parts;
}

std::string sanitise(const std::string& s) {
  std::string o;
  for (char c : s) o += (std::isalnum(static_cast<unsigned char>(c)) || c == '-' || c == '_' || c == '.') ? c : '_';
  while (!o.empty() && (o.back() == '_' || o.back() == '.')) o.pop_back();
  return o;
}

double median_of(std::vector<double> v) {
  if (v.empty()) return std::numeric_limits<double>::quiet_NaN();
  std::sort(v.begin(), v.end());
  const std::size_t h = v.size() / 2;
  return v.size() % 2 ? v[h] : 0.5 * (v[h - 1] + v[h]);
}

/// What one image gives.
struct ImageStack {
  std::string path;
  double freq_hz = std::numeric_limits<double>::quiet_NaN();
  Beam beam;                 ///< at the image centre, PA east of ICRS north
  LocalGeometry centre;      ///< pixel frame at the image centre
  double pixel_arcsec = 0.0; ///< sqrt of the pixel area at the centre
  long half_size = 0;        ///< cut-out half side [pix]
  StackResult result;
  long n_off_image = 0;
  double rms_map_median = std::numeric_limits<double>::quiet_NaN();  ///< local rms at the stacked positions
  int noise_passes = 0;
};

/// The stack's grid: TAN, reference (0, 0) at the centre pixel, pixel size and
/// axes of the image's pixel frame at its centre. Parity from the image; the
/// rotation (CROTA2 sense, Paper II eq. 189, as header_for_grid writes it) is the
/// one whose +y direction has the image's position angle, checked through WCSLIB.
SkyImage stack_grid(const ImageStack& s, const ImageF& pixels) {
  GridSpec g;
  g.nx = pixels.cols();
  g.ny = pixels.rows();
  g.projection = "TAN";
  g.frame = "ICRS";
  g.crpix1 = static_cast<double>(s.half_size) + 1.0;  // FITS 1-based
  g.crpix2 = static_cast<double>(s.half_size) + 1.0;
  const double step = s.pixel_arcsec / 3600.0;
  g.cdelt1_deg = s.centre.usual_parity ? -step : step;
  g.cdelt2_deg = step;
  g.beam = s.beam;
  if (std::isfinite(s.freq_hz)) g.freq_hz = s.freq_hz;
  std::optional<SkyImage> best;
  double best_diff = 1e9;
  for (double rho : {s.centre.plus_y_pa_deg, -s.centre.plus_y_pa_deg}) {
    g.rotation_deg = std::remainder(rho, 360.0);
    SkyImage im = make_sky_image(g, pixels);
    const auto lg = local_geometry(*im.wcs, static_cast<double>(s.half_size), static_cast<double>(s.half_size));
    if (!lg) continue;
    const double diff = std::abs(std::remainder(lg->plus_y_pa_deg - s.centre.plus_y_pa_deg, 360.0));
    if (diff < best_diff) {
      best_diff = diff;
      best = std::move(im);
    }
  }
  if (!best) throw std::logic_error("stack: no sky position at the centre of the stack grid");
  return std::move(*best);
}

int run_stack(const std::vector<std::string>& args) {
  const po::options_description desc = stack_options();
  ParsedOptions parsed = parse_options("stack", "IMAGE [IMAGE ...] --catalogue FILE [--out DIR] [options]", desc,
                                       {{"images", -1}}, args);
  if (parsed.help) return kExitOk;
  const auto& vm = parsed.vm;

  // ---- configuration: every option checked before anything is read -------------------
  const std::vector<std::string> paths =
      vm.count("images") ? vm["images"].as<std::vector<std::string>>() : std::vector<std::string>{};
  if (paths.empty()) throw UsageError("no input image given (usage: skerry stack IMAGE [IMAGE ...] --catalogue FILE)");
  const std::string cat_path = vm["catalogue"].as<std::string>();
  if (cat_path.empty()) throw UsageError("--catalogue FILE (the positions to stack at) is required");
  const std::size_t ni = paths.size();
  const std::vector<std::string> freq_text = per_image("image.freq_mhz", vm["image.freq_mhz"].as<std::string>(), ni);
  std::vector<double> freq_override(ni, 0.0);
  for (std::size_t k = 0; k < ni; ++k) {
    if (freq_text[k].empty()) continue;
    freq_override[k] = parse_number("image.freq_mhz", freq_text[k]) * 1e6;
    require(freq_override[k] >= 0.0, "image.freq_mhz", vm["image.freq_mhz"].as<std::string>(), "frequencies >= 0");
  }
  const std::vector<std::string> rms_maps = per_image("noise.rms_map", vm["noise.rms_map"].as<std::string>(), ni);
  ExtractConfig job;  // extract's noise stage with extract's defaults and these options
  job.noise.box_beams = vm["noise.window_beams"].as<double>();
  job.noise.box_pixels = vm["noise.window_pixels"].as<int>();
  job.noise.step_beams = vm["noise.grid_spacing_beams"].as<double>();
  job.noise.clip_sigma = vm["noise.clip_sigma"].as<double>();
  require(job.noise.box_beams > 0.0, "noise.window_beams", fits_real(job.noise.box_beams), "noise.window_beams > 0");
  require(job.noise.box_pixels >= 0, "noise.window_pixels", std::to_string(job.noise.box_pixels), "noise.window_pixels >= 0");
  require(job.noise.step_beams >= 0.0, "noise.grid_spacing_beams", fits_real(job.noise.step_beams),
          "noise.grid_spacing_beams >= 0");
  require(job.noise.clip_sigma >= 2.0 && std::isfinite(job.noise.clip_sigma), "noise.clip_sigma",
          fits_real(job.noise.clip_sigma), "noise.clip_sigma >= 2 (iterated clipping collapses below about 1.8)");
  job.second_pass = vm["noise.second_pass"].as<bool>();
  job.mask_margin_beams = vm["noise.mask_margin_beams"].as<double>();
  require(job.mask_margin_beams >= 0.0, "noise.mask_margin_beams", fits_real(job.mask_margin_beams),
          "noise.mask_margin_beams >= 0");
  job.render_model = false;
  StackOptions sopt;
  sopt.half_size_pix = vm["stack.half_size_pix"].as<int>();
  require(sopt.half_size_pix >= 0 && sopt.half_size_pix <= 2000, "stack.half_size_pix",
          std::to_string(sopt.half_size_pix), "0 <= stack.half_size_pix <= 2000");
  sopt.rms_inner_beams = vm["stack.rms_inner_beams"].as<double>();
  require(sopt.rms_inner_beams > 0.0 && std::isfinite(sopt.rms_inner_beams), "stack.rms_inner_beams",
          fits_real(sopt.rms_inner_beams), "stack.rms_inner_beams > 0");
  bool fmt_csv = false, fmt_fits = false, fmt_vot = false;
  for (const auto& f : split(vm["output.formats"].as<std::string>(), ',')) {
    if (f == "csv") fmt_csv = true;
    else if (f == "fits") fmt_fits = true;
    else if (f == "vot") fmt_vot = true;
    else if (!f.empty()) throw UsageError("output.formats: unknown format '" + f + "' (csv, fits, vot)");
  }
  PositionColumnOptions pco;
  pco.ra = vm["positions.ra_column"].as<std::string>();
  pco.dec = vm["positions.dec_column"].as<std::string>();
  pco.frame = vm["positions.frame"].as<std::string>();
  pco.ra_option = "positions.ra_column";
  pco.dec_option = "positions.dec_column";
  pco.frame_option = "positions.frame";
  std::string name = sanitise(vm["output.name"].as<std::string>());
  if (name.empty()) name = sanitise(fs::path(table_file_path(cat_path)).stem().string());
  if (name.empty()) name = "stack";
  std::string out_dir = vm["out"].as<std::string>();
  if (out_dir.empty()) out_dir = (fs::path("outputs") / name).string();

  ThreadLimit threads(vm["threads"].as<int>());
  RunRecord record("stack");
  record.set_configuration(parsed.resolved, parsed.config_file);
  record.set_threads(threads.threads());

  // ---- positions ------------------------------------------------------------------------
  StageTimer t_cat(record, "catalogue");
  const Table table = read_table(cat_path);
  const CataloguePositions cp = read_catalogue_positions(table, cat_path, pco);
  std::vector<ForcedSource> positions;
  for (std::size_t i = 0; i < cp.ra_deg.size(); ++i) {
    if (std::isnan(cp.ra_deg[i]) || std::isnan(cp.dec_deg[i])) continue;
    ForcedSource p;
    p.ra_deg = cp.ra_deg[i];
    p.dec_deg = cp.dec_deg[i];
    positions.push_back(p);
  }
  if (positions.empty())
    throw NoDataError(table_file_path(cat_path), "has no row with a position (" + std::to_string(table.rows()) +
                                                     " rows, columns " + cp.ra_col + ", " + cp.dec_col + ")");
  record.add_input("catalogue", table_file_path(cat_path));
  t_cat.stop();

  // ---- per image: read, noise, stack (everything before the first output) -------------------
  std::vector<ImageStack> stacks(ni);
  for (std::size_t k = 0; k < ni; ++k) {
    ImageStack& s = stacks[k];
    s.path = paths[k];
    StageTimer t_read(record, "read_" + std::to_string(k + 1));
    ExtractSettings es;
    es.read.accept_any_bunit = vm["image.accept_bunit"].as<bool>();
    es.read.accept_bunit_option = "image.accept_bunit";
    es.read.beam_option = "";
    es.read.freq_option = "image.freq_mhz";
    if (freq_override[k] > 0.0) es.read.freq_hz_override = freq_override[k];
    es.read.require_beam = true;
    es.rms_map = rms_maps[k];
    SkyImage sky = read_sky_image(paths[k], es.read);
    check_extract_image(sky, job);
    const ExtractInputs inputs = read_extract_inputs(es, sky, &record);
    record.add_input("image", paths[k]);
    t_read.stop();

    StageTimer t_noise(record, "noise_" + std::to_string(k + 1));
    const NoiseStageResult noise = run_noise_stage(sky, inputs, job);
    sky.pixels -= noise.maps.background_image();
    const ImageF rms = noise.maps.rms_image();
    t_noise.stop();

    StageTimer t_stack(record, "stack_" + std::to_string(k + 1));
    const long nx = sky.pixels.cols(), ny = sky.pixels.rows();
    const auto gc = local_geometry(*sky.wcs, 0.5 * static_cast<double>(nx - 1), 0.5 * static_cast<double>(ny - 1));
    if (!gc) throw InputError(paths[k], "the image centre has no sky position");
    s.centre = *gc;
    s.pixel_arcsec = std::sqrt(gc->pixel_area_arcsec2);
    s.beam = noise.beam;
    s.freq_hz = sky.freq_hz;
    s.noise_passes = noise.noise_passes;
    s.result = forced_at_positions(sky.pixels, rms, 0.0, *sky.wcs, s.beam, positions, MaskU8(), {}, sopt);
    s.half_size = (s.result.stack.cols() - 1) / 2;
    std::vector<double> local_rms;
    for (const ForcedMeasurement& m : s.result.at_positions) {
      if (m.flags & (kForcedOutside | kForcedMasked)) ++s.n_off_image;
      else local_rms.push_back(m.rms_jy_per_beam);
    }
    s.rms_map_median = median_of(local_rms);
    if (s.result.n_stacked == 0)
      throw NoDataError(paths[k], "none of the " + std::to_string(positions.size()) + " positions of " +
                                      table_file_path(cat_path) +
                                      " lies on the image's data (all outside it or on blank pixels)");
    t_stack.stop();
  }

  // ---- outputs ---------------------------------------------------------------------------
  StageTimer t_write(record, "write");
  StagedOutputs stage(out_dir, name, "stack");
  const std::vector<std::pair<std::string, std::string>> origin{
      {"ORIGIN", fits_string(std::string("skerry ") + SKERRY_VERSION + " (" + SKERRY_GIT_REVISION + ")")}};
  std::vector<std::string> stack_files(ni);
  for (std::size_t k = 0; k < ni; ++k) {
    const ImageStack& s = stacks[k];
    const SkyImage grid = stack_grid(s, s.result.stack);
    auto cards = origin;
    cards.push_back({"OBJECT", fits_string("median stack of " + std::to_string(s.result.n_stacked) + " positions")});
    cards.push_back({"NSTACKED", std::to_string(s.result.n_stacked)});
    cards.push_back({"STACKOP", fits_string("pixel-wise median")});
    cards.push_back({"STACKPOS", fits_string("CRVAL = (0,0): offsets from the stacked positions")});
    stack_files[k] = name + ".stack_" + std::to_string(k + 1) + ".fits";
    write_fits_image(stage.path(stack_files[k]), s.result.stack, grid, "JY/BEAM", cards);
  }
  {
    Table t;
    t.name = "stack";
    std::vector<std::int64_t> idx(ni), n_given(ni), n_nopos(ni), n_off(ni), n_st(ni), passes(ni);
    std::vector<double> fq(ni), s_jy(ni), s_err(ni), pk(ni), rms_st(ni), ann_in(ni), ann_out(ni), bmaj(ni), bmin(ni),
        bpa(ni), pix(ni), rms_med(ni), expect(ni);
    std::vector<std::string> file(ni), sfile(ni);
    for (std::size_t k = 0; k < ni; ++k) {
      const ImageStack& s = stacks[k];
      idx[k] = static_cast<std::int64_t>(k) + 1;
      file[k] = s.path;
      sfile[k] = stack_files[k];
      fq[k] = s.freq_hz / 1e6;
      n_given[k] = static_cast<std::int64_t>(table.rows());
      n_nopos[k] = static_cast<std::int64_t>(cp.no_position);
      n_off[k] = s.n_off_image;
      n_st[k] = s.result.n_stacked;
      s_jy[k] = s.result.stacked_flux_jy;
      s_err[k] = s.result.stacked_flux_err_jy;
      pk[k] = s.result.stacked_peak_jy_per_beam;
      rms_st[k] = s.result.stack_rms_jy_per_beam;
      ann_in[k] = sopt.rms_inner_beams * s.beam.maj_arcsec;
      ann_out[k] = static_cast<double>(s.half_size) * s.pixel_arcsec;
      bmaj[k] = s.beam.maj_arcsec;
      bmin[k] = s.beam.min_arcsec;
      bpa[k] = s.beam.pa_deg;
      pix[k] = s.pixel_arcsec;
      rms_med[k] = s.rms_map_median;
      passes[k] = s.noise_passes;
    }
    t.add_i64("image", "", "meta.id;meta.main", "1-based image (order of the images on the command line)", idx);
    t.add_text("image_file", "", "meta.file", "The image as given", file);
    t.add_text("stack_file", "", "meta.file", "The stacked image written for it", sfile);
    t.add_f64("freq_mhz", "MHz", "em.freq", "Observing frequency of the image (NaN when unknown)", fq);
    t.add_i64("n_given", "", "meta.number", "Rows of the positions catalogue", n_given);
    t.add_i64("n_no_position", "", "meta.number", "Rows without a position (blank or NaN coordinates)", n_nopos);
    t.add_i64("n_off_image", "", "meta.number", "Positions outside the image or on blank pixels (not stacked)", n_off);
    t.add_i64("n_stacked", "", "meta.number", "Positions in the stack (n_given = n_no_position + n_off_image + n_stacked)", n_st);
    t.add_f64("s_stack_jy", "Jy", "phot.flux.density;em.radio", "Stacked flux density: amplitude of the beam fitted at the centre of the median stack (point source: S = peak)", s_jy);
    t.add_f64("s_stack_err_jy", "Jy", "stat.error;phot.flux.density", "1-sigma error of s_stack_jy from rms_stack_jy_per_beam with beam-correlated noise", s_err);
    t.add_f64("peak_stack_jy_per_beam", "Jy/beam", "phot.flux.density;stat.max", "The same amplitude per beam", pk);
    t.add_f64("rms_stack_jy_per_beam", "Jy/beam", "stat.stdev;phot.flux.density", "Robust rms (1.4826 MAD) of the stack in the annulus", rms_st);
    t.add_f64("annulus_inner_arcsec", "arcsec", "pos.angDistance", "Inner radius of the annulus (stack.rms_inner_beams x beam major FWHM)", ann_in);
    t.add_f64("annulus_outer_arcsec", "arcsec", "pos.angDistance", "Half side of the square stack: the annulus is every stack pixel beyond the inner radius, corners included", ann_out);
    t.add_f64("rms_map_median_jy_per_beam", "Jy/beam", "stat.stdev;phot.flux.density", "Median of the rms map at the stacked positions", rms_med);
    t.add_f64("beam_maj_arcsec", "arcsec", "instr.beam", "Restoring beam major FWHM at the image centre", bmaj);
    t.add_f64("beam_min_arcsec", "arcsec", "instr.beam", "Restoring beam minor FWHM", bmin);
    t.add_f64("beam_pa_deg", "deg", "pos.posAng;instr.beam", "Beam PA east of north", bpa);
    t.add_f64("pixel_arcsec", "arcsec", "instr.pixel", "Pixel size of the image and of the stack (square root of the pixel area at the image centre)", pix);
    t.add_i64("noise_passes", "", "meta.number", "Passes of the noise estimate (0 = rms map given)", passes);
    t.meta = {{"tool", "skerry stack"},
              {"version", std::string(SKERRY_VERSION) + " (" + SKERRY_GIT_REVISION + ")"},
              {"catalogue", table_file_path(cat_path)},
              {"position_columns", cp.ra_col + "," + cp.dec_col + " (" + cp.frame + ")"},
              {"convention_stack", "pixel-wise median of cut-outs of (image - background) bilinearly sampled at the exact positions"},
              {"convention_flux", "point source: flux density = fitted beam amplitude at the stack centre"}};
    for (const auto& [k, v] : parsed.resolved) {
      if (k == "threads" || k == "out" || k == "images" || k == "catalogue") continue;
      std::string key = "cfg_" + k;
      std::replace(key.begin(), key.end(), '.', '_');
      t.meta.emplace_back(key, v);
    }
    t.check_consistent();
    if (fmt_csv) write_table(t, stage.path(name + ".stack.csv"));
    if (fmt_fits) write_table(t, stage.path(name + ".stack.fits"));
    if (fmt_vot) write_table(t, stage.path(name + ".stack.vot"));
  }
  t_write.stop();
  record.set_count("images", static_cast<std::int64_t>(ni));
  record.set_count("catalogue_rows", static_cast<std::int64_t>(table.rows()));
  record.set_count("rows_without_position", static_cast<std::int64_t>(cp.no_position));
  for (std::size_t k = 0; k < ni; ++k)
    record.set_count("stacked_" + std::to_string(k + 1), stacks[k].result.n_stacked);
  record.set_value("position_columns", cp.ra_col + "," + cp.dec_col);
  record.set_value("position_frame", cp.frame);
  record.set_value("output_folder", out_dir);
  for (const auto& f : stage.files()) record.add_output(stage.final_path(f));
  const std::string run_name = name + ".run.json";
  record.add_output(stage.final_path(run_name));
  record.write(stage.path(run_name));
  stage.commit(outputs_listed_in(stage.final_path(run_name)));

  for (std::size_t k = 0; k < ni; ++k) {
    const ImageStack& s = stacks[k];
    char line[768];
    std::snprintf(line, sizeof line,
                  "stack %s image %zu (%s): %ld of %zu positions stacked, S = %.4g +- %.2g Jy, stack rms %.3g Jy/beam -> %s\n",
                  name.c_str(), k + 1, s.path.c_str(), s.result.n_stacked, static_cast<std::size_t>(table.rows()),
                  s.result.stacked_flux_jy, s.result.stacked_flux_err_jy, s.result.stack_rms_jy_per_beam,
                  stage.final_path(stack_files[k]).c_str());
    std::cout << line << std::flush;
  }
  return kExitOk;
}

const CommandRegistrar kRegistrar{"stack", "images + a positions catalogue -> median stacks and stacked flux densities",
                                  &run_stack};

}  // namespace
}  // namespace skerry
