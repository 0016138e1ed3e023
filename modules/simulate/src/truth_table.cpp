// Truth tables of the simulator (simulate.h): columns with units, IVOA UCDs
// (UCD1+ controlled vocabulary, IVOA Recommendation 2018/2021) and descriptions.
#include <cmath>
#include <limits>
#include <sstream>
#include <stdexcept>
#include <unordered_map>

#include "skerry/simulate.h"

namespace skerry::sim {

namespace {

const char* kFlagDoc =
    "bits: 1 resolved (intrinsic size > 0), 2 brighter member of a close double, 4 fainter "
    "member of a close double, 8 curved (log-parabola) spectrum, 16 injected by the caller, "
    "256 centre outside this band's grid, 512 centre on a blanked pixel, 1024 cutoff ellipse "
    "clipped by the grid edge or a blank";

std::string fmt(double v) {
  std::ostringstream os;
  os.precision(17);
  os << v;
  return os.str();
}

void add_sky_columns(Table& t, const std::vector<const SkySource*>& rows) {
  std::vector<std::int64_t> id, partner, flags;
  std::vector<double> ra, dec, sref, fref, alpha, curv, maj, mn, pa;
  for (const SkySource* s : rows) {
    id.push_back(s->id);
    ra.push_back(s->ra_deg);
    dec.push_back(s->dec_deg);
    sref.push_back(s->spectrum.s_ref_jy);
    fref.push_back(s->spectrum.ref_freq_hz / 1e6);
    alpha.push_back(s->spectrum.alpha);
    curv.push_back(s->spectrum.curvature);
    maj.push_back(s->intrinsic.maj);
    mn.push_back(s->intrinsic.min);
    pa.push_back(s->intrinsic.maj > 0.0 ? s->intrinsic.pa_deg
                                        : std::numeric_limits<double>::quiet_NaN());
    flags.push_back(s->flags);
    partner.push_back(s->partner_id);
  }
  t.add_i64("id", "", "meta.id;meta.main", "Source number in drawing order (0-based)", id);
  t.add_f64("ra_deg", "deg", "pos.eq.ra;meta.main", "True right ascension (ICRS)", ra);
  t.add_f64("dec_deg", "deg", "pos.eq.dec;meta.main", "True declination (ICRS)", dec);
  t.add_f64("s_ref_jy", "Jy", "phot.flux.density", "True integrated flux density at ref_freq_mhz",
            sref);
  t.add_f64("ref_freq_mhz", "MHz", "em.freq", "Reference frequency of the spectrum", fref);
  t.add_f64("alpha", "", "spect.index",
            "Spectral index at ref_freq_mhz, S proportional to nu^alpha", alpha);
  t.add_f64("curvature", "", "spect.index;arith.factor",
            "Base-10 log-parabola term: log10(S/S_ref) = alpha t + curvature t^2, "
            "t = log10(nu/ref_freq_mhz)",
            curv);
  t.add_f64("intrinsic_maj_arcsec", "arcsec", "phys.angSize.smajAxis",
            "Intrinsic major-axis FWHM (0 for a point source)", maj);
  t.add_f64("intrinsic_min_arcsec", "arcsec", "phys.angSize.sminAxis",
            "Intrinsic minor-axis FWHM (0 for a point source)", mn);
  t.add_f64("intrinsic_pa_deg", "deg", "pos.posAng",
            "Intrinsic position angle east of north (null for a point source)", pa);
  t.add_i64("sky_flags", "", "meta.code", std::string("Sky truth flags; ") + kFlagDoc, flags);
  t.add_i64("partner_id", "", "meta.id.cross",
            "id of the other member of a close double, else -1", partner);
}

}  // namespace

Table sky_truth_table(const SkyModel& model) {
  Table t;
  t.name = "truth";
  std::vector<const SkySource*> rows;
  for (const auto& s : model.sources) rows.push_back(&s);
  add_sky_columns(t, rows);
  t.set_meta("conventions", "ICRS degrees; FWHM sizes; PA east of north; S ~ nu^alpha");
  t.check_consistent();
  return t;
}

Table band_truth_table(const std::vector<SkySource>& sky_sources,
                       const std::vector<BandSource>& band_sources, double freq_hz,
                       const Beam& beam) {
  std::unordered_map<std::int64_t, const SkySource*> by_id;
  for (const auto& s : sky_sources) by_id.emplace(s.id, &s);
  std::vector<const SkySource*> rows;
  for (const auto& b : band_sources) {
    auto it = by_id.find(b.id);
    if (it == by_id.end())
      throw std::invalid_argument("band_truth_table: band source id " + std::to_string(b.id) +
                                  " is not among the sky sources");
    rows.push_back(it->second);
  }
  Table t;
  t.name = "band_truth";
  add_sky_columns(t, rows);
  std::vector<double> x, y, strue, pb, sint, peak, cmaj, cmin, cpa, rms, snr;
  std::vector<std::int64_t> flags;
  for (const auto& b : band_sources) {
    x.push_back(b.x + 1.0);  // FITS 1-based (constants.h)
    y.push_back(b.y + 1.0);
    strue.push_back(b.s_true_jy);
    pb.push_back(b.pb);
    sint.push_back(b.s_int_jy);
    peak.push_back(b.peak_jy_per_beam);
    cmaj.push_back(b.convolved.maj);
    cmin.push_back(b.convolved.min);
    cpa.push_back(b.convolved.pa_deg);
    rms.push_back(b.local_rms_jy_per_beam);
    snr.push_back(b.local_rms_jy_per_beam > 0.0 && std::isfinite(b.local_rms_jy_per_beam)
                      ? b.peak_jy_per_beam / b.local_rms_jy_per_beam
                      : std::numeric_limits<double>::quiet_NaN());
    flags.push_back(b.flags);
  }
  t.add_f64("x_pix1", "pix", "pos.cartesian.x;instr.pixel",
            "True centre along FITS axis 1 (1-based FITS pixel)", x);
  t.add_f64("y_pix1", "pix", "pos.cartesian.y;instr.pixel",
            "True centre along FITS axis 2 (1-based FITS pixel)", y);
  t.add_f64("s_true_jy", "Jy", "phot.flux.density",
            "True integrated flux density on the sky at this band's frequency", strue);
  t.add_f64("pb", "", "instr.beam;arith.factor",
            "Primary-beam value at the centre (1 without a primary beam)", pb);
  t.add_f64("s_int_jy", "Jy", "phot.flux.density",
            "Integrated flux density as rendered in this image (true x pb in an apparent image)",
            sint);
  t.add_f64("peak_jy_per_beam", "Jy/beam", "phot.flux.density;stat.max",
            "Analytic peak of the beam-convolved Gaussian in this image", peak);
  t.add_f64("convolved_maj_arcsec", "arcsec", "phys.angSize.smajAxis",
            "Major-axis FWHM of the source convolved with this band's beam", cmaj);
  t.add_f64("convolved_min_arcsec", "arcsec", "phys.angSize.sminAxis",
            "Minor-axis FWHM of the source convolved with this band's beam", cmin);
  t.add_f64("convolved_pa_deg", "deg", "pos.posAng",
            "Position angle east of north of the convolved shape", cpa);
  t.add_f64("local_rms_jy_per_beam", "Jy/beam", "stat.stdev;phot.flux.density",
            "Noise rms of this image at the centre (null when unknown)", rms);
  t.add_f64("snr_true", "", "stat.snr",
            "True peak signal-to-noise: peak_jy_per_beam / local_rms_jy_per_beam", snr);
  t.add_i64("flags", "", "meta.code", std::string("Truth flags in this band; ") + kFlagDoc, flags);
  t.set_meta("freq_mhz", fmt(freq_hz / 1e6));
  t.set_meta("beam_maj_arcsec", fmt(beam.maj_arcsec));
  t.set_meta("beam_min_arcsec", fmt(beam.min_arcsec));
  t.set_meta("beam_pa_deg", fmt(beam.pa_deg));
  t.set_meta("conventions", "ICRS degrees; FWHM sizes; PA east of north; S ~ nu^alpha; "
                            "pixel columns 1-based FITS pixels");
  t.check_consistent();
  return t;
}

}  // namespace skerry::sim
