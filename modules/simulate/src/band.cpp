// One band image of a sky model (simulate.h, simulate_band).
//
// Order of the terms (pb = primary beam at the pixel):
//   corrected image:  I = sources(S_true) + noise / pb + background
//   apparent image:   I = sources(S_true x pb(centre)) + noise + background
// then pixels with pb < blank_below_pb, the border and pixels without a sky
// position are NaN. Smooth quantities (the tangent-plane coordinates about the
// pointing centre that give pb, and the background) are computed exactly on nodes
// every kNodeStep pixels and interpolated bilinearly in between; the background
// returned as truth is that interpolant, and the pb values of the truth table are
// the same interpolant evaluated at the source centres.
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <cmath>
#include <limits>
#include <sstream>
#include <stdexcept>

#include "render_internal.h"
#include "skerry/constants.h"
#include "skerry/simulate.h"
#include "stream.h"

namespace skerry::sim {

namespace {

constexpr long kNodeStep = 16;

[[noreturn]] void bad(const std::string& option, double value, const std::string& rule) {
  std::ostringstream os;
  os.precision(10);
  os << option << " = " << value << " breaks " << rule;
  throw std::invalid_argument(os.str());
}

void validate(const BandOptions& o) {
  if (o.nx <= 0 || o.ny <= 0) bad("nx", static_cast<double>(std::min(o.nx, o.ny)), "nx, ny > 0");
  if (!(o.freq_hz > 0.0)) bad("freq_hz", o.freq_hz, "freq_hz > 0");
  if (!o.beam.valid()) bad("beam.maj_arcsec", o.beam.maj_arcsec, "a valid beam (0 < min <= maj)");
  if (!(o.rms_jy_per_beam >= 0.0) || !std::isfinite(o.rms_jy_per_beam)) bad("rms_jy_per_beam", o.rms_jy_per_beam, "rms_jy_per_beam >= 0");
  if (!(o.pb_fwhm_deg >= 0.0) || !std::isfinite(o.pb_fwhm_deg)) bad("pb_fwhm_deg", o.pb_fwhm_deg, "pb_fwhm_deg >= 0");
  if (!(o.blank_below_pb >= 0.0 && o.blank_below_pb < 1.0)) bad("blank_below_pb", o.blank_below_pb, "0 <= blank_below_pb < 1");
  if (o.blank_below_pb > 0.0 && o.pb_fwhm_deg == 0.0) bad("blank_below_pb", o.blank_below_pb, "blank_below_pb = 0 when there is no primary beam (pb_fwhm_deg = 0)");
  if (o.blank_border_pix < 0) bad("blank_border_pix", static_cast<double>(o.blank_border_pix), "blank_border_pix >= 0");
  if (!(o.background_amplitude_jy_per_beam >= 0.0) || !std::isfinite(o.background_amplitude_jy_per_beam)) bad("background_amplitude_jy_per_beam", o.background_amplitude_jy_per_beam, "background_amplitude_jy_per_beam >= 0");
  if (!(o.background_scale_arcsec > 0.0)) bad("background_scale_arcsec", o.background_scale_arcsec, "background_scale_arcsec > 0");
  if (o.background_waves < 1) bad("background_waves", o.background_waves, "background_waves >= 1");
  if (!(o.cutoff_sigma > 0.0)) bad("cutoff_sigma", o.cutoff_sigma, "cutoff_sigma > 0");
}

/// Tangent-plane coordinates (xi, eta) [rad] about the pointing centre on nodes,
/// with bilinear interpolation.
class NodeGrid {
 public:
  NodeGrid(const PixelSky& sky, long nx, long ny, double ra0, double dec0) : nx_(nx), ny_(ny) {
    nodes_x_ = node_positions(nx);
    nodes_y_ = node_positions(ny);
    const std::size_t mx = nodes_x_.size(), my = nodes_y_.size();
    xi_.assign(mx * my, 0.0);
    eta_.assign(mx * my, 0.0);
    ok_.assign(mx * my, 0);
    tbb::parallel_for(std::size_t{0}, my, [&](std::size_t j) {
      for (std::size_t i = 0; i < mx; ++i) {
        double ra, dec, xi, eta;
        const std::size_t k = j * mx + i;
        if (sky.pix_to_sky(static_cast<double>(nodes_x_[i]), static_cast<double>(nodes_y_[j]), ra,
                           dec) &&
            gnomonic_offset(ra0, dec0, ra, dec, xi, eta)) {
          xi_[k] = xi;
          eta_[k] = eta;
          ok_[k] = 1;
        }
      }
    });
  }
  std::size_t mx() const { return nodes_x_.size(); }
  const std::vector<long>& nodes_x() const { return nodes_x_; }
  const std::vector<long>& nodes_y() const { return nodes_y_; }
  std::size_t my() const { return nodes_y_.size(); }
  double node_xi(std::size_t i, std::size_t j) const { return xi_[j * mx() + i]; }
  double node_eta(std::size_t i, std::size_t j) const { return eta_[j * mx() + i]; }
  bool node_ok(std::size_t i, std::size_t j) const { return ok_[j * mx() + i] != 0; }

  /// Cell index and fraction along one axis for pixel coordinate p.
  static void locate(const std::vector<long>& nodes, double p, std::size_t& i, double& t) {
    const long last = static_cast<long>(nodes.size()) - 1;
    if (last == 0) {
      i = 0;
      t = 0.0;
      return;
    }
    long c = static_cast<long>(std::floor(p / kNodeStep));
    c = std::clamp<long>(c, 0, last - 1);
    i = static_cast<std::size_t>(c);
    t = (p - static_cast<double>(nodes[i])) / static_cast<double>(nodes[i + 1] - nodes[i]);
  }
  /// Bilinear interpolation of node values v(i, j); false when a node is invalid.
  template <class V>
  bool interpolate(double x, double y, V&& v, double& out) const {
    std::size_t i, j;
    double tx, ty;
    locate(nodes_x_, x, i, tx);
    locate(nodes_y_, y, j, ty);
    const std::size_t i1 = std::min(i + 1, mx() - 1), j1 = std::min(j + 1, my() - 1);
    if (!node_ok(i, j) || !node_ok(i1, j) || !node_ok(i, j1) || !node_ok(i1, j1)) return false;
    out = (1 - ty) * ((1 - tx) * v(i, j) + tx * v(i1, j)) + ty * ((1 - tx) * v(i, j1) + tx * v(i1, j1));
    return true;
  }

 private:
  static std::vector<long> node_positions(long n) {
    std::vector<long> v;
    for (long p = 0; p < n - 1; p += kNodeStep) v.push_back(p);
    v.push_back(n - 1);
    return v;
  }
  long nx_, ny_;
  std::vector<long> nodes_x_, nodes_y_;
  std::vector<double> xi_, eta_;
  std::vector<char> ok_;
};

/// Squared great-circle distance r^2 from the squared tangent-plane radius
/// rho^2, rho = tan r (TAN about the pointing centre): r = atan(rho) by its series
/// rho (1 - rho^2/3 + rho^4/5) where rho < 0.05 (truncation < rho^7/7, relative
/// < 1.2e-10) and by atan beyond.
double radius2_from_tan2(double rho2) {
  if (rho2 < 0.0025) {
    const double f = 1.0 - rho2 / 3.0 + rho2 * rho2 / 5.0;
    return rho2 * f * f;
  }
  const double r = std::atan(std::sqrt(rho2));
  return r * r;
}

}  // namespace

BandImage simulate_band(const SkyModel& model, const PixelSky& sky, const BandOptions& o,
                        std::uint64_t seed) {
  validate(o);
  const long nx = o.nx, ny = o.ny;
  double ra0 = o.pointing_ra_deg, dec0 = o.pointing_dec_deg;
  if (std::isnan(ra0) || std::isnan(dec0)) {
    if (!sky.pix_to_sky(0.5 * (nx - 1), 0.5 * (ny - 1), ra0, dec0))
      throw std::invalid_argument("simulate_band: the grid centre has no sky position");
  }
  const bool has_pb = o.pb_fwhm_deg > 0.0;
  const bool has_bg = o.background_amplitude_jy_per_beam > 0.0;

  BandImage out;
  // Noise (flat correlation with the beam's pixel-frame shape at the grid centre).
  if (o.rms_jy_per_beam > 0.0) {
    const Eigen::Matrix2d c = beam_cov_pix(o.beam, sky, 0.5 * (nx - 1), 0.5 * (ny - 1));
    out.image = correlated_noise(nx, ny, c, o.rms_jy_per_beam, seed, o.noise_stream);
  } else {
    out.image = ImageF::Zero(ny, nx);
  }

  const NodeGrid nodes(sky, nx, ny, ra0, dec0);
  // pb(x, y) = exp(-4 ln 2 r^2 / fwhm^2) (Gaussian primary beam; common practice).
  const double pb_fwhm_rad = o.pb_fwhm_deg * kDegToRad;
  auto pb_at = [&](double x, double y, double& pb) {
    double xi, eta;
    if (!nodes.interpolate(x, y, [&](std::size_t i, std::size_t j) { return nodes.node_xi(i, j); }, xi) ||
        !nodes.interpolate(x, y, [&](std::size_t i, std::size_t j) { return nodes.node_eta(i, j); }, eta))
      return false;
    if (!has_pb) {
      pb = 1.0;
      return true;
    }
    pb = std::exp(-4.0 * kLn2 * radius2_from_tan2(xi * xi + eta * eta) / (pb_fwhm_rad * pb_fwhm_rad));
    return true;
  };

  // Background on the nodes: amp sqrt(2/n) sum_m cos(2 pi (u_m xi + v_m eta) + phi_m),
  // xi, eta in arcsec; (u, v) = (sin th, cos th) / lambda, lambda log-uniform in
  // [1, 2] x scale; each term has variance 1/2, so the rms is amp.
  std::vector<double> bg_nodes;
  if (has_bg) {
    detail::Stream rng(seed, detail::kPurposeBackground, 0, o.noise_stream);
    const int n = o.background_waves;
    std::vector<double> u(n), v(n), phi(n);
    for (int m = 0; m < n; ++m) {
      const double lambda = o.background_scale_arcsec * std::pow(2.0, rng.uniform());
      const double th = 2.0 * kPi * rng.uniform();
      u[m] = std::sin(th) / lambda;
      v[m] = std::cos(th) / lambda;
      phi[m] = 2.0 * kPi * rng.uniform();
    }
    const double norm = o.background_amplitude_jy_per_beam * std::sqrt(2.0 / n);
    bg_nodes.assign(nodes.mx() * nodes.my(), 0.0);
    for (std::size_t j = 0; j < nodes.my(); ++j)
      for (std::size_t i = 0; i < nodes.mx(); ++i) {
        const double xs = nodes.node_xi(i, j) * kRadToArcsec, ys = nodes.node_eta(i, j) * kRadToArcsec;
        double b = 0.0;
        for (int m = 0; m < n; ++m) b += std::cos(2.0 * kPi * (u[m] * xs + v[m] * ys) + phi[m]);
        bg_nodes[j * nodes.mx() + i] = norm * b;
      }
    if (o.keep_background) out.background = ImageF::Zero(ny, nx);
  }
  if (has_pb) out.primary_beam = ImageF::Zero(ny, nx);
  if (o.keep_model) out.model = ImageF::Zero(ny, nx);

  // Per pixel: pb, noise scaling, background, blanks. Each row first interpolates
  // the node values along y (the same bilinear interpolant as pb_at), then along x.
  const float nan = std::numeric_limits<float>::quiet_NaN();
  const double pb_k = has_pb ? 4.0 * kLn2 / (pb_fwhm_rad * pb_fwhm_rad) : 0.0;
  tbb::parallel_for(tbb::blocked_range<long>(0, ny, 8), [&](const tbb::blocked_range<long>& r) {
    const std::size_t mx = nodes.mx();
    std::vector<double> rxi(mx), reta(mx), rbg(mx);
    std::vector<char> rok(mx);
    for (long y = r.begin(); y != r.end(); ++y) {
      std::size_t j;
      double ty;
      NodeGrid::locate(nodes.nodes_y(), static_cast<double>(y), j, ty);
      const std::size_t j1 = std::min(j + 1, nodes.my() - 1);
      for (std::size_t i = 0; i < mx; ++i) {
        rok[i] = nodes.node_ok(i, j) && nodes.node_ok(i, j1);
        rxi[i] = (1 - ty) * nodes.node_xi(i, j) + ty * nodes.node_xi(i, j1);
        reta[i] = (1 - ty) * nodes.node_eta(i, j) + ty * nodes.node_eta(i, j1);
        if (has_bg) rbg[i] = (1 - ty) * bg_nodes[j * mx + i] + ty * bg_nodes[j1 * mx + i];
      }
      const bool border_row = y < o.blank_border_pix || y >= ny - o.blank_border_pix;
      float* img = out.image.data() + static_cast<std::size_t>(y) * nx;
      const std::vector<long>& nxs = nodes.nodes_x();
      const std::size_t ncell = mx > 1 ? mx - 1 : 1;
      for (std::size_t i = 0; i < ncell; ++i) {
        const std::size_t i1 = std::min(i + 1, mx - 1);
        const long xa = nxs[i], xb = mx > 1 ? nxs[i1] : nxs[i];
        const long x_end = (i + 1 == ncell) ? nx : xb;  // the last cell includes its right node
        const double inv = xb > xa ? 1.0 / static_cast<double>(xb - xa) : 0.0;
      for (long x = xa; x < x_end; ++x) {
        const double tx = static_cast<double>(x - xa) * inv;
        const bool ok = rok[i] && rok[i1];
        double pb = 1.0;
        if (has_pb && ok) {
          const double xi = (1 - tx) * rxi[i] + tx * rxi[i1];
          const double eta = (1 - tx) * reta[i] + tx * reta[i1];
          pb = std::exp(-pb_k * radius2_from_tan2(xi * xi + eta * eta));
        }
        float& px = img[x];
        if (has_pb) out.primary_beam(y, x) = ok ? static_cast<float>(pb) : nan;
        if (ok && o.pb_corrected && has_pb) px = static_cast<float>(px / pb);
        if (has_bg) {
          const double bgv = (1 - tx) * rbg[i] + tx * rbg[i1];
          px += static_cast<float>(bgv);
          if (o.keep_background) out.background(y, x) = static_cast<float>(bgv);
        }
        const bool border = border_row || x < o.blank_border_pix || x >= nx - o.blank_border_pix;
        if (!ok || border || (has_pb && pb < o.blank_below_pb)) {
          px = nan;
          if (o.keep_model) out.model(y, x) = nan;
        }
      }
      }
    }
  });

  // Sources.
  RenderOptions ro;
  ro.freq_hz = o.freq_hz;
  ro.beam = o.beam;
  ro.cutoff_sigma = o.cutoff_sigma;
  const auto& src = model.sources;
  out.sources.resize(src.size());
  std::vector<detail::Footprint> fps(src.size());
  tbb::parallel_for(std::size_t{0}, src.size(), [&](std::size_t i) {
    double x = 0, y = 0;
    const bool located = sky.sky_to_pix(src[i].ra_deg, src[i].dec_deg, x, y) && std::isfinite(x) &&
                         std::isfinite(y);
    double pb = 1.0;
    const bool pb_ok = located && pb_at(x, y, pb);
    if (!pb_ok) pb = has_pb ? 0.0 : 1.0;
    const double factor = o.pb_corrected ? 1.0 : pb;
    detail::prepare(src[i], sky, nx, ny, ro, located, x, y, factor, out.sources[i], fps[i]);
    BandSource& t = out.sources[i];
    t.pb = pb;
    t.local_rms_jy_per_beam =
        (o.pb_corrected && has_pb) ? (pb > 0.0 ? o.rms_jy_per_beam / pb
                                               : std::numeric_limits<double>::infinity())
                                   : o.rms_jy_per_beam;
    if (detail::touches(fps[i], nx, [&](long px, long py) { return std::isnan(out.image(py, px)); }))
      t.flags |= kSimNearEdge;
    const long ix = std::lround(x), iy = std::lround(y);
    if (located && ix >= 0 && iy >= 0 && ix < nx && iy < ny && std::isnan(out.image(iy, ix)))
      t.flags |= kSimOnBlank;
  });
  detail::render(out.image, fps);
  if (o.keep_model) detail::render(out.model, fps);
  return out;
}

}  // namespace skerry::sim
