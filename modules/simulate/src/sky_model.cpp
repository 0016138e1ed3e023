// Sky model: a population of sources on the sphere (simulate.h, step 1).
#include <tbb/parallel_for.h>

#include <cmath>
#include <sstream>
#include <stdexcept>
#include <string>
#include <unordered_map>

#include "skerry/constants.h"
#include "skerry/simulate.h"
#include "stream.h"

namespace skerry::sim {

double Spectrum::flux_at(double freq_hz) const {
  // log10(S/S_ref) = alpha t + curvature t^2, t = log10(nu/nu_ref) (simulate.h).
  const double t = std::log10(freq_hz / ref_freq_hz);
  return s_ref_jy * std::pow(10.0, alpha * t + curvature * t * t);
}

double Spectrum::alpha_at(double freq_hz) const {
  // d ln S / d ln nu = d log10 S / d log10 nu = alpha + 2 curvature t.
  const double t = std::log10(freq_hz / ref_freq_hz);
  return alpha + 2.0 * curvature * t;
}

SkySource make_source(double ra_deg, double dec_deg, double s_int_jy, const Ellipse& intrinsic) {
  SkySource s;
  s.ra_deg = ra_deg;
  s.dec_deg = dec_deg;
  s.intrinsic = intrinsic;
  s.spectrum.s_ref_jy = s_int_jy;
  s.flags = kSimInjected | (intrinsic.maj > 0.0 ? kSimResolved : 0u);
  return s;
}

Beam beam_at_frequency(const Beam& b, double ref_freq_hz, double freq_hz) {
  // Diffraction: the synthesised beam's width scales as lambda / baseline, i.e.
  // as 1/frequency for a fixed array (common practice).
  const double f = ref_freq_hz / freq_hz;
  return {b.maj_arcsec * f, b.min_arcsec * f, b.pa_deg};
}

namespace {

using detail::Stream;

[[noreturn]] void bad(const std::string& option, double value, const std::string& rule) {
  std::ostringstream os;
  os.precision(10);
  os << option << " = " << value << " breaks " << rule;
  throw std::invalid_argument(os.str());
}

/// Point at angular distance r (rad) in direction pa (rad, east of north) from
/// (ra0, dec0): the spherical "destination" formula from the sine and cosine
/// rules of spherical trigonometry (Smart, Textbook on Spherical Astronomy,
/// ch. 1; from memory for the book).
void destination(double ra0_deg, double dec0_deg, double r, double pa, double& ra_deg,
                 double& dec_deg) {
  const double d0 = dec0_deg * kDegToRad;
  const double sd = std::sin(d0) * std::cos(r) + std::cos(d0) * std::sin(r) * std::cos(pa);
  const double dec = std::asin(std::clamp(sd, -1.0, 1.0));
  const double y = std::sin(pa) * std::sin(r) * std::cos(d0);
  const double x = std::cos(r) - std::sin(d0) * sd;
  ra_deg = wrap_deg_360(ra0_deg + std::atan2(y, x) * kRadToDeg);
  dec_deg = dec * kRadToDeg;
}

/// Uniform on the sphere within a cap of radius R: cos r uniform in [cos R, 1],
/// direction uniform (docs/CONVENTIONS.md: uniform in RA and sin Dec, here about the
/// cap centre).
void draw_in_cap(Stream& rng, const SkyModelOptions& o, double& ra, double& dec) {
  const double cos_R = std::cos(o.radius_deg * kDegToRad);
  const double cos_r = 1.0 - rng.uniform() * (1.0 - cos_R);
  const double r = std::acos(std::clamp(cos_r, -1.0, 1.0));
  const double az = 2.0 * kPi * rng.uniform();
  destination(o.centre_ra_deg, o.centre_dec_deg, r, az, ra, dec);
}

bool on_footprint(const SkyModelOptions& o, double ra, double dec) {
  if (!o.footprint) return true;
  double x, y;
  if (!o.footprint->sky_to_pix(ra, dec, x, y)) return false;
  const double m = o.footprint_margin_pix;
  return x >= -0.5 + m && x <= o.footprint_nx - 0.5 - m && y >= -0.5 + m &&
         y <= o.footprint_ny - 0.5 - m;
}

/// S drawn from dN/dS ~ S^-g on [a, b] by inverting the CDF:
///   S = [a^(1-g) + u (b^(1-g) - a^(1-g))]^(1/(1-g)),  g != 1
///   S = a (b/a)^u,                                      g == 1.
double draw_flux(Stream& rng, double a, double b, double g) {
  const double u = rng.uniform();
  if (std::abs(g - 1.0) < 1e-12) return a * std::pow(b / a, u);
  const double e = 1.0 - g;
  return std::pow(std::pow(a, e) + u * (std::pow(b, e) - std::pow(a, e)), 1.0 / e);
}

struct System {
  SkySource primary;
  bool has_companion = false;
  SkySource companion;
  double comp_r = 0.0, comp_az = 0.0;  // companion offset [rad], direction [rad]
};

void draw_attributes(Stream& rng, const SkyModelOptions& o, System& s) {
  SkySource& p = s.primary;
  // Fixed draw order: flux, shape (3 numbers), spectrum (3), double (5).
  p.spectrum.ref_freq_hz = o.ref_freq_hz;
  p.spectrum.s_ref_jy = draw_flux(rng, o.s_min_jy, o.s_max_jy, o.slope);
  const double u_res = rng.uniform(), u_size = rng.uniform(), u_ratio = rng.uniform(),
               u_pa = rng.uniform();
  if (u_res < o.resolved_fraction) {
    const double lmin = std::log(o.size_min_arcsec), lmax = std::log(o.size_max_arcsec);
    p.intrinsic.maj = std::exp(lmin + u_size * (lmax - lmin));
    p.intrinsic.min = p.intrinsic.maj * (o.axis_ratio_min + u_ratio * (1.0 - o.axis_ratio_min));
    p.intrinsic.pa_deg = 180.0 * u_pa;
    p.flags |= kSimResolved;
  }
  p.spectrum.alpha = o.alpha_mean + o.alpha_sigma * rng.normal();
  const double u_curved = rng.uniform();
  const double g_curv = rng.normal();
  if (u_curved < o.curved_fraction) {
    p.spectrum.curvature = o.curvature_mean + o.curvature_sigma * g_curv;
    p.flags |= kSimCurved;
  }
  const double u_double = rng.uniform(), u_sep = rng.uniform(), u_az = rng.uniform(),
               u_fr = rng.uniform();
  const double g_alpha2 = rng.normal(), g_curv2 = rng.normal();
  if (u_double < o.double_fraction) {
    s.has_companion = true;
    SkySource& c = s.companion;
    const double sep_beams =
        o.double_sep_min_beams + u_sep * (o.double_sep_max_beams - o.double_sep_min_beams);
    s.comp_r = sep_beams * o.unit_beam.maj_arcsec * kArcsecToRad;
    s.comp_az = 2.0 * kPi * u_az;
    const double ratio = o.double_flux_ratio_min + u_fr * (1.0 - o.double_flux_ratio_min);
    c.spectrum.ref_freq_hz = o.ref_freq_hz;
    c.spectrum.s_ref_jy = ratio * p.spectrum.s_ref_jy;
    c.spectrum.alpha = o.alpha_mean + o.alpha_sigma * g_alpha2;
    if (p.flags & kSimCurved) {
      c.spectrum.curvature = o.curvature_mean + o.curvature_sigma * g_curv2;
      c.flags |= kSimCurved;
    }
    p.flags |= kSimDoublePrimary;
    c.flags |= kSimDoubleSecondary;
  }
}

void place_companion(System& s) {
  if (!s.has_companion) return;
  destination(s.primary.ra_deg, s.primary.dec_deg, s.comp_r, s.comp_az, s.companion.ra_deg,
              s.companion.dec_deg);
}

void validate(const SkyModelOptions& o) {
  if (!(o.radius_deg > 0.0 && o.radius_deg <= 180.0)) bad("radius_deg", o.radius_deg, "0 < radius_deg <= 180");
  if (!(std::abs(o.centre_dec_deg) <= 90.0)) bad("centre_dec_deg", o.centre_dec_deg, "|centre_dec_deg| <= 90");
  if (!std::isfinite(o.centre_ra_deg)) bad("centre_ra_deg", o.centre_ra_deg, "a finite value");
  if (!(o.s_min_jy > 0.0 && o.s_min_jy < o.s_max_jy)) bad("s_min_jy", o.s_min_jy, "0 < s_min_jy < s_max_jy");
  if (!std::isfinite(o.s_max_jy)) bad("s_max_jy", o.s_max_jy, "a finite value");
  if (!std::isfinite(o.slope)) bad("slope", o.slope, "a finite value");
  if (!(o.ref_freq_hz > 0.0)) bad("ref_freq_hz", o.ref_freq_hz, "ref_freq_hz > 0");
  if (!(o.resolved_fraction >= 0.0 && o.resolved_fraction <= 1.0)) bad("resolved_fraction", o.resolved_fraction, "0 <= resolved_fraction <= 1");
  if (!(o.size_min_arcsec > 0.0 && o.size_min_arcsec <= o.size_max_arcsec)) bad("size_min_arcsec", o.size_min_arcsec, "0 < size_min_arcsec <= size_max_arcsec");
  if (!(o.axis_ratio_min > 0.0 && o.axis_ratio_min <= 1.0)) bad("axis_ratio_min", o.axis_ratio_min, "0 < axis_ratio_min <= 1");
  if (!(o.double_fraction >= 0.0 && o.double_fraction <= 1.0)) bad("double_fraction", o.double_fraction, "0 <= double_fraction <= 1");
  if (!(o.double_sep_min_beams > 0.0 && o.double_sep_min_beams <= o.double_sep_max_beams)) bad("double_sep_min_beams", o.double_sep_min_beams, "0 < double_sep_min_beams <= double_sep_max_beams");
  if (!(o.double_flux_ratio_min > 0.0 && o.double_flux_ratio_min <= 1.0)) bad("double_flux_ratio_min", o.double_flux_ratio_min, "0 < double_flux_ratio_min <= 1");
  if (o.double_fraction > 0.0 && !o.unit_beam.valid()) bad("unit_beam.maj_arcsec", o.unit_beam.maj_arcsec, "a valid beam");
  if (!(o.alpha_sigma >= 0.0) || !std::isfinite(o.alpha_mean)) bad("alpha_sigma", o.alpha_sigma, "alpha_sigma >= 0 and a finite alpha_mean");
  if (!(o.curved_fraction >= 0.0 && o.curved_fraction <= 1.0)) bad("curved_fraction", o.curved_fraction, "0 <= curved_fraction <= 1");
  if (!(o.curvature_sigma >= 0.0) || !std::isfinite(o.curvature_mean)) bad("curvature_sigma", o.curvature_sigma, "curvature_sigma >= 0 and a finite curvature_mean");
  if (!(o.min_separation_arcsec >= 0.0)) bad("min_separation_arcsec", o.min_separation_arcsec, "min_separation_arcsec >= 0");
  if (o.footprint && (o.footprint_nx <= 0 || o.footprint_ny <= 0)) bad("footprint_nx", static_cast<double>(o.footprint_nx), "footprint_nx, footprint_ny > 0");
  if (o.max_redraws < 1) bad("max_redraws", o.max_redraws, "max_redraws >= 1");
}

/// Spatial hash of unit vectors in cubes of side `cell` (for the minimum separation).
class SeparationIndex {
 public:
  explicit SeparationIndex(double sep_rad)
      : chord_(2.0 * std::sin(0.5 * sep_rad)), cell_(std::max(chord_, 1e-12)) {}
  bool clear(const Eigen::Vector3d& u) const {
    const auto c = cell_of(u);
    for (int dx = -1; dx <= 1; ++dx)
      for (int dy = -1; dy <= 1; ++dy)
        for (int dz = -1; dz <= 1; ++dz) {
          auto it = cells_.find(key(c[0] + dx, c[1] + dy, c[2] + dz));
          if (it == cells_.end()) continue;
          for (const auto& v : it->second)
            if ((v - u).norm() < chord_) return false;
        }
    return true;
  }
  void add(const Eigen::Vector3d& u) {
    const auto c = cell_of(u);
    cells_[key(c[0], c[1], c[2])].push_back(u);
  }

 private:
  std::array<long long, 3> cell_of(const Eigen::Vector3d& u) const {
    return {static_cast<long long>(std::floor(u.x() / cell_)),
            static_cast<long long>(std::floor(u.y() / cell_)),
            static_cast<long long>(std::floor(u.z() / cell_))};
  }
  static std::uint64_t key(long long a, long long b, long long c) {
    return detail::mix64(static_cast<std::uint64_t>(a) * 0x9e3779b97f4a7c15ULL ^
                         static_cast<std::uint64_t>(b) * 0xc2b2ae3d27d4eb4fULL ^
                         static_cast<std::uint64_t>(c) * 0x165667b19e3779f9ULL);
  }
  double chord_, cell_;
  std::unordered_map<std::uint64_t, std::vector<Eigen::Vector3d>> cells_;
};

}  // namespace

SkyModel draw_sky_model(const SkyModelOptions& o, std::uint64_t seed) {
  validate(o);
  const std::size_t n = o.count;
  std::vector<System> systems(n);
  std::vector<char> placed(n, 0);

  // Attributes (flux, shape, spectrum, double) never depend on the placement rules.
  auto draw_one = [&](std::size_t i, bool check_separation, SeparationIndex* index) {
    System& s = systems[i];
    Stream attr(seed, detail::kPurposeAttributes, i);
    draw_attributes(attr, o, s);
    Stream pos(seed, detail::kPurposePosition, i);
    for (int attempt = 0; attempt < o.max_redraws; ++attempt) {
      draw_in_cap(pos, o, s.primary.ra_deg, s.primary.dec_deg);
      if (!on_footprint(o, s.primary.ra_deg, s.primary.dec_deg)) continue;
      place_companion(s);
      if (check_separation) {
        const Eigen::Vector3d u = unit_vector(s.primary.ra_deg, s.primary.dec_deg);
        if (!index->clear(u)) continue;
        if (s.has_companion &&
            !index->clear(unit_vector(s.companion.ra_deg, s.companion.dec_deg)))
          continue;
        index->add(u);
        if (s.has_companion) index->add(unit_vector(s.companion.ra_deg, s.companion.dec_deg));
      }
      placed[i] = 1;
      return;
    }
  };

  if (o.min_separation_arcsec > 0.0) {
    // Serial, in id order: each system must clear the earlier ones.
    SeparationIndex index(o.min_separation_arcsec * kArcsecToRad);
    for (std::size_t i = 0; i < n; ++i) draw_one(i, true, &index);
  } else {
    tbb::parallel_for(std::size_t{0}, n, [&](std::size_t i) { draw_one(i, false, nullptr); });
  }
  for (std::size_t i = 0; i < n; ++i)
    if (!placed[i]) {
      std::ostringstream os;
      os << "source system " << i << " could not be placed within max_redraws = "
         << o.max_redraws << " (footprint too small or min_separation_arcsec too large for count = "
         << n << ")";
      throw std::invalid_argument(os.str());
    }

  SkyModel model;
  model.sources.reserve(n + n / 4);
  for (auto& s : systems) {
    s.primary.id = static_cast<std::int64_t>(model.sources.size());
    if (s.has_companion) {
      s.companion.id = s.primary.id + 1;
      s.primary.partner_id = s.companion.id;
      s.companion.partner_id = s.primary.id;
    }
    model.sources.push_back(s.primary);
    if (s.has_companion) model.sources.push_back(s.companion);
  }
  return model;
}

}  // namespace skerry::sim
