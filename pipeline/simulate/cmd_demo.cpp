// `skerry demo --out DIR`: the whole job on the embedded demo scenario, the
// invented Lanternfish Field of the invented Skerrywind Deep Continuum Survey.
//
//   1. simulate   three bands (0.9, 1.4, 3.0 GHz) and their truth   -> DIR/images/
//   2. reference  an invented reference catalogue of the field, and a
//                 dense optical counterpart catalogue (simulate)     -> DIR/images/
//   3. extract    the 1.4 GHz image with its primary beam            -> DIR/run/
//   4. match      the components against the reference catalogue,
//                 and their counterparts by likelihood ratio         -> DIR/run/
//   5. bands      forced flux densities, spectral indices, alpha map -> DIR/run/
//   6. completeness  injection and negated-image reliability         -> DIR/run/
//   7. report     one HTML page of the run                           -> DIR/run/
//
// Each step is the same sub-command a user would run (called in this process
// through the command registry), so the demo shows exactly what the commands do.
#include <algorithm>
#include <chrono>
#include <cmath>
#include <filesystem>
#include <iostream>
#include <random>
#include <string>
#include <vector>

#include "app/console.h"
#include "app/command.h"
#include "app/errors.h"
#include "io/table_io.h"
#include "app/options.h"
#include "skerry/constants.h"
#include "skerry/sky.h"

namespace skerry {
namespace {

namespace fs = std::filesystem;

/// The demo's narration: stdout, nothing with --quiet.
std::ostream& narration() {
  static std::ostream none(nullptr);
  return verbosity() == Verbosity::Quiet ? none : std::cout;
}

const CommandInfo* find_command(const std::string& name) {
  for (const auto& c : command_registry())
    if (c.name == name) return &c;
  return nullptr;
}

int run_step(const std::string& name, const std::vector<std::string>& args) {
  const CommandInfo* c = find_command(name);
  if (!c) throw std::logic_error("demo: sub-command '" + name + "' is not built in");
  narration() << "\n$ skerry " << name;
  for (const auto& a : args) narration() << " " << a;
  narration() << "\n" << std::flush;
  const int rc = c->run(args);
  if (rc != kExitOk) throw ExitError(rc, "demo: step 'skerry " + name + "' exited with code " + std::to_string(rc));
  return rc;
}

/// An invented reference catalogue of the demo field, made from the simulation's
/// sky truth the way a catalogue of another survey would see the same sky: at
/// 1.0 GHz (flux densities from each source's spectrum), with a 4% higher flux
/// scale, a systematic position offset of (+0.40, -0.25) arcsec in (RA cos Dec,
/// Dec), random position errors of 0.6 arcsec per coordinate, a flux limit of
/// 0.3 mJy and 3% unrelated entries. The numbers are ours; the demo's match
/// summary should recover the offset and the flux ratio.
Table reference_catalogue(const Table& truth, std::uint64_t seed) {
  const auto& id = truth.at("id");
  const auto& ra = truth.at("ra_deg").f64;
  const auto& dec = truth.at("dec_deg").f64;
  const auto& s_ref = truth.at("s_ref_jy").f64;
  const auto& nu_ref_mhz = truth.at("ref_freq_mhz").f64;
  const auto& alpha = truth.at("alpha").f64;
  const auto& curv = truth.at("curvature").f64;
  const double nu_hz = 1.0e9, scale = 1.04, limit_jy = 3e-4, pos_err_arcsec = 0.6;
  const double d_east_arcsec = 0.40, d_north_arcsec = -0.25;
  std::mt19937_64 rng(seed);
  std::normal_distribution<double> gauss(0.0, 1.0);
  std::uniform_real_distribution<double> uni(0.0, 1.0);

  std::vector<std::int64_t> ids;
  std::vector<double> r, d, er, ed, s, se;
  double ra_min = 360, ra_max = 0, dec_min = 90, dec_max = -90;
  for (std::size_t i = 0; i < truth.rows(); ++i) {
    ra_min = std::min(ra_min, ra[i]); ra_max = std::max(ra_max, ra[i]);
    dec_min = std::min(dec_min, dec[i]); dec_max = std::max(dec_max, dec[i]);
    // log10 S(nu) = log10 S_ref + alpha x + curvature x^2, x = log10(nu / nu_ref)
    const double x = std::log10(nu_hz / (nu_ref_mhz[i] * 1e6));
    const double flux = s_ref[i] * std::pow(10.0, alpha[i] * x + curv[i] * x * x) * scale;
    const double flux_err = 1e-4 + 0.03 * flux;
    const double measured = flux + flux_err * gauss(rng);
    const double xi = (d_east_arcsec + pos_err_arcsec * gauss(rng)) * kArcsecToRad;
    const double eta = (d_north_arcsec + pos_err_arcsec * gauss(rng)) * kArcsecToRad;
    if (measured < limit_jy) continue;
    double ro, dn;
    gnomonic_inverse(ra[i], dec[i], xi, eta, ro, dn);
    ids.push_back(100000 + (id.type == ColumnType::Int64 ? id.i64[i] : static_cast<std::int64_t>(i)));
    r.push_back(ro); d.push_back(dn); er.push_back(pos_err_arcsec); ed.push_back(pos_err_arcsec);
    s.push_back(measured); se.push_back(flux_err);
  }
  const std::size_t n_unrelated = (ids.size() * 3 + 99) / 100;
  const double sd0 = std::sin(dec_min * kDegToRad), sd1 = std::sin(dec_max * kDegToRad);
  for (std::size_t k = 0; k < n_unrelated; ++k) {
    ids.push_back(900000 + static_cast<std::int64_t>(k));
    r.push_back(ra_min + (ra_max - ra_min) * uni(rng));
    d.push_back(std::asin(sd0 + (sd1 - sd0) * uni(rng)) * kRadToDeg);  // uniform in sin(Dec)
    er.push_back(pos_err_arcsec); ed.push_back(pos_err_arcsec);
    const double flux = limit_jy * (1.0 + 4.0 * uni(rng));
    s.push_back(flux); se.push_back(1e-4 + 0.03 * flux);
  }
  Table t;
  t.name = "reference";
  t.add_i64("ref_id", "", "meta.id;meta.main", "reference catalogue entry", ids);
  t.add_f64("ra_deg", "deg", "pos.eq.ra;meta.main", "right ascension (ICRS)", r);
  t.add_f64("dec_deg", "deg", "pos.eq.dec;meta.main", "declination (ICRS)", d);
  t.add_f64("ra_err_arcsec", "arcsec", "stat.error;pos.eq.ra", "error of RA cos(Dec)", er);
  t.add_f64("dec_err_arcsec", "arcsec", "stat.error;pos.eq.dec", "error of Dec", ed);
  t.add_f64("s_1000mhz_jy", "Jy", "phot.flux.density;em.radio.750-1500MHz", "integrated flux density at 1.0 GHz", s);
  t.add_f64("s_1000mhz_err_jy", "Jy", "stat.error;phot.flux.density", "error of s_1000mhz_jy", se);
  t.set_meta("freq_hz", "1000000000");
  t.set_meta("description",
             "Invented reference catalogue of the Lanternfish Field (Skerrywind Deep Continuum Survey "
             "demo): made from the simulation's truth with a 4% flux-scale offset and a (+0.40, -0.25) "
             "arcsec position offset; not real data");
  return t;
}

po::options_description demo_options() {
  po::options_description d("demo options");
  d.add_options()
      ("out", po::value<std::string>()->default_value("outputs/demo"), "output folder")
      ("seed", po::value<long long>()->default_value(20260601), "random seed of the simulated field")
      ("demo.size_pix", po::value<long>()->default_value(2048), "image side at 1.4 GHz [pixels]")
      ("demo.sources", po::value<long>()->default_value(400), "source systems in the field")
      ("demo.completeness", po::value<bool>()->default_value(true), "measure completeness and reliability (the slowest step)");
  return d;
}

int run_demo(const std::vector<std::string>& args) {
  const auto desc = demo_options();
  ParsedOptions p = parse_options("demo", "[--out DIR] [options]", desc, {}, args);
  if (p.help) return kExitOk;
  const std::string out = p.vm["out"].as<std::string>();
  const std::string threads = std::to_string(p.vm["threads"].as<int>());
  const std::string seed = std::to_string(p.vm["seed"].as<long long>());
  const fs::path images = fs::path(out) / "images", run = fs::path(out) / "run";
  const auto t0 = std::chrono::steady_clock::now();

  narration() << "skerry demo: the Lanternfish Field of the Skerrywind Deep Continuum Survey "
               "(invented; simulated data)\n";
  run_step("simulate", {"--out", images.string(), "--seed", seed, "--threads", threads,
                        "--field.size_pix", std::to_string(p.vm["demo.size_pix"].as<long>()),
                        "--sources.count", std::to_string(p.vm["demo.sources"].as<long>()),
                        "--counterparts.density_deg2", "1e5"});

  const fs::path ref_path = images / "lanternfish_reference.csv";
  narration() << "\n(demo) writing an invented reference catalogue of the field: " << ref_path.string() << "\n";
  write_table(reference_catalogue(read_table((images / "lanternfish.truth.csv").string()),
                                  static_cast<std::uint64_t>(p.vm["seed"].as<long long>()) + 1),
              ref_path.string());

  const std::string img = (images / "lanternfish_1400MHz.fits").string();
  run_step("extract", {img, "--out", run.string(), "--threads", threads, "--image.primary_beam",
                       (images / "lanternfish_1400MHz.pb_map.fits").string()});
  run_step("match", {(run / "lanternfish_1400MHz.components.csv").string(), ref_path.string(), "--out",
                     run.string(), "--threads", threads, "--match.mode", "one_to_one",
                     "--match.freq_a_mhz", "1400", "--match.freq_b_mhz", "1000", "--match.flux_b", "s_1000mhz_jy",
                     "--match.flux_err_b", "s_1000mhz_err_jy"});
  // Counterparts of the components in the simulated optical catalogue (about
  // 10^5 objects per deg^2, 75 % of the radio sources with a counterpart).
  run_step("match", {(run / "lanternfish_1400MHz.components.csv").string(),
                     (images / "lanternfish.counterparts.csv").string(), "--out", run.string(), "--threads", threads,
                     "--match.mode", "likelihood_ratio", "--match.radius_arcsec", "5", "--match.lr_mag_b", "mag",
                     "--match.name", "lanternfish_1400MHz_counterparts", "--match.chance_shifts", "0"});
  // The spectra are measured for the 1.4 GHz catalogue's components (forced in every band).
  run_step("bands", {(images / "lanternfish_900MHz.fits").string(), img,
                     (images / "lanternfish_3000MHz.fits").string(), "--out", run.string(), "--threads",
                     threads, "--output.name", "lanternfish",
                     "--catalogue", (run / "lanternfish_1400MHz.components.csv").string()});
  if (p.vm["demo.completeness"].as<bool>() && find_command("completeness"))
    run_step("completeness", {img, "--out", run.string(), "--threads", threads});
  if (find_command("report")) run_step("report", {run.string(), "--report.name", "lanternfish_1400MHz"});

  const double secs = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  narration() << "\nskerry demo: done in " << std::round(secs * 10) / 10 << " s.\n"
            << "  images and truth:  " << images.string() << "/\n"
            << "  catalogue, maps:   " << run.string() << "/lanternfish_1400MHz.*\n"
            << "  spectra:           " << run.string() << "/lanternfish.spectra.csv\n";
  for (const auto& e : fs::directory_iterator(run))
    if (e.path().extension() == ".html")
      narration() << "  report page:       " << e.path().string() << "  (open it in a browser)\n";
  return kExitOk;
}

const CommandRegistrar reg{"demo", "the whole job on the embedded demo field (simulate, extract, match, bands, report)",
                           &run_demo};

}  // namespace
}  // namespace skerry
