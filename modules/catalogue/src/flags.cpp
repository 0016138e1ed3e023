// Flag bitmask names and the position flags of components (edge, blank pixels,
// much brighter neighbour). Distances are on the sky through the local Jacobian.
#include <Eigen/LU>
#include <algorithm>
#include <cmath>
#include <unordered_map>

#include "skerry/catalogue.h"

namespace skerry {

const std::vector<FlagInfo>& flag_table() {
  static const std::vector<FlagInfo> t = {
      {kFlagNearEdge, "near_edge",
       "centre within catalogue.edge_margin_beams of the image edge (island: touches the edge)"},
      {kFlagNearBlank, "near_blank",
       "a blank (NaN) pixel within catalogue.blank_margin_beams of the centre (island: touches a blank pixel)"},
      {kFlagNearBright, "near_bright",
       "a component catalogue.bright_ratio times brighter lies within catalogue.bright_radius_beams (possible artefact)"},
      {kFlagFitFailed, "fit_failed",
       "Gaussian fit did not converge (values: best parameters found) or failed (values: island moments)"},
      {kFlagBelowPbCut, "below_pb_cut", "primary-beam response at the centre below image.pb_cut"},
      {kFlagComponentCap, "component_cap",
       "the island had more candidate peaks than fit.max_components, or a significant residual (fit.residual_snr) remained with fit.max_components fitted"},
      {kFlagAtBound, "at_bound",
       "a fitted parameter ended at its bound (size floor or centre at the island edge)"},
      {kFlagBadRms, "bad_rms",
       "local rms not positive or not finite at the centre; SNR and noise-based errors are NaN"},
      {kFlagDiffuse, "diffuse",
       "island residual rms exceeds catalogue.diffuse_residual_ratio x the local rms"},
      {kFlagNoPrimaryBeam, "no_primary_beam",
       "primary-beam image blank or not positive at the centre; corrected values are NaN"},
  };
  return t;
}

const std::vector<FlagInfo>& info_bit_table() {
  static const std::vector<FlagInfo> t = {
      {kInfoUnresolved, "unresolved", "not resolved: the deconvolved size is an upper limit"},
      {kInfoFixedShape, "fixed_shape", "shape held at the restoring beam (fit.fixed_shape)"},
      {kInfoFewerComponents, "fewer_components",
       "the island's peaks were fitted with fewer components (more were not justified by the data)"},
      {kInfoMultiIsland, "multi_island", "source only: the source joins components of several islands"},
      {kInfoResidualComponents, "residual_components",
       "the island's fit gained components from its residual (a blend split or structure added; fit.residual_search)"},
  };
  return t;
}

namespace {
std::string bit_names(const std::vector<FlagInfo>& table, std::uint32_t mask) {
  std::string out;
  for (const auto& f : table) {
    if (mask & f.bit) {
      if (!out.empty()) out += '|';
      out += f.name;
    }
  }
  return out;
}
}  // namespace

std::string flag_names(std::uint32_t flags) { return bit_names(flag_table(), flags); }
std::string info_bit_names(std::uint32_t info_bits) { return bit_names(info_bit_table(), info_bits); }

void flag_components(std::vector<CatalogueComponent>& comps, const ImageF& image,
                     const Eigen::Matrix2d& J, const Beam& beam, const FlagOptions& opt) {
  const long ny = image.rows(), nx = image.cols();
  const double det = std::abs(J.determinant());
  if (!(det > 0.0) || !std::isfinite(det) || !beam.valid()) return;
  const double len_x = J.col(0).norm(), len_y = J.col(1).norm();  // arcsec per pixel step
  // Sky distance from a point to the line x = const is |dx| * |det J| / |J col1|
  // (height of the parallelogram spanned by the pixel steps); likewise for y.
  const double dist_per_dx = det / len_y, dist_per_dy = det / len_x;
  const Eigen::Matrix2d Ji = J.inverse();

  // --- near the image edge -------------------------------------------------
  const double edge_arcsec = opt.edge_margin_beams * beam.maj_arcsec;
  // --- near blank pixels: scan the pixel box that contains the sky circle ---
  const double blank_arcsec = opt.blank_margin_beams * beam.maj_arcsec;
  // Half-widths of the box containing |J d| <= R: R * norm of the rows of J^-1.
  const long hx = static_cast<long>(std::ceil(blank_arcsec * Ji.row(0).norm()));
  const long hy = static_cast<long>(std::ceil(blank_arcsec * Ji.row(1).norm()));
  for (auto& c : comps) {
    // Edges are the outer pixel boundaries at -0.5 and n - 0.5 (0-based).
    const double dx = std::min(c.x_pix + 0.5, nx - 0.5 - c.x_pix);
    const double dy = std::min(c.y_pix + 0.5, ny - 0.5 - c.y_pix);
    if (std::min(dx * dist_per_dx, dy * dist_per_dy) < edge_arcsec) c.flags |= kFlagNearEdge;
    if (blank_arcsec > 0.0 && std::isfinite(c.x_pix) && std::isfinite(c.y_pix)) {
      const long cx = std::lround(c.x_pix), cy = std::lround(c.y_pix);
      bool found = false;
      for (long y = std::max(0L, cy - hy); y <= std::min(ny - 1, cy + hy) && !found; ++y) {
        for (long x = std::max(0L, cx - hx); x <= std::min(nx - 1, cx + hx); ++x) {
          if (!std::isnan(image(y, x))) continue;
          const Eigen::Vector2d d = J * Eigen::Vector2d(x - c.x_pix, y - c.y_pix);
          if (d.norm() <= blank_arcsec) { found = true; break; }
        }
      }
      if (found) c.flags |= kFlagNearBlank;
    }
  }

  // --- near a much brighter component: grid hash on pixel cells -----------
  const double radius_arcsec = opt.bright_radius_beams * beam.maj_arcsec;
  if (!(radius_arcsec > 0.0) || !(opt.bright_ratio > 0.0) || comps.size() < 2) return;
  const double cell = std::max(1.0, radius_arcsec * std::max(Ji.row(0).norm(), Ji.row(1).norm()));
  auto key = [&](double x, double y) {
    const long long i = static_cast<long long>(std::floor(x / cell));
    const long long j = static_cast<long long>(std::floor(y / cell));
    return (i << 32) ^ (j & 0xffffffffLL);
  };
  // Only components that can be "much brighter" neighbours go into the hash:
  // peak >= ratio * (faintest peak).
  double faintest = INFINITY;
  for (const auto& c : comps)
    if (c.s_peak_jy_per_beam > 0.0) faintest = std::min(faintest, c.s_peak_jy_per_beam);
  std::unordered_map<long long, std::vector<std::size_t>> grid;
  for (std::size_t i = 0; i < comps.size(); ++i) {
    const auto& c = comps[i];
    if (std::isfinite(c.x_pix) && std::isfinite(c.y_pix) &&
        c.s_peak_jy_per_beam >= opt.bright_ratio * faintest)
      grid[key(c.x_pix, c.y_pix)].push_back(i);
  }
  if (grid.empty()) return;
  for (std::size_t i = 0; i < comps.size(); ++i) {
    auto& c = comps[i];
    if (!std::isfinite(c.x_pix) || !std::isfinite(c.y_pix) || !(c.s_peak_jy_per_beam > 0.0)) continue;
    const long long ci = static_cast<long long>(std::floor(c.x_pix / cell));
    const long long cj = static_cast<long long>(std::floor(c.y_pix / cell));
    bool found = false;
    for (long long di = -1; di <= 1 && !found; ++di) {
      for (long long dj = -1; dj <= 1 && !found; ++dj) {
        auto it = grid.find(((ci + di) << 32) ^ ((cj + dj) & 0xffffffffLL));
        if (it == grid.end()) continue;
        for (std::size_t k : it->second) {
          if (k == i) continue;
          const auto& o = comps[k];
          if (!(o.s_peak_jy_per_beam >= opt.bright_ratio * c.s_peak_jy_per_beam)) continue;
          const Eigen::Vector2d d = J * Eigen::Vector2d(o.x_pix - c.x_pix, o.y_pix - c.y_pix);
          if (d.norm() <= radius_arcsec) { found = true; break; }
        }
      }
    }
    if (found) c.flags |= kFlagNearBright;
  }
}

}  // namespace skerry
