// Component, island and source tables: column names, units, UCD1+ words and
// descriptions (IVOA UCD1+ controlled vocabulary 1.6, REF-VO-02).
#include "extract/catalogue_tables.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <stdexcept>

namespace skerry {

namespace {

// UCD1+ words [IVOA UCD1+ list 1.6, REF-VO-02]. The radio band words split the
// spectrum at 20, 100, 200, 400, 750, 1500, 3000 MHz, 6, 12, 30 GHz (from memory
// of the list; each is a word of the em.radio branch).
std::string flux_ucd(const std::string& base, double freq_hz) {
  const std::string band = radio_band_ucd(freq_hz);
  return band.empty() ? base : base + ";" + band;
}

constexpr std::size_t kMaxColumns = 64;

struct Columns {
  Table& t;
  Column& f(const std::string& name, const std::string& unit, const std::string& ucd,
            const std::string& desc, std::size_t n) {
    Column& c = t.add_f64(name, unit, ucd, desc);
    c.f64.reserve(n);
    return c;
  }
  Column& i(const std::string& name, const std::string& unit, const std::string& ucd,
            const std::string& desc, std::size_t n) {
    Column& c = t.add_i64(name, unit, ucd, desc);
    c.i64.reserve(n);
    return c;
  }
};

void put_meta(Table& t, const Provenance& meta) {
  for (const auto& [k, v] : convention_meta()) t.set_meta(k, v);
  for (const auto& [k, v] : meta) t.set_meta(k, v);
}

}  // namespace

std::string radio_band_ucd(double f) {
  if (!(f > 0.0) || !std::isfinite(f)) return "";
  const double mhz = f / 1e6;
  if (mhz < 20) return "";
  if (mhz < 100) return "em.radio.20-100MHz";
  if (mhz < 200) return "em.radio.100-200MHz";
  if (mhz < 400) return "em.radio.200-400MHz";
  if (mhz < 750) return "em.radio.400-750MHz";
  if (mhz < 1500) return "em.radio.750-1500MHz";
  if (mhz < 3000) return "em.radio.1500-3000MHz";
  if (mhz < 6000) return "em.radio.3-6GHz";
  if (mhz < 12000) return "em.radio.6-12GHz";
  if (mhz < 30000) return "em.radio.12-30GHz";
  return "";
}

Provenance convention_meta() {
  Provenance p = {
      {"convention_frame", "positions are ICRS (degrees)"},
      {"convention_position_angle", "position angles in degrees east of north; ellipses in [0, 180)"},
      {"convention_sizes", "sizes are FWHM; maj/min are beam-convolved, intrinsic_* deconvolved"},
      {"convention_spectral_index", "S proportional to nu^alpha"},
      {"convention_pixels", "*_pix1 columns are 1-based FITS pixels (1.0 = centre of the first pixel); boxes inclusive"},
      {"convention_ra_error", "ra_err_arcsec is the error of RA*cos(Dec)"},
      {"convention_snr", "snr = fitted peak / local rms; peak_snr (islands) = largest (I - B)/rms"},
      {"convention_flags", "flags holds quality warnings (bit k set: flag_bit<k> applies; 0 = no known problem); "
                           "info_bits holds informational bits (bit k set: info_bit<k> applies)"},
  };
  for (const auto& f : flag_table()) {
    int k = 0;
    while ((1u << k) != f.bit) ++k;
    p.emplace_back("flag_bit" + std::to_string(k), std::string(f.name) + ": " + f.description);
  }
  for (const auto& f : info_bit_table()) {
    int k = 0;
    while ((1u << k) != f.bit) ++k;
    p.emplace_back("info_bit" + std::to_string(k), std::string(f.name) + ": " + f.description);
  }
  return p;
}

void sort_components(std::vector<CatalogueComponent>& rows) {
  std::stable_sort(rows.begin(), rows.end(), [](const CatalogueComponent& a, const CatalogueComponent& b) {
    if (a.island_id != b.island_id) return a.island_id < b.island_id;
    return a.component < b.component;
  });
}

std::string designation(const std::string& prefix, double ra_deg, double dec_deg) {
  if (!std::isfinite(ra_deg) || !std::isfinite(dec_deg)) return "";
  // Truncated, never rounded (IAU recommendations for nomenclature; docs/CONVENTIONS.md).
  double ra = std::fmod(ra_deg, 360.0);
  if (ra < 0) ra += 360.0;
  // Tenths of a second of time; the small relative guard keeps exact values
  // (e.g. 12h00m00.0s given as 179.99999999999997) from dropping a tenth.
  const long long ra_t = static_cast<long long>(std::floor(ra / 15.0 * 36000.0 * (1.0 + 1e-15)));
  const long long h = ra_t / 36000, m = (ra_t / 600) % 60, s10 = ra_t % 600;
  const double ad = std::abs(dec_deg);
  const long long dec_s = static_cast<long long>(std::floor(ad * 3600.0 * (1.0 + 1e-15)));
  const long long d = dec_s / 3600, dm = (dec_s / 60) % 60, ds = dec_s % 60;
  char buf[64];
  std::snprintf(buf, sizeof buf, "J%02lld%02lld%02lld.%lld%c%02lld%02lld%02lld", h % 24, m, s10 / 10,
                s10 % 10, dec_deg < 0 ? '-' : '+', d, dm, ds);
  return prefix.empty() ? std::string(buf) : prefix + " " + buf;
}

Table make_component_table(const std::vector<CatalogueComponent>& rows, const Provenance& meta,
                           double freq_hz) {
  Table t;
  t.name = "components";
  put_meta(t, meta);
  // Column references below stay valid only while the column vector does not
  // reallocate: reserve more than any table here holds.
  t.columns().reserve(kMaxColumns);
  const std::size_t n = rows.size();
  Columns c{t};
  const std::string fd = flux_ucd("phot.flux.density", freq_hz);
  auto& id = c.i("component_id", "", "meta.id;meta.main", "Component number, 1-based, in row order", n);
  auto& isl = c.i("island_id", "", "meta.id.parent", "Island the component belongs to (islands table)", n);
  auto& cmp = c.i("component", "", "meta.number", "Index of the component within its island, 1-based (1 = brightest)", n);
  auto& src = c.i("source_id", "", "meta.id.parent", "Source the component belongs to (sources table)", n);
  auto& ra = c.f("ra_deg", "deg", "pos.eq.ra;meta.main", "Right ascension of the fitted centre (ICRS)", n);
  auto& dec = c.f("dec_deg", "deg", "pos.eq.dec;meta.main", "Declination of the fitted centre (ICRS)", n);
  auto& rae = c.f("ra_err_arcsec", "arcsec", "stat.error;pos.eq.ra", "1-sigma error of RA*cos(Dec), systematic floor included", n);
  auto& dece = c.f("dec_err_arcsec", "arcsec", "stat.error;pos.eq.dec", "1-sigma error of Dec, systematic floor included", n);
  auto& xp = c.f("x_pix1", "pixel", "pos.cartesian.x", "Fitted centre along FITS axis 1, 1-based pixels", n);
  auto& yp = c.f("y_pix1", "pixel", "pos.cartesian.y", "Fitted centre along FITS axis 2, 1-based pixels", n);
  auto& sp = c.f("s_peak_jy_per_beam", "Jy/beam", flux_ucd("phot.flux.density;stat.max", freq_hz), "Fitted peak flux density (apparent)", n);
  auto& spe = c.f("s_peak_err_jy_per_beam", "Jy/beam", "stat.error;phot.flux.density", "1-sigma error of the peak, flux-scale term included", n);
  auto& si = c.f("s_int_jy", "Jy", fd, "Integrated flux density S_peak maj min / (bmaj bmin) (apparent)", n);
  auto& sie = c.f("s_int_err_jy", "Jy", "stat.error;phot.flux.density", "1-sigma error of the integrated flux density, flux-scale term included", n);
  auto& mj = c.f("maj_arcsec", "arcsec", "phys.angSize.smajAxis", "Major-axis FWHM of the fitted (beam-convolved) Gaussian", n);
  auto& mje = c.f("maj_err_arcsec", "arcsec", "stat.error;phys.angSize.smajAxis", "1-sigma error of maj_arcsec", n);
  auto& mn = c.f("min_arcsec", "arcsec", "phys.angSize.sminAxis", "Minor-axis FWHM of the fitted (beam-convolved) Gaussian", n);
  auto& mne = c.f("min_err_arcsec", "arcsec", "stat.error;phys.angSize.sminAxis", "1-sigma error of min_arcsec", n);
  auto& pa = c.f("pa_deg", "deg", "pos.posAng", "Position angle of the fitted major axis, east of north, [0, 180)", n);
  auto& pae = c.f("pa_err_deg", "deg", "stat.error;pos.posAng", "1-sigma error of pa_deg", n);
  auto& dmj = c.f("intrinsic_maj_arcsec", "arcsec", "phys.angSize.smajAxis", "Deconvolved major-axis FWHM; an upper limit when info_bits has unresolved", n);
  auto& dmje = c.f("intrinsic_maj_err_arcsec", "arcsec", "stat.error;phys.angSize.smajAxis", "1-sigma error of intrinsic_maj_arcsec (NaN for an upper limit)", n);
  auto& dmn = c.f("intrinsic_min_arcsec", "arcsec", "phys.angSize.sminAxis", "Deconvolved minor-axis FWHM; an upper limit when info_bits has unresolved", n);
  auto& dmne = c.f("intrinsic_min_err_arcsec", "arcsec", "stat.error;phys.angSize.sminAxis", "1-sigma error of intrinsic_min_arcsec (NaN for an upper limit)", n);
  auto& dpa = c.f("intrinsic_pa_deg", "deg", "pos.posAng", "Position angle of the deconvolved major axis, east of north, [0, 180)", n);
  auto& dpae = c.f("intrinsic_pa_err_deg", "deg", "stat.error;pos.posAng", "1-sigma error of intrinsic_pa_deg", n);
  auto& bg = c.f("background_jy_per_beam", "Jy/beam", "phot.flux.density;instr.skyLevel", "Local background at the centre (subtracted before fitting)", n);
  auto& rms = c.f("rms_jy_per_beam", "Jy/beam", "stat.stdev;phot.flux.density", "Local noise rms at the centre", n);
  auto& snr = c.f("snr", "", "stat.snr", "Component SNR: fitted peak / local rms", n);
  auto& chi = c.f("chi2_red", "", "stat.fit.chi2", "Reduced chi-square of the island's fit (whitened residuals)", n);
  auto& res = c.i("resolved", "", "meta.code", "1 when S_int/S_peak lies above the SNR-dependent envelope, else 0", n);
  auto& pb = c.f("pb", "", "phys.transmission;instr.beam", "Primary-beam response at the centre (NaN: no primary beam given)", n);
  auto& spc = c.f("s_peak_pbcor_jy_per_beam", "Jy/beam", flux_ucd("phot.flux.density;stat.max", freq_hz), "Primary-beam corrected peak flux density", n);
  auto& sic = c.f("s_int_pbcor_jy", "Jy", fd, "Primary-beam corrected integrated flux density", n);
  auto& sice = c.f("s_int_pbcor_err_jy", "Jy", "stat.error;phot.flux.density", "1-sigma error of s_int_pbcor_jy", n);
  auto& fl = c.i("flags", "", "meta.code.qual", "Quality warnings: bitmask, 0 = none (meta keys flag_bit<k>)", n);
  auto& ib = c.i("info_bits", "", "meta.code", "Informational bits: bitmask (meta keys info_bit<k>)", n);
  std::int64_t k = 0;
  for (const auto& r : rows) {
    id.i64.push_back(++k);
    isl.i64.push_back(r.island_id);
    cmp.i64.push_back(r.component);
    src.i64.push_back(r.source_id);
    ra.f64.push_back(r.ra_deg);
    dec.f64.push_back(r.dec_deg);
    rae.f64.push_back(r.ra_err_arcsec);
    dece.f64.push_back(r.dec_err_arcsec);
    xp.f64.push_back(r.x_pix + 1.0);  // 0-based -> FITS 1-based
    yp.f64.push_back(r.y_pix + 1.0);
    sp.f64.push_back(r.s_peak_jy_per_beam);
    spe.f64.push_back(r.s_peak_err_jy_per_beam);
    si.f64.push_back(r.s_int_jy);
    sie.f64.push_back(r.s_int_err_jy);
    mj.f64.push_back(r.fitted_arcsec.maj);
    mje.f64.push_back(r.maj_err_arcsec);
    mn.f64.push_back(r.fitted_arcsec.min);
    mne.f64.push_back(r.min_err_arcsec);
    pa.f64.push_back(r.fitted_arcsec.pa_deg);
    pae.f64.push_back(r.pa_err_deg);
    dmj.f64.push_back(r.deconv_arcsec.maj);
    dmje.f64.push_back(r.intrinsic_maj_err_arcsec);
    dmn.f64.push_back(r.deconv_arcsec.min);
    dmne.f64.push_back(r.intrinsic_min_err_arcsec);
    dpa.f64.push_back(r.deconv_arcsec.pa_deg);
    dpae.f64.push_back(r.intrinsic_pa_err_deg);
    bg.f64.push_back(r.background_jy_per_beam);
    rms.f64.push_back(r.rms_jy_per_beam);
    snr.f64.push_back(r.snr);
    chi.f64.push_back(r.chi2_red);
    res.i64.push_back(r.resolved ? 1 : 0);
    pb.f64.push_back(r.pb);
    spc.f64.push_back(r.s_peak_pbcor_jy_per_beam);
    sic.f64.push_back(r.s_int_pbcor_jy);
    sice.f64.push_back(r.s_int_pbcor_err_jy);
    fl.i64.push_back(static_cast<std::int64_t>(r.flags));
    ib.i64.push_back(static_cast<std::int64_t>(r.info_bits));
  }
  if (t.ncols() > kMaxColumns) throw std::logic_error("component table: too many columns");
  t.check_consistent();
  return t;
}

Table make_island_table(const std::vector<IslandRecord>& rows, const Provenance& meta,
                        double freq_hz) {
  Table t;
  t.name = "islands";
  put_meta(t, meta);
  // Column references below stay valid only while the column vector does not
  // reallocate: reserve more than any table here holds.
  t.columns().reserve(kMaxColumns);
  const std::size_t n = rows.size();
  Columns c{t};
  auto& id = c.i("island_id", "", "meta.id;meta.main", "Island id = value in the label map (NAME.island_map.fits)", n);
  auto& nc = c.i("n_components", "", "meta.number", "Number of fitted components", n);
  auto& np = c.i("n_pixels", "pixel", "meta.number", "Number of pixels of the island", n);
  auto& s = c.f("s_pix_jy", "Jy", flux_ucd("phot.flux.density", freq_hz), "Pixel sum of (image - background) over the island / beam area in pixels", n);
  auto& se = c.f("s_pix_err_jy", "Jy", "stat.error;phot.flux.density", "1-sigma error of s_pix_jy for beam-correlated noise: sqrt(sum_ij s_i s_j rho_ij) / beam area in pixels", n);
  auto& pk = c.f("peak_jy_per_beam", "Jy/beam", flux_ucd("phot.flux.density;stat.max", freq_hz), "(image - background) at the pixel of largest SNR", n);
  auto& ps = c.f("peak_snr", "", "stat.snr", "Island SNR: largest (image - background) / rms over its pixels", n);
  auto& px = c.f("peak_x_pix1", "pixel", "pos.cartesian.x", "Pixel of largest SNR along FITS axis 1, 1-based", n);
  auto& py = c.f("peak_y_pix1", "pixel", "pos.cartesian.y", "Pixel of largest SNR along FITS axis 2, 1-based", n);
  auto& pra = c.f("peak_ra_deg", "deg", "pos.eq.ra", "Right ascension of that pixel (ICRS)", n);
  auto& pdec = c.f("peak_dec_deg", "deg", "pos.eq.dec", "Declination of that pixel (ICRS)", n);
  auto& x0 = c.i("x_min_pix1", "pixel", "pos.cartesian.x;stat.min", "Bounding box: first column, 1-based inclusive", n);
  auto& x1 = c.i("x_max_pix1", "pixel", "pos.cartesian.x;stat.max", "Bounding box: last column, 1-based inclusive", n);
  auto& y0 = c.i("y_min_pix1", "pixel", "pos.cartesian.y;stat.min", "Bounding box: first row, 1-based inclusive", n);
  auto& y1 = c.i("y_max_pix1", "pixel", "pos.cartesian.y;stat.max", "Bounding box: last row, 1-based inclusive", n);
  auto& rr = c.f("residual_rms_jy_per_beam", "Jy/beam", "stat.fit.residual", "rms of (image - background - model) over the island's pixels", n);
  auto& mr = c.f("mean_rms_jy_per_beam", "Jy/beam", "stat.stdev;phot.flux.density", "Mean local noise rms over the island's pixels", n);
  auto& fl = c.i("flags", "", "meta.code.qual", "Quality warnings: bitmask, 0 = none (meta keys flag_bit<k>)", n);
  for (const auto& r : rows) {
    id.i64.push_back(r.island_id);
    nc.i64.push_back(r.n_components);
    np.i64.push_back(r.n_pixels);
    s.f64.push_back(r.s_pix_jy);
    se.f64.push_back(r.s_pix_err_jy);
    pk.f64.push_back(r.peak_jy_per_beam);
    ps.f64.push_back(r.peak_snr);
    px.f64.push_back(r.peak_x_pix + 1.0);
    py.f64.push_back(r.peak_y_pix + 1.0);
    pra.f64.push_back(r.peak_ra_deg);
    pdec.f64.push_back(r.peak_dec_deg);
    x0.i64.push_back(r.x0 + 1);
    x1.i64.push_back(r.x1 + 1);
    y0.i64.push_back(r.y0 + 1);
    y1.i64.push_back(r.y1 + 1);
    rr.f64.push_back(r.residual_rms_jy_per_beam);
    mr.f64.push_back(r.mean_rms_jy_per_beam);
    fl.i64.push_back(static_cast<std::int64_t>(r.flags));
  }
  if (t.ncols() > kMaxColumns) throw std::logic_error("island table: too many columns");
  t.check_consistent();
  return t;
}

Table make_source_table(const std::vector<CatalogueSource>& sources,
                        const Provenance& meta, double freq_hz, const std::string& prefix) {
  Table t;
  t.name = "sources";
  put_meta(t, meta);
  // Column references below stay valid only while the column vector does not
  // reallocate: reserve more than any table here holds.
  t.columns().reserve(kMaxColumns);
  const std::size_t n = sources.size();
  Columns c{t};
  auto& id = c.i("source_id", "", "meta.id;meta.main", "Source number, 1-based", n);
  auto& name = t.add_text("designation", "", "meta.id", "IAU-style designation from the position, truncated");
  auto& nc = c.i("n_components", "", "meta.number", "Number of components grouped into the source", n);
  auto& ni = c.i("n_islands", "", "meta.number", "Number of islands the components come from", n);
  auto& ra = c.f("ra_deg", "deg", "pos.eq.ra;meta.main", "Flux-weighted mean position of the components (ICRS)", n);
  auto& dec = c.f("dec_deg", "deg", "pos.eq.dec;meta.main", "Flux-weighted mean position of the components (ICRS)", n);
  auto& rae = c.f("ra_err_arcsec", "arcsec", "stat.error;pos.eq.ra", "1-sigma error of RA*cos(Dec) of the weighted mean", n);
  auto& dece = c.f("dec_err_arcsec", "arcsec", "stat.error;pos.eq.dec", "1-sigma error of Dec of the weighted mean", n);
  auto& si = c.f("s_int_jy", "Jy", flux_ucd("phot.flux.density", freq_hz), "Total flux density: s_int_pix_jy where the apertures' residual flux sum(data - model) reaches catalogue.residual_flux_snr of its error, else s_int_model_jy (see s_int_method)", n);
  auto& sie = c.f("s_int_err_jy", "Jy", "stat.error;phot.flux.density", "1-sigma error of s_int_jy", n);
  auto& sim = t.add_text("s_int_method", "", "meta.code", "Which estimate s_int_jy is: model (components' sum) or pixels (apertures' pixel flux)");
  auto& sm = c.f("s_int_model_jy", "Jy", flux_ucd("phot.flux.density", freq_hz), "Sum of the components' integrated flux densities", n);
  auto& sme = c.f("s_int_model_err_jy", "Jy", "stat.error;phot.flux.density", "1-sigma error: components' errors in quadrature", n);
  auto& spx = c.f("s_int_pix_jy", "Jy", flux_ucd("phot.flux.density", freq_hz), "Pixel flux: sum of (image - background) over the islands' apertures (each island grown by catalogue.aperture_margin_beams)", n);
  auto& spxe = c.f("s_int_pix_err_jy", "Jy", "stat.error;phot.flux.density", "1-sigma error: the apertures' pixel-sum errors in correlated noise, in quadrature", n);
  auto& cra = c.f("centroid_ra_deg", "deg", "pos.eq.ra", "Intensity-weighted centroid of the islands' positive pixels (ICRS)", n);
  auto& cdec = c.f("centroid_dec_deg", "deg", "pos.eq.dec", "Intensity-weighted centroid of the islands' positive pixels (ICRS)", n);
  auto& sp = c.f("s_peak_max_jy_per_beam", "Jy/beam", flux_ucd("phot.flux.density;stat.max", freq_hz), "Peak flux density of the brightest component", n);
  auto& las = c.f("las_arcsec", "arcsec", "phys.angSize", "Largest angular size from the deconvolved component extents (0 for one unresolved component)", n);
  auto& lase = c.f("las_emission_arcsec", "arcsec", "phys.angSize", "Largest angular size from the emission: islands' diameter at their boundary contour, a point source's diameter at that level removed in quadrature", n);
  auto& morph = t.add_text("structure", "", "src.morph.type", "compact (one component), composite (several components), diffuse (island residuals above the noise)");
  auto& isls = t.add_text("island_ids", "", "meta.id.cross", "Islands of the source, ';'-separated");
  auto& fl = c.i("flags", "", "meta.code.qual", "Quality warnings: OR of the components' warnings plus source warnings, 0 = none (meta keys flag_bit<k>)", n);
  auto& ib = c.i("info_bits", "", "meta.code", "Informational bits: OR of the components' bits plus source bits (meta keys info_bit<k>)", n);
  for (const auto& s : sources) {
    id.i64.push_back(s.id);
    name.text.push_back(designation(prefix, s.ra_deg, s.dec_deg));
    nc.i64.push_back(static_cast<std::int64_t>(s.components.size()));
    ni.i64.push_back(static_cast<std::int64_t>(s.islands.size()));
    ra.f64.push_back(s.ra_deg);
    dec.f64.push_back(s.dec_deg);
    rae.f64.push_back(s.ra_err_arcsec);
    dece.f64.push_back(s.dec_err_arcsec);
    si.f64.push_back(s.s_int_jy);
    sie.f64.push_back(s.s_int_err_jy);
    sim.text.push_back(s.s_int_from_pixels ? "pixels" : "model");
    sm.f64.push_back(s.s_int_model_jy);
    sme.f64.push_back(s.s_int_model_err_jy);
    spx.f64.push_back(s.s_int_pix_jy);
    spxe.f64.push_back(s.s_int_pix_err_jy);
    cra.f64.push_back(s.centroid_ra_deg);
    cdec.f64.push_back(s.centroid_dec_deg);
    sp.f64.push_back(s.s_peak_max_jy_per_beam);
    las.f64.push_back(s.las_arcsec);
    lase.f64.push_back(s.las_emission_arcsec);
    morph.text.push_back(structure_name(s.structure));
    std::string ids;
    for (std::size_t k = 0; k < s.islands.size(); ++k) ids += (k ? ";" : "") + std::to_string(s.islands[k]);
    isls.text.push_back(ids);
    fl.i64.push_back(static_cast<std::int64_t>(s.flags));
    ib.i64.push_back(static_cast<std::int64_t>(s.info_bits));
  }
  if (t.ncols() > kMaxColumns) throw std::logic_error("source table: too many columns");
  t.check_consistent();
  return t;
}

}  // namespace skerry
