// The extract job (extract_job.h): noise maps, islands, fits and the catalogue
// of one image, in memory.
#include "extract/extract_job.h"

#include <oneapi/tbb/blocked_range.h>
#include <oneapi/tbb/parallel_for.h>

#include <Eigen/Eigenvalues>
#include <Eigen/LU>
#include <algorithm>
#include <array>
#include <chrono>
#include <cmath>
#include <filesystem>
#include <limits>
#include <stdexcept>

#include "app/errors.h"
#include "app/version.h"
#include "io/wcs.h"
#include "skerry/constants.h"
#include "skerry/gaussian.h"

namespace skerry {
namespace {

/// Wall time of one stage: its start reported through ExtractHooks::stage_started,
/// its end and wall time through ExtractHooks::stage by stop().
class Stage {
 public:
  Stage(const ExtractHooks& hooks, std::string name)
      : hooks_(hooks), name_(std::move(name)), t0_(std::chrono::steady_clock::now()) {
    if (hooks_.stage_started) hooks_.stage_started(name_);
  }
  void stop() {
    const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0_).count();
    if (hooks_.stage) hooks_.stage(name_, s);
  }

 private:
  const ExtractHooks& hooks_;
  std::string name_;
  std::chrono::steady_clock::time_point t0_;
};

/// The beam in the pixel frame at one position.
struct BeamGeometry {
  LocalGeometry local;
  Eigen::Matrix2d beam_cov_pix;   ///< beam covariance [pix^2]
  double beam_area_pix = 0.0;     ///< 2 pi sqrt(det C) = pi bmaj bmin / (4 ln 2 |dx dy|) (REF-GAUSS-03)
  double beam_fwhm_pix = 0.0;     ///< geometric-mean FWHM sqrt(bmaj bmin) [pix]
  double beam_maj_pix = 0.0;      ///< major FWHM [pix]
};

std::optional<BeamGeometry> geometry_at(const PixelSky& wcs, const Beam& beam, double x, double y) {
  auto lg = local_geometry(wcs, x, y);
  if (!lg) return std::nullopt;
  BeamGeometry g;
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

SkyBeam make_sky_beam(const SkyImage& sky, const ExtractConfig& cfg) {
  try {
    return SkyBeam(sky.wcs, sky.frame, sky.beam, cfg.beam_pa_in_image_frame);
  } catch (const std::exception& e) {
    throw InputError(sky.path, std::string("cannot turn the Galactic beam PA into ICRS: ") + e.what());
  }
}

/// The image's beam at its centre (PA east of ICRS north).
Beam centre_beam(const SkyImage& sky, const SkyBeam& sky_beam) {
  const long nx = sky.pixels.cols(), ny = sky.pixels.rows();
  const auto b = sky_beam.at(0.5 * static_cast<double>(nx - 1), 0.5 * static_cast<double>(ny - 1));
  return b ? *b : sky.beam;
}

/// The checks of check_extract_image; returns the beam geometry at the centre.
BeamGeometry checked_centre(const SkyImage& sky, const Beam& beam) {
  bool any = false;
  for (long i = 0; i < sky.pixels.size() && !any; ++i) any = std::isfinite(sky.pixels.data()[i]);
  if (!any) throw NoDataError(sky.path, "every pixel is blank (NaN or BLANK)");
  const long nx = sky.pixels.cols(), ny = sky.pixels.rows();
  const auto g = geometry_at(*sky.wcs, beam, 0.5 * static_cast<double>(nx - 1), 0.5 * static_cast<double>(ny - 1));
  if (!g) throw InputError(sky.path, "the image centre has no sky position or the beam has no extent in pixels");
  if (g->beam_fwhm_pix < 1.0)
    throw InputError(sky.path, "restoring beam spans " + std::to_string(g->beam_fwhm_pix) +
                                   " pixels (FWHM): the image is undersampled (need >= 1 pixel per beam)");
  return *g;
}

void check_beam(const SkyImage& sky) {
  if (!sky.beam.valid())
    throw InputError(sky.path, "restoring beam is degenerate (BMAJ/BMIN must be positive, BMIN <= BMAJ)");
}

// ---- noise maps and islands ------------------------------------------------------------

/// Estimated, user and fixed parts of the noise maps.
class NoiseSource {
 public:
  NoiseSource(const SkyImage& sky, const ExtractInputs& in, const ExtractConfig& cfg, const BeamGeometry& centre)
      : sky_(sky), in_(in), cfg_(cfg) {
    bgo_ = cfg.noise;
    bgo_.beam_fwhm_pix = centre.beam_fwhm_pix;
    bgo_.beam_area_pix = centre.beam_area_pix;
    if (const std::string e = bgo_.validate(); !e.empty()) throw UsageError("noise: " + e);
    estimate_bg_ = in.background_map.size() == 0 && !cfg.fixed_background;
    estimate_rms_ = in.rms_map.size() == 0 && !cfg.fixed_rms;
  }
  bool estimates() const { return estimate_bg_ || estimate_rms_; }

  /// The maps of one pass (`mask`: pixels left out of the estimate).
  NoiseMaps pass(const MaskU8* mask) const {
    if (!estimates()) return combine(nullptr);
    const BackgroundResult r = estimate_background(sky_.pixels, bgo_, mask);
    if (r.status == BackgroundStatus::no_data)
      throw NoDataError(sky_.path, "no box of the noise grid has enough unblanked pixels: " + r.message);
    if (r.status == BackgroundStatus::zero_rms && estimate_rms_)
      throw NoDataError(sky_.path, "the noise rms is zero everywhere (a constant or noiseless image?); "
                                   "give noise.fixed_rms or noise.rms_map");
    return combine(&r.maps);
  }

 private:
  NoiseMaps combine(const NoiseMaps* est) const {
    const long nx = sky_.pixels.cols(), ny = sky_.pixels.rows();
    const float fixed_bg = static_cast<float>(cfg_.fixed_background.value_or(0.0));
    const float fixed_rms = static_cast<float>(cfg_.fixed_rms.value_or(0.0));
    if (!estimates() && in_.background_map.size() == 0 && in_.rms_map.size() == 0)
      return NoiseMaps::constant(static_cast<int>(nx), static_cast<int>(ny), fixed_bg, fixed_rms);
    if (estimate_bg_ && estimate_rms_) return *est;
    ImageF b = in_.background_map.size() ? in_.background_map
               : cfg_.fixed_background   ? ImageF::Constant(ny, nx, fixed_bg)
                                         : est->background_image();
    ImageF s = in_.rms_map.size() ? in_.rms_map
               : cfg_.fixed_rms   ? ImageF::Constant(ny, nx, fixed_rms)
                                  : est->rms_image();
    return NoiseMaps::from_images(std::move(b), std::move(s));
  }

  const SkyImage& sky_;
  const ExtractInputs& in_;
  const ExtractConfig& cfg_;
  BackgroundOptions bgo_;
  bool estimate_bg_ = true, estimate_rms_ = true;
};

/// Noise maps (one or two passes) and the islands found with the final maps.
IslandResult noise_and_islands(const SkyImage& sky, const ExtractInputs& in, const ExtractConfig& cfg,
                               const BeamGeometry& centre, const ExtractHooks& hooks, ExtractResult& out) {
  const NoiseSource noise(sky, in, cfg, centre);
  Stage t_noise(hooks, "noise_pass1");
  out.maps = noise.pass(nullptr);
  out.noise_passes = noise.estimates() ? 1 : 0;
  t_noise.stop();
  if (noise.estimates() && cfg.second_pass) {
    Stage t_i1(hooks, "islands_pass1");
    IslandResult first = find_islands(sky.pixels, out.maps, cfg.islands);
    t_i1.stop();
    Stage t_n2(hooks, "noise_pass2");
    const int margin = static_cast<int>(std::ceil(cfg.mask_margin_beams * centre.beam_fwhm_pix));
    MaskU8 mask = grow_mask(first.labels, margin);
    first = IslandResult{};
    out.maps = noise.pass(&mask);
    out.noise_passes = 2;
    t_n2.stop();
  }
  Stage t_isl(hooks, "islands");
  IslandResult isl = find_islands(sky.pixels, out.maps, cfg.islands);
  t_isl.stop();
  out.peak_snr_used = isl.peak_snr_used;
  out.grow_snr_used = isl.grow_snr_used;
  out.islands_too_small = isl.islands_too_small;
  return isl;
}

// ---- cut-outs and fits ---------------------------------------------------------------------

/// Per island: the beam there (PA east of ICRS north), its pixel geometry, the
/// pixel-sum flux error and the mean rms over the island.
struct IslandContext {
  std::vector<Beam> beam;
  std::vector<BeamGeometry> geom;
  std::vector<double> flux_err, mean_rms;
  /// Intensity-weighted centroid of the positive island pixels (0-based image
  /// pixels) and their sum [Jy/beam * pixel]; the extreme pixels in 16
  /// directions (image pixels).
  std::vector<double> cx, cy, csum;
  std::vector<std::vector<std::pair<int, int>>> extremes;
  /// Flux apertures after the fit: data and model flux [Jy], data-sum error [Jy].
  std::vector<double> ap_data, ap_model, ap_err;
};

/// Each island's flux aperture (skerry/fitting.h IslandAperture), the island
/// grown by catalogue.aperture_margin_beams major FWHMs, measured on the data
/// and the fitted model; the error of its data sum in correlated noise.
void measure_apertures(const SkyImage& sky, const ExtractConfig& cfg, const IslandResult& isl,
                       const std::vector<IslandFit>& fits, const LabelsI32& labels, const NoiseMaps& maps,
                       IslandContext& ctx) {
  const std::size_t n = isl.islands.size();
  ctx.ap_data.assign(n, NAN);
  ctx.ap_model.assign(n, NAN);
  ctx.ap_err.assign(n, NAN);
  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<std::size_t>(0, n, 8), [&](const auto& range) {
    for (std::size_t k = range.begin(); k != range.end(); ++k) {
      const BeamGeometry& g = ctx.geom[k];
      const int margin = static_cast<int>(std::lround(cfg.grouping.aperture_margin_beams * g.beam_maj_pix));
      const IslandAperture ap = island_aperture(sky.pixels, maps, labels, isl.islands[k], margin, fits[k].components);
      if (ap.n_pixels == 0) continue;
      // Pixel sums / beam area in pixels [Jy] (REF-GAUSS-04).
      ctx.ap_data[k] = ap.data_sum / g.beam_area_pix;
      ctx.ap_model[k] = ap.model_sum / g.beam_area_pix;
      ctx.ap_err[k] = pixel_sum_flux_error(ap.rms, ap.mask, g.beam_cov_pix, g.beam_area_pix);
    }
  });
}

/// Centroid and extreme pixels of one island from its cut-out (data = image -
/// background) and island mask.
void island_shape(const IslandCutout& c, const MaskU8& in_island, double& cx, double& cy, double& csum,
                  std::vector<std::pair<int, int>>& extremes) {
  constexpr int kDirs = 16;
  static const std::array<std::pair<double, double>, kDirs> dirs = [] {
    std::array<std::pair<double, double>, kDirs> d;
    for (int k = 0; k < kDirs; ++k) d[k] = {std::cos(kPi * k / (kDirs / 2)), std::sin(kPi * k / (kDirs / 2))};
    return d;
  }();
  double best[kDirs];
  extremes.assign(kDirs, {0, 0});
  for (double& b : best) b = -INFINITY;
  double sx = 0.0, sy = 0.0, sw = 0.0;
  for (long y = 0; y < in_island.rows(); ++y)
    for (long x = 0; x < in_island.cols(); ++x) {
      if (!in_island(y, x)) continue;
      const int ix = static_cast<int>(x) + c.x_origin, iy = static_cast<int>(y) + c.y_origin;
      const double v = c.data(y, x);
      if (v > 0.0) {
        sx += v * ix;
        sy += v * iy;
        sw += v;
      }
      for (int d = 0; d < kDirs; ++d) {
        const double proj = ix * dirs[d].first + iy * dirs[d].second;
        if (proj > best[d]) {
          best[d] = proj;
          extremes[d] = {ix, iy};
        }
      }
    }
  if (!(best[0] > -INFINITY)) extremes.clear();
  cx = sw > 0.0 ? sx / sw : NAN;
  cy = sw > 0.0 ? sy / sw : NAN;
  csum = sw;
}

std::vector<IslandCutout> make_cutouts(const SkyImage& sky, const ExtractConfig& cfg, const SkyBeam& sky_beam,
                                       const Beam& beam, const BeamGeometry& centre,
                                       const std::vector<Island>& islands, const LabelsI32& labels,
                                       const NoiseMaps& maps, IslandContext& ctx) {
  const std::size_t n_isl = islands.size();
  std::vector<IslandCutout> cutouts(n_isl);
  ctx.geom.resize(n_isl);
  ctx.beam.assign(n_isl, beam);
  ctx.flux_err.assign(n_isl, NAN);
  ctx.mean_rms.assign(n_isl, NAN);
  ctx.cx.assign(n_isl, NAN);
  ctx.cy.assign(n_isl, NAN);
  ctx.csum.assign(n_isl, 0.0);
  ctx.extremes.assign(n_isl, {});
  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<std::size_t>(0, n_isl, 8), [&](const auto& range) {
    for (std::size_t k = range.begin(); k != range.end(); ++k) {
      const Island& is = islands[k];
      if (const auto b = sky_beam.at(is.peak_x, is.peak_y)) ctx.beam[k] = *b;
      const auto g = geometry_at(*sky.wcs, ctx.beam[k], is.peak_x, is.peak_y);
      ctx.geom[k] = g ? *g : centre;
      MaskU8 in_island;
      cutouts[k] = cut_out_island(sky.pixels, maps, labels, is, ctx.geom[k].beam_cov_pix,
                                  cfg.fit.fit_margin_beam_sigma, &in_island, &ctx.mean_rms[k]);
      ctx.flux_err[k] = pixel_sum_flux_error(cutouts[k].rms, in_island, ctx.geom[k].beam_cov_pix,
                                             ctx.geom[k].beam_area_pix);
      island_shape(cutouts[k], in_island, ctx.cx[k], ctx.cy[k], ctx.csum[k], ctx.extremes[k]);
    }
  });
  return cutouts;
}

/// Fits the cut-outs in chunks (their memory is released as they go), in island order.
std::vector<IslandFit> fit_cutouts(std::vector<IslandCutout> cutouts, const std::vector<Island>& islands,
                                   const FitOptions& options, const ExtractHooks& hooks) {
  const std::size_t n_isl = cutouts.size();
  std::vector<IslandFit> fits;
  fits.reserve(n_isl);
  if (hooks.fit_progress) hooks.fit_progress(0, n_isl);
  constexpr std::size_t kChunk = 2048;
  for (std::size_t s = 0; s < n_isl; s += kChunk) {
    const std::size_t e = std::min(n_isl, s + kChunk);
    std::vector<IslandCutout> chunk(std::make_move_iterator(cutouts.begin() + static_cast<long>(s)),
                                    std::make_move_iterator(cutouts.begin() + static_cast<long>(e)));
    std::vector<IslandFit> part = fit_islands(chunk, options);
    for (auto& f : part) fits.push_back(std::move(f));
    if (hooks.fit_progress) hooks.fit_progress(e, n_isl);
  }
  // fit_islands sorts by id within a chunk; chunks are in id order already.
  if (fits.size() != n_isl) throw std::logic_error("fit_islands returned a different number of islands");
  for (std::size_t k = 0; k < n_isl; ++k)
    if (fits[k].island_id != islands[k].label) throw std::logic_error("fit results out of island order");
  return fits;
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
  if (c.fit_flags & kFitAddedFromResidual) b |= kInfoResidualComponents;
  return b;
}

double nan_if(bool cond, double v) { return cond ? std::numeric_limits<double>::quiet_NaN() : v; }

/// The catalogue record of fitted component `j` (0-based) of island `is`.
CatalogueComponent measure_component(const SkyImage& sky, const ExtractInputs& in, const ExtractConfig& cfg,
                                     const NoiseMaps& maps, const Island& is, const IslandFit& f,
                                     std::size_t j, const Beam& beam) {
  const long nx = sky.pixels.cols(), ny = sky.pixels.rows();
  const PixelComponent& pc = f.components[j];
  CatalogueComponent r;
  r.island_id = is.label;
  r.component = static_cast<std::int64_t>(j + 1);
  r.x_pix = pc.x;
  r.y_pix = pc.y;
  std::uint32_t flags = flags_from_fit(pc);
  std::uint32_t info = info_bits_from_fit(pc);
  if (f.n_maxima > cfg.fit.max_components || f.residual_at_cap) flags |= kFlagComponentCap;
  const long px = std::clamp(std::lround(pc.x), 0L, nx - 1), py = std::clamp(std::lround(pc.y), 0L, ny - 1);
  const bool pos_ok = std::isfinite(pc.x) && std::isfinite(pc.y);
  double pbv = NAN;
  if (in.primary_beam.size() && pos_ok) {
    pbv = in.primary_beam(py, px);
    if (!(pbv > 0.0) || !std::isfinite(pbv)) {
      flags |= kFlagNoPrimaryBeam;
      pbv = NAN;
    } else if (pbv < cfg.pb_cut) {
      flags |= kFlagBelowPbCut;
    }
  }
  const SkyComponent sc = measure_on_sky(pc, *sky.wcs, beam, cfg.sky, std::isfinite(pbv) ? pbv : 1.0);
  r.ra_deg = nan_if(!sc.valid, sc.ra_deg);
  r.dec_deg = nan_if(!sc.valid, sc.dec_deg);
  r.ra_err_arcsec = sc.ra_err_arcsec;
  r.dec_err_arcsec = sc.dec_err_arcsec;
  r.s_peak_jy_per_beam = sc.peak_jy_per_beam;
  r.s_peak_err_jy_per_beam = sc.peak_err_jy_per_beam;
  r.s_int_jy = sc.s_int_jy;
  r.s_int_err_jy = sc.s_int_err_jy;
  r.fitted_arcsec = {sc.maj_arcsec, sc.min_arcsec, sc.pa_deg};
  r.maj_err_arcsec = sc.maj_err_arcsec;
  r.min_err_arcsec = sc.min_err_arcsec;
  r.pa_err_deg = sc.pa_err_deg;
  r.deconv_arcsec = {sc.deconv_maj_arcsec, sc.deconv_min_arcsec, sc.deconv_pa_deg};
  r.deconv_maj_upper_limit = sc.deconv_maj_upper_limit;
  r.deconv_min_upper_limit = sc.deconv_min_upper_limit;
  r.intrinsic_maj_err_arcsec = nan_if(sc.deconv_maj_upper_limit, sc.deconv_maj_err_arcsec);
  r.intrinsic_min_err_arcsec = nan_if(sc.deconv_min_upper_limit, sc.deconv_min_err_arcsec);
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
  return r;
}

/// Sky measurements of every component (parallel over islands, results in island order).
std::vector<CatalogueComponent> measure_components(const SkyImage& sky, const ExtractInputs& in,
                                                   const ExtractConfig& cfg, const NoiseMaps& maps,
                                                   const IslandResult& isl, const std::vector<IslandFit>& fits,
                                                   const IslandContext& ctx) {
  const std::size_t n_isl = isl.islands.size();
  std::vector<std::vector<CatalogueComponent>> per_island(n_isl);
  oneapi::tbb::parallel_for(oneapi::tbb::blocked_range<std::size_t>(0, n_isl, 8), [&](const auto& range) {
    for (std::size_t k = range.begin(); k != range.end(); ++k)
      for (std::size_t j = 0; j < fits[k].components.size(); ++j)
        per_island[k].push_back(measure_component(sky, in, cfg, maps, isl.islands[k], fits[k], j, ctx.beam[k]));
  });
  std::vector<CatalogueComponent> comps;
  for (auto& v : per_island)
    for (auto& r : v) comps.push_back(std::move(r));
  return comps;
}

// ---- catalogue -------------------------------------------------------------------------------

/// Island records and their flags; `cat_isl` gets what grouping needs of each.
std::vector<IslandRecord> island_records(const SkyImage& sky, const ExtractConfig& cfg, const IslandResult& isl,
                                         const std::vector<IslandFit>& fits, const IslandContext& ctx,
                                         std::vector<CatalogueIsland>& cat_isl) {
  const std::size_t n_isl = isl.islands.size();
  std::vector<IslandRecord> islands(n_isl);
  cat_isl.assign(n_isl, CatalogueIsland{});
  for (std::size_t k = 0; k < n_isl; ++k) {
    const Island& is = isl.islands[k];
    const BeamGeometry& g = ctx.geom[k];
    IslandRecord& r = islands[k];
    r.island_id = is.label;
    r.n_components = static_cast<std::int64_t>(fits[k].components.size());
    r.n_pixels = is.pixels;
    // Pixel sum / beam area in pixels: Jy/beam * pixel -> Jy (REF-GAUSS-04).
    r.s_pix_jy = is.sum_minus_background / g.beam_area_pix;
    r.s_pix_err_jy = ctx.flux_err[k];
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
    r.mean_rms_jy_per_beam = ctx.mean_rms[k];
    CatalogueIsland& ci = cat_isl[k];
    ci.id = is.label;
    ci.n_pixels = static_cast<long>(is.pixels);
    ci.n_beams = static_cast<double>(is.pixels) / g.beam_area_pix;
    ci.residual_rms_jy_per_beam = r.residual_rms_jy_per_beam;
    ci.mean_rms_jy_per_beam = r.mean_rms_jy_per_beam;
    ci.aperture_data_jy = ctx.ap_data[k];
    ci.aperture_model_jy = ctx.ap_model[k];
    ci.aperture_err_jy = ctx.ap_err[k];
    if (std::isfinite(ctx.cx[k]) &&
        !sky.wcs->pix_to_sky(ctx.cx[k], ctx.cy[k], ci.centroid_ra_deg, ci.centroid_dec_deg))
      ci.centroid_ra_deg = ci.centroid_dec_deg = NAN;
    ci.centroid_weight_jy = ctx.csum[k] / g.beam_area_pix;
    for (const auto& [ex, ey] : ctx.extremes[k]) {
      double ra, dec;
      if (sky.wcs->pix_to_sky(ex, ey, ra, dec)) ci.extent_points.emplace_back(ra, dec);
    }
    ci.pixel_arcsec = std::sqrt(g.local.pixel_area_arcsec2);
    ci.peak_jy_per_beam = r.peak_jy_per_beam;
    ci.contour_jy_per_beam = isl.grow_snr_used * r.mean_rms_jy_per_beam;
    std::uint32_t f = 0;
    if (is.touches_edge) f |= kFlagNearEdge;
    if (is.touches_blank) f |= kFlagNearBlank;
    if (island_is_diffuse(ci, cfg.grouping)) f |= kFlagDiffuse;
    for (const auto& pc : fits[k].components) f |= flags_from_fit(pc) & kFlagFitFailed;
    if (fits[k].n_maxima > cfg.fit.max_components || fits[k].residual_at_cap) f |= kFlagComponentCap;
    r.flags = f;
    ci.flags = f;
  }
  return islands;
}

}  // namespace

Provenance extract_provenance(const std::string& tool, const SkyImage& sky, const std::string& image_path,
                              const std::string& image_sha256, const ExtractResult& r) {
  return {
      {"tool", tool},
      {"version", SKERRY_VERSION},
      {"git_revision", SKERRY_GIT_REVISION},
      {"input_image", std::filesystem::path(image_path).filename().string()},
      {"input_image_sha256", image_sha256},
      {"image_frame", sky.frame},
      {"beam_maj_arcsec", std::to_string(r.beam.maj_arcsec)},
      {"beam_min_arcsec", std::to_string(r.beam.min_arcsec)},
      {"beam_pa_deg", std::to_string(r.beam.pa_deg)},
      {"freq_mhz", std::isfinite(sky.freq_hz) ? std::to_string(sky.freq_hz / 1e6) : std::string("unknown")},
      {"peak_snr_used", std::to_string(r.peak_snr_used)},
      {"grow_snr_used", std::to_string(r.grow_snr_used)},
      {"noise_passes", std::to_string(r.noise_passes)},
  };
}

void check_extract_image(const SkyImage& sky, const ExtractConfig& cfg) {
  check_beam(sky);
  checked_centre(sky, centre_beam(sky, make_sky_beam(sky, cfg)));
}

NoiseStageResult run_noise_stage(const SkyImage& sky, const ExtractInputs& in, const ExtractConfig& cfg,
                                 const ExtractHooks& hooks) {
  check_beam(sky);
  const SkyBeam sky_beam = make_sky_beam(sky, cfg);
  ExtractResult out;
  out.beam = centre_beam(sky, sky_beam);
  const BeamGeometry centre = checked_centre(sky, out.beam);
  noise_and_islands(sky, in, cfg, centre, hooks, out);
  NoiseStageResult r;
  r.beam = out.beam;
  r.maps = std::move(out.maps);
  r.noise_passes = out.noise_passes;
  return r;
}

ExtractResult run_extract_job(const SkyImage& sky, const ExtractInputs& in, const ExtractConfig& cfg,
                              const ExtractHooks& hooks) {
  check_beam(sky);
  const SkyBeam sky_beam = make_sky_beam(sky, cfg);
  ExtractResult out;
  out.beam = centre_beam(sky, sky_beam);
  const BeamGeometry centre = checked_centre(sky, out.beam);

  IslandResult isl = noise_and_islands(sky, in, cfg, centre, hooks, out);
  auto labels = std::make_shared<LabelsI32>(std::move(isl.labels));
  if (hooks.maps_final) hooks.maps_final(out.maps, labels);

  IslandContext ctx;
  Stage t_cut(hooks, "cutouts");
  std::vector<IslandCutout> cutouts =
      make_cutouts(sky, cfg, sky_beam, out.beam, centre, isl.islands, *labels, out.maps, ctx);
  t_cut.stop();
  Stage t_fit(hooks, "fit");
  const std::vector<IslandFit> fits = fit_cutouts(std::move(cutouts), isl.islands, cfg.fit, hooks);
  out.components = measure_components(sky, in, cfg, out.maps, isl, fits, ctx);
  std::vector<PixelComponent> all_pix;
  for (const auto& f : fits)
    for (const auto& pc : f.components) all_pix.push_back(pc);
  t_fit.stop();

  Stage t_cat(hooks, "catalogue");
  flag_components(out.components, sky.pixels, centre.local.jac_arcsec_per_pix, out.beam, cfg.flags);
  measure_apertures(sky, cfg, isl, fits, *labels, out.maps, ctx);
  std::vector<CatalogueIsland> cat_isl;
  out.islands = island_records(sky, cfg, isl, fits, ctx, cat_isl);
  out.sources = group_sources(out.components, cat_isl, out.beam, cfg.grouping);
  for (const auto& s : out.sources)
    for (std::size_t i : s.components) out.components[i].source_id = s.id;
  sort_components(out.components);  // already in (island, component) order; keeps the rule explicit
  t_cat.stop();

  for (const auto& c : out.components) out.components_fit_failed += (c.flags & kFlagFitFailed) ? 1 : 0;
  if (cfg.keep_labels) out.labels = labels;
  labels.reset();
  if (cfg.render_model) out.model = render_components(sky.pixels.cols(), sky.pixels.rows(), all_pix, 6.0);
  return out;
}

}  // namespace skerry
