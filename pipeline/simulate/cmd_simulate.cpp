// `skerry simulate --out DIR [options]`: simulated images of one field in several
// bands, with their truth tables (modules/simulate does the computing).
//
// Files written to DIR (NAME = output.name, FREQ e.g. 1400MHz):
//   NAME_FREQ.fits          image [Jy/beam] with full WCS, BMAJ/BMIN/BPA, FREQ
//   NAME_FREQ.pb_map.fits       primary-beam image (when primary_beam.fwhm_deg > 0 and
//                           output.primary_beam_images)
//   NAME_FREQ.model_map.fits    noiseless sources (output.model_images)
//   NAME_FREQ.background_map.fits  the smooth background alone (output.background_images)
//   NAME.truth.EXT          sky truth, one row per source (EXT = output.truth_format)
//   NAME_FREQ.truth.EXT     per-band truth (pixel position, flux in that band, peak,
//                           convolved shape, local rms, true SNR, flags)
// Every file is written under a temporary name and renamed when complete.
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <iostream>
#include <sstream>
#include <stdexcept>
#include <string>
#include <vector>

#include "app/console.h"
#include "app/command.h"
#include "app/errors.h"
#include "io/fits_image.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "app/options.h"
#include "skerry/constants.h"
#include "skerry/simulate.h"

namespace skerry {
namespace {

std::vector<double> parse_list(const std::string& option, const std::string& text) {
  std::vector<double> out;
  std::stringstream ss(text);
  std::string item;
  while (std::getline(ss, item, ',')) {
    const auto b = item.find_first_not_of(" \t"), e = item.find_last_not_of(" \t");
    if (b == std::string::npos) throw UsageError(option + " = '" + text + "' has an empty item");
    item = item.substr(b, e - b + 1);
    try {
      std::size_t used = 0;
      const double v = std::stod(item, &used);
      if (used != item.size() || !std::isfinite(v)) throw std::invalid_argument(item);
      out.push_back(v);
    } catch (const std::exception&) {
      throw UsageError(option + " = '" + text + "': '" + item + "' is not a number");
    }
  }
  if (out.empty()) throw UsageError(option + " is empty");
  return out;
}

/// One value per band: a single value applies to every band. A default list of
/// another length (the user changed bands.freq_mhz only) is repeated cyclically.
std::vector<double> per_band(const ParsedOptions& p, const std::string& option, std::size_t nbands) {
  const std::string text = p.vm[option].as<std::string>();
  std::vector<double> v = parse_list(option, text);
  if (v.size() == 1) v.assign(nbands, v[0]);
  if (v.size() != nbands && p.vm[option].defaulted()) {
    std::vector<double> c(nbands);
    for (std::size_t i = 0; i < nbands; ++i) c[i] = v[i % v.size()];
    v = c;
  }
  if (v.size() != nbands)
    throw UsageError(option + " = '" + text + "' has " + std::to_string(v.size()) +
                     " values; give one, or one per band (" + std::to_string(nbands) + ")");
  return v;
}

std::string freq_label(double mhz) {
  char buf[64];
  std::snprintf(buf, sizeof buf, "%.10g", mhz);
  std::string s(buf);
  std::replace(s.begin(), s.end(), '.', 'p');
  return s + "MHz";
}

std::string fmt(double v) {
  std::ostringstream os;
  os.precision(17);
  os << v;
  return os.str();
}

po::options_description simulate_options() {
  po::options_description d("Simulation (defaults: the Lanternfish Field of the Skerrywind Deep Continuum Survey)");
  // clang-format off
  d.add_options()
    ("out", po::value<std::string>()->default_value("outputs/simulate"), "output folder (created if needed)")
    ("seed", po::value<long long>()->default_value(20260601), "random seed: the same seed gives the same files for any thread count")
    ("output.name", po::value<std::string>()->default_value("lanternfish"), "file name stem")
    ("output.truth_format", po::value<std::string>()->default_value("csv"), "truth tables as csv, fits or vot")
    ("output.primary_beam_images", po::value<bool>()->default_value(true), "write NAME_FREQ.pb_map.fits when there is a primary beam")
    ("output.model_images", po::value<bool>()->default_value(false), "write the noiseless sources as NAME_FREQ.model_map.fits")
    ("output.background_images", po::value<bool>()->default_value(false), "write the background alone as NAME_FREQ.background_map.fits")
    ("field.ra_deg", po::value<double>()->default_value(201.25), "field centre right ascension, ICRS [deg]")
    ("field.dec_deg", po::value<double>()->default_value(-38.6), "field centre declination, ICRS [deg]")
    ("field.size_pix", po::value<long>()->default_value(2048), "image side in pixels at the reference frequency")
    ("field.pixel_arcsec", po::value<double>()->default_value(1.5), "pixel size at the reference frequency [arcsec]")
    ("field.projection", po::value<std::string>()->default_value("SIN"), "WCS projection code (SIN, TAN, ARC, ZEA, ...)")
    ("field.rotation_deg", po::value<double>()->default_value(0.0), "grid rotation (CROTA2 sense) [deg]")
    ("field.east_right", po::value<bool>()->default_value(false), "east towards +x (CDELT1 > 0) instead of the usual east left")
    ("field.border_pix", po::value<long>()->default_value(0), "NaN border width [pixels of each band]")
    ("bands.freq_mhz", po::value<std::string>()->default_value("900,1400,3000"), "band frequencies [MHz], comma-separated")
    ("bands.ref_freq_mhz", po::value<double>()->default_value(1400.0), "reference frequency of beam, pixel size, primary beam and spectra [MHz]")
    ("bands.beam_maj_arcsec", po::value<double>()->default_value(6.0), "restoring beam major FWHM at the reference frequency [arcsec]; scales as 1/frequency")
    ("bands.beam_min_arcsec", po::value<double>()->default_value(5.0), "restoring beam minor FWHM at the reference frequency [arcsec]")
    ("bands.beam_pa_deg", po::value<double>()->default_value(20.0), "restoring beam position angle east of north [deg]")
    ("bands.pixels_follow_beam", po::value<bool>()->default_value(true), "pixel size scales as 1/frequency (same field of view; per-band grids); false: the same pixel size in every band")
    ("bands.crpix_shift_pix", po::value<std::string>()->default_value("0,0.37,-0.29"), "shift of each band's reference pixel from the image centre [pixels], one value or one per band")
    ("noise.rms_jy_per_beam", po::value<std::string>()->default_value("2e-5,1.5e-5,1e-5"), "noise rms where the primary beam is 1 [Jy/beam], one value or one per band; 0 = noiseless")
    ("primary_beam.fwhm_deg", po::value<double>()->default_value(1.2), "Gaussian primary-beam FWHM at the reference frequency [deg] (scales as 1/frequency); 0 = none")
    ("primary_beam.corrected", po::value<bool>()->default_value(true), "images are primary-beam corrected (noise rises towards the edges); false: apparent flux densities")
    ("primary_beam.blank_below", po::value<double>()->default_value(0.2), "pixels where the primary beam is below this are NaN (0 = none)")
    ("background.amplitude_jy_per_beam", po::value<double>()->default_value(5e-6), "rms of the smooth large-scale background [Jy/beam]; 0 = none")
    ("background.scale_arcsec", po::value<double>()->default_value(900.0), "shortest background wavelength [arcsec] (wavelengths span 1-2 times this)")
    ("background.waves", po::value<int>()->default_value(4), "number of plane waves in the background")
    ("sources.count", po::value<long>()->default_value(400), "number of source systems in the field (a close double counts once)")
    ("sources.slope", po::value<double>()->default_value(1.8), "source count dN/dS ~ S^-slope (2.5 = Euclidean)")
    ("sources.s_min_jy", po::value<double>()->default_value(5e-5), "smallest flux density at the reference frequency [Jy]")
    ("sources.s_max_jy", po::value<double>()->default_value(0.05), "largest flux density at the reference frequency [Jy]")
    ("sources.resolved_fraction", po::value<double>()->default_value(0.2), "fraction of resolved (elliptical Gaussian) sources")
    ("sources.size_min_arcsec", po::value<double>()->default_value(2.0), "smallest intrinsic major FWHM of resolved sources [arcsec] (log-uniform)")
    ("sources.size_max_arcsec", po::value<double>()->default_value(15.0), "largest intrinsic major FWHM [arcsec]")
    ("sources.axis_ratio_min", po::value<double>()->default_value(0.3), "smallest intrinsic minor/major axis ratio (uniform up to 1)")
    ("sources.double_fraction", po::value<double>()->default_value(0.05), "fraction of systems with a close point-like companion")
    ("sources.double_sep_min_beams", po::value<double>()->default_value(1.0), "smallest companion separation [reference beam major FWHMs]")
    ("sources.double_sep_max_beams", po::value<double>()->default_value(2.0), "largest companion separation [reference beam major FWHMs]")
    ("sources.double_flux_ratio_min", po::value<double>()->default_value(0.3), "smallest companion/primary flux ratio (uniform up to 1)")
    ("sources.min_separation_arcsec", po::value<double>()->default_value(0.0), "minimum distance between systems [arcsec] (0 = none)")
    ("sources.edge_margin_pix", po::value<double>()->default_value(0.0), "keep source centres this far inside the reference grid [pixels]")
    ("spectra.alpha_mean", po::value<double>()->default_value(-0.7), "mean spectral index (S ~ nu^alpha)")
    ("spectra.alpha_sigma", po::value<double>()->default_value(0.25), "spread of spectral indices (normal)")
    ("spectra.curved_fraction", po::value<double>()->default_value(0.2), "fraction of sources with a curved (log-parabola) spectrum")
    ("spectra.curvature_mean", po::value<double>()->default_value(-0.2), "mean base-10 curvature: log10 S = log10 S_ref + alpha t + curvature t^2, t = log10(nu/nu_ref)")
    ("spectra.curvature_sigma", po::value<double>()->default_value(0.1), "spread of the curvature (normal)")
    ("counterparts.density_deg2", po::value<double>()->default_value(0.0), "also write NAME.counterparts.csv, a dense optical catalogue of the field with this many background objects per deg^2 (0 = none)")
    ("counterparts.fraction", po::value<double>()->default_value(0.75), "fraction of the radio sources with a counterpart in that catalogue (a close double's companion never has one)")
    ("counterparts.mag_min", po::value<double>()->default_value(16.0), "brightest magnitude of the catalogue")
    ("counterparts.mag_max", po::value<double>()->default_value(25.0), "faintest magnitude (the catalogue's limit)")
    ("counterparts.count_slope", po::value<double>()->default_value(0.35), "background counts dN/dm ~ 10^(count_slope m)")
    ("counterparts.mag_mean", po::value<double>()->default_value(20.5), "mean magnitude of the true counterparts (normal, truncated to the range)")
    ("counterparts.mag_sigma", po::value<double>()->default_value(1.2), "spread of the counterparts' magnitudes [mag]")
    ("counterparts.err_min_arcsec", po::value<double>()->default_value(0.1), "smallest per-coordinate position error of the catalogue [arcsec] (uniform up to err_max)")
    ("counterparts.err_max_arcsec", po::value<double>()->default_value(0.3), "largest per-coordinate position error [arcsec]");
  // clang-format on
  return d;
}

template <class T>
T get(const ParsedOptions& p, const char* name) {
  return p.vm[name].as<T>();
}

int run_simulate(const std::vector<std::string>& args) {
  const po::options_description desc = simulate_options();
  const ParsedOptions p = parse_options("simulate", "--out DIR [options]", desc, {}, args);
  if (p.help) return kExitOk;
  ThreadLimit threads(get<int>(p, "threads"));

  const std::string out = get<std::string>(p, "out");
  const std::string name = get<std::string>(p, "output.name");
  require(!out.empty(), "out", out, "a folder name");
  require(!name.empty() && name.find('/') == std::string::npos, "output.name", name,
          "a file name without '/'");
  const std::string truth_ext = get<std::string>(p, "output.truth_format");
  require(truth_ext == "csv" || truth_ext == "fits" || truth_ext == "vot", "output.truth_format",
          truth_ext, "one of csv, fits, vot");
  const long long seed_ll = get<long long>(p, "seed");
  require(seed_ll >= 0, "seed", std::to_string(seed_ll), "seed >= 0");
  const std::uint64_t seed = static_cast<std::uint64_t>(seed_ll);

  const double ra0 = get<double>(p, "field.ra_deg"), dec0 = get<double>(p, "field.dec_deg");
  require(std::isfinite(ra0), "field.ra_deg", fmt(ra0), "a finite value");
  require(std::abs(dec0) < 90.0, "field.dec_deg", fmt(dec0), "|dec| < 90");
  const long size = get<long>(p, "field.size_pix");
  require(size >= 16 && size <= 65536, "field.size_pix", std::to_string(size), "16 <= size_pix <= 65536");
  const double pix_ref = get<double>(p, "field.pixel_arcsec");
  require(pix_ref > 0.0 && pix_ref < 3600.0, "field.pixel_arcsec", fmt(pix_ref), "0 < pixel_arcsec < 3600");
  const std::string projection = get<std::string>(p, "field.projection");
  const double rotation = get<double>(p, "field.rotation_deg");
  const bool east_right = get<bool>(p, "field.east_right");
  const long border = get<long>(p, "field.border_pix");
  require(border >= 0, "field.border_pix", std::to_string(border), "border_pix >= 0");

  const std::vector<double> freqs_mhz = parse_list("bands.freq_mhz", get<std::string>(p, "bands.freq_mhz"));
  for (std::size_t i = 0; i < freqs_mhz.size(); ++i) {
    require(freqs_mhz[i] > 0.0, "bands.freq_mhz", fmt(freqs_mhz[i]), "every frequency > 0");
    for (std::size_t j = 0; j < i; ++j)
      require(freqs_mhz[i] != freqs_mhz[j], "bands.freq_mhz", get<std::string>(p, "bands.freq_mhz"),
              "distinct frequencies");
  }
  const std::size_t nb = freqs_mhz.size();
  const double ref_mhz = get<double>(p, "bands.ref_freq_mhz");
  require(ref_mhz > 0.0, "bands.ref_freq_mhz", fmt(ref_mhz), "ref_freq_mhz > 0");
  const Beam beam_ref{get<double>(p, "bands.beam_maj_arcsec"), get<double>(p, "bands.beam_min_arcsec"),
                      wrap_pa_180(get<double>(p, "bands.beam_pa_deg"))};
  require(beam_ref.valid(), "bands.beam_min_arcsec", fmt(beam_ref.min_arcsec),
          "0 < beam_min_arcsec <= beam_maj_arcsec");
  const bool pixels_follow = get<bool>(p, "bands.pixels_follow_beam");
  const std::vector<double> shifts = per_band(p, "bands.crpix_shift_pix", nb);
  const std::vector<double> rms = per_band(p, "noise.rms_jy_per_beam", nb);
  for (double r : rms) require(r >= 0.0, "noise.rms_jy_per_beam", fmt(r), "rms >= 0");
  const double pb_fwhm_ref = get<double>(p, "primary_beam.fwhm_deg");
  require(pb_fwhm_ref >= 0.0, "primary_beam.fwhm_deg", fmt(pb_fwhm_ref), "fwhm_deg >= 0");
  const double blank_below = pb_fwhm_ref > 0.0 ? get<double>(p, "primary_beam.blank_below") : 0.0;
  require(blank_below >= 0.0 && blank_below < 1.0, "primary_beam.blank_below", fmt(blank_below), "0 <= blank_below < 1");
  const long count = get<long>(p, "sources.count");
  require(count >= 0 && count <= 100000000, "sources.count", std::to_string(count), "0 <= count <= 1e8");

  // Reference grid (footprint of the drawn sources).
  auto grid_for = [&](double freq_mhz, double shift) {
    GridSpec g;
    const double pix = pixels_follow ? pix_ref * ref_mhz / freq_mhz : pix_ref;
    const long n = pixels_follow ? std::max<long>(16, std::lround(size * pix_ref / pix)) : size;
    g.nx = g.ny = n;
    g.projection = projection;
    g.frame = "ICRS";
    g.crval1_deg = ra0;
    g.crval2_deg = dec0;
    g.crpix1 = 0.5 * (n + 1) + shift;  // FITS 1-based centre
    g.crpix2 = 0.5 * (n + 1) + shift;
    g.cdelt1_deg = (east_right ? 1.0 : -1.0) * pix * kArcsecToDeg;
    g.cdelt2_deg = pix * kArcsecToDeg;
    g.rotation_deg = rotation;
    return g;
  };
  auto make_sky = [&](const GridSpec& g, std::string& header) {
    try {
      header = header_for_grid(g);
      return wcs_from_header(header);
    } catch (const std::invalid_argument& e) {
      throw UsageError(std::string("field: cannot build the grid: ") + e.what());
    }
  };

  GridSpec ref_grid = grid_for(ref_mhz, 0.0);
  std::string ref_header;
  const auto ref_sky = make_sky(ref_grid, ref_header);

  sim::SkyModelOptions so;
  so.centre_ra_deg = ra0;
  so.centre_dec_deg = dec0;
  // A cap that holds the reference grid: half its diagonal, with room to spare.
  so.radius_deg = std::min(180.0, 0.75 * std::sqrt(2.0) * size * pix_ref * kArcsecToDeg + 1e-3);
  so.footprint = ref_sky.get();
  so.footprint_nx = ref_grid.nx;
  so.footprint_ny = ref_grid.ny;
  so.footprint_margin_pix = get<double>(p, "sources.edge_margin_pix");
  so.count = static_cast<std::size_t>(count);
  so.ref_freq_hz = ref_mhz * 1e6;
  so.s_min_jy = get<double>(p, "sources.s_min_jy");
  so.s_max_jy = get<double>(p, "sources.s_max_jy");
  so.slope = get<double>(p, "sources.slope");
  so.resolved_fraction = get<double>(p, "sources.resolved_fraction");
  so.size_min_arcsec = get<double>(p, "sources.size_min_arcsec");
  so.size_max_arcsec = get<double>(p, "sources.size_max_arcsec");
  so.axis_ratio_min = get<double>(p, "sources.axis_ratio_min");
  so.double_fraction = get<double>(p, "sources.double_fraction");
  so.double_sep_min_beams = get<double>(p, "sources.double_sep_min_beams");
  so.double_sep_max_beams = get<double>(p, "sources.double_sep_max_beams");
  so.double_flux_ratio_min = get<double>(p, "sources.double_flux_ratio_min");
  so.unit_beam = beam_ref;
  so.min_separation_arcsec = get<double>(p, "sources.min_separation_arcsec");
  so.alpha_mean = get<double>(p, "spectra.alpha_mean");
  so.alpha_sigma = get<double>(p, "spectra.alpha_sigma");
  so.curved_fraction = get<double>(p, "spectra.curved_fraction");
  so.curvature_mean = get<double>(p, "spectra.curvature_mean");
  so.curvature_sigma = get<double>(p, "spectra.curvature_sigma");

  sim::SkyModel model;
  try {
    model = sim::draw_sky_model(so, seed);
  } catch (const std::invalid_argument& e) {
    throw UsageError(std::string("sources: ") + e.what());
  }

  const double cp_density = get<double>(p, "counterparts.density_deg2");
  require(cp_density >= 0.0 && std::isfinite(cp_density), "counterparts.density_deg2", fmt(cp_density), "density >= 0");
  // Drawn before any file is written, so that a bad counterparts.* option
  // leaves nothing behind; written after the images.
  std::size_t n_counterpart_rows = 0;
  Table cp_table;
  bool write_counterparts = false;
  if (cp_density > 0.0) {
    sim::CounterpartOptions co;
    co.density_deg2 = cp_density;
    co.fraction = get<double>(p, "counterparts.fraction");
    co.mag_min = get<double>(p, "counterparts.mag_min");
    co.mag_max = get<double>(p, "counterparts.mag_max");
    co.count_slope = get<double>(p, "counterparts.count_slope");
    co.mag_mean = get<double>(p, "counterparts.mag_mean");
    co.mag_sigma = get<double>(p, "counterparts.mag_sigma");
    co.err_min_arcsec = get<double>(p, "counterparts.err_min_arcsec");
    co.err_max_arcsec = get<double>(p, "counterparts.err_max_arcsec");
    // Radio systems (a companion of a close double has no counterpart of its own).
    std::vector<double> rra, rdec;
    std::vector<std::int64_t> ids;
    for (const auto& src : model.sources) {
      if (src.flags & sim::kSimDoubleSecondary) continue;
      rra.push_back(src.ra_deg);
      rdec.push_back(src.dec_deg);
      ids.push_back(src.id);
    }
    // The catalogue covers the reference image plus 2 arcmin on every side, so
    // that background estimates near the image edge see the same density.
    const double half = 0.5 * size * pix_ref * kArcsecToDeg + 120.0 * kArcsecToDeg;
    sim::CounterpartCatalogue cc;
    try {
      cc = sim::draw_counterparts(rra, rdec, ra0, dec0, half, co, seed);
    } catch (const std::invalid_argument& e) {
      throw UsageError(std::string("counterparts: ") + e.what());
    }
    cp_table = sim::counterpart_table(cc, ids);
    cp_table.set_meta("seed", std::to_string(seed));
    cp_table.set_meta("field",
                               "Lanternfish Field, Skerrywind Deep Continuum Survey (simulated optical counterparts)");
    n_counterpart_rows = cp_table.rows();
    write_counterparts = true;
  }
  const std::string dir = out + "/";
  const std::vector<std::pair<std::string, std::string>> common_cards = {
      {"OBJECT", fits_string("Lanternfish Field")},
      {"ORIGIN", fits_string("skerry simulate")},
      {"SIMSEED", std::to_string(seed)},
  };
  std::size_t total_pixels = 0;
  for (std::size_t b = 0; b < nb; ++b) {
    const double freq_hz = freqs_mhz[b] * 1e6;
    GridSpec g = grid_for(freqs_mhz[b], shifts[b]);
    g.beam = sim::beam_at_frequency(beam_ref, ref_mhz * 1e6, freq_hz);
    g.freq_hz = freq_hz;
    std::string header;
    const auto sky = make_sky(g, header);

    sim::BandOptions bo;
    bo.nx = g.nx;
    bo.ny = g.ny;
    bo.freq_hz = freq_hz;
    bo.beam = g.beam;
    bo.rms_jy_per_beam = rms[b];
    bo.noise_stream = b;
    bo.pb_fwhm_deg = pb_fwhm_ref > 0.0 ? pb_fwhm_ref * ref_mhz / freqs_mhz[b] : 0.0;
    bo.pointing_ra_deg = ra0;
    bo.pointing_dec_deg = dec0;
    bo.pb_corrected = get<bool>(p, "primary_beam.corrected");
    bo.blank_below_pb = blank_below;
    bo.blank_border_pix = border;
    bo.background_amplitude_jy_per_beam = get<double>(p, "background.amplitude_jy_per_beam");
    bo.background_scale_arcsec = get<double>(p, "background.scale_arcsec");
    bo.background_waves = get<int>(p, "background.waves");
    bo.keep_background = get<bool>(p, "output.background_images");
    bo.keep_model = get<bool>(p, "output.model_images");
    sim::BandImage img;
    try {
      img = sim::simulate_band(model, *sky, bo, seed);
    } catch (const std::invalid_argument& e) {
      throw UsageError("band " + fmt(freqs_mhz[b]) + " MHz: " + e.what());
    }
    total_pixels += static_cast<std::size_t>(g.nx) * g.ny;

    SkyImage like;
    like.wcs_header = header;
    like.beam = g.beam;
    like.freq_hz = freq_hz;
    const std::string stem = dir + name + "_" + freq_label(freqs_mhz[b]);
    auto cards = common_cards;
    cards.push_back({"SIMRMS", fits_real(rms[b])});
    cards.push_back({"PBCOR", bo.pb_corrected && bo.pb_fwhm_deg > 0.0 ? "T" : "F"});
    if (bo.pb_fwhm_deg > 0.0) cards.push_back({"PBFWHM", fits_real(bo.pb_fwhm_deg)});
    write_fits_image(stem + ".fits", img.image, like, "Jy/beam", cards);
    if (bo.pb_fwhm_deg > 0.0 && get<bool>(p, "output.primary_beam_images"))
      write_fits_image(stem + ".pb_map.fits", img.primary_beam, like, "", common_cards);
    if (bo.keep_model) write_fits_image(stem + ".model_map.fits", img.model, like, "Jy/beam", common_cards);
    if (bo.keep_background && img.background.size() > 0)
      write_fits_image(stem + ".background_map.fits", img.background, like, "Jy/beam", common_cards);

    Table bt = sim::band_truth_table(model.sources, img.sources, freq_hz, g.beam);
    bt.set_meta("image", name + "_" + freq_label(freqs_mhz[b]) + ".fits");
    bt.set_meta("seed", std::to_string(seed));
    bt.set_meta("field", "Lanternfish Field, Skerrywind Deep Continuum Survey (simulated)");
    write_table(bt, stem + ".truth." + truth_ext);
  }
  if (write_counterparts) write_table(cp_table, dir + name + ".counterparts." + truth_ext);
  Table st = sim::sky_truth_table(model);
  st.set_meta("seed", std::to_string(seed));
  st.set_meta("field", "Lanternfish Field, Skerrywind Deep Continuum Survey (simulated)");
  for (const auto& [k, v] : p.resolved)  // not threads or out: the files must not depend on them
    if (k != "threads" && k != "out") st.set_meta("option." + k, v);
  write_table(st, dir + name + ".truth." + truth_ext);

  std::ostringstream line;
  line << "simulate: " << model.sources.size() << " sources, " << nb << " band" << (nb == 1 ? "" : "s") << " ("
       << total_pixels / 1000000.0 << " Mpixel) written to " << out;
  if (n_counterpart_rows) line << " (and " << n_counterpart_rows << " counterpart-catalogue rows)";
  say(line.str());
  return kExitOk;
}

const CommandRegistrar reg{"simulate", "simulated images of a field and their truth tables",
                           &run_simulate};

}  // namespace
}  // namespace skerry
