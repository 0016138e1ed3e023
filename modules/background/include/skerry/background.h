#pragma once
/// Background and noise (rms) maps of a radio image, from robust statistics
/// over a grid of boxes.
///
/// Method (each step documented where it is implemented, src/):
///  1. The image is covered by a grid of nodes; node (i, j) owns a box of
///     box_pixels x box_pixels centred on it (shifted inwards at the image
///     edges so that every box lies inside the image). With the default
///     step = box the boxes tile the image.
///  2. In each box the finite, unmasked pixels are sigma-clipped: centre =
///     median, clip at +-k s where s is the standard deviation of the kept
///     pixels, iterate until the kept set no longer changes. The clipped
///     standard deviation is biased low; it is divided by the converged
///     fixed point s* of s^2 = 1 - 2 k s phi(k s) / (2 Phi(k s) - 1)
///     (variance of a doubly truncated normal distribution, Johnson, Kotz &
///     Balakrishnan 1994, Continuous Univariate Distributions vol. 1; REF-ROBUST-03).
///  3. Boxes with too few valid pixels are filled from their valid neighbours.
///  4. The maps stay on the coarse grid; NoiseMaps evaluates them at full
///     resolution by bilinear interpolation between node centres (constant
///     beyond the outermost centres), row by row or as whole images on request.
///     Bilinear interpolation is a convex combination of node values, so a
///     positive rms grid gives a positive rms everywhere (a bicubic one could
///     overshoot below zero next to a sharp rise).
///  5. A second pass takes a mask of pixels to exclude (the detected islands
///     grown by a margin, grow_mask()) and re-estimates. Only island pixels and
///     their margin are masked, so a real rise of the noise around bright
///     sources (artefacts that do not form islands) still raises the rms map.
///
/// Results do not depend on the thread count (each box is computed by one
/// thread with a fixed algorithm; there are no cross-box reductions).
/// Pixel coordinates are 0-based (x = column, y = row), as everywhere in modules.
#include <cstdint>
#include <memory>
#include <string>
#include <vector>

#include "skerry/image.h"

namespace skerry {

/// Coarse grid of box statistics.
struct BackgroundGrid {
  int image_width = 0;   ///< full-resolution size [pixels]
  int image_height = 0;
  int box_pixels = 0;    ///< box side used [pixels]
  int step_pixels = 0;   ///< requested node spacing [pixels] (actual spacing = node_x[i+1]-node_x[i])
  std::vector<double> node_x;  ///< x of node centres [pixels, 0-based], size nx
  std::vector<double> node_y;  ///< y of node centres [pixels, 0-based], size ny
  ImageF background;     ///< (ny, nx) background [image units, Jy/beam]
  ImageF rms;            ///< (ny, nx) rms [image units, Jy/beam]
  Eigen::Array<std::int32_t, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>
      valid_pixels;      ///< (ny, nx) finite unmasked pixels in each box
  MaskU8 filled;         ///< (ny, nx) 1 where the node was filled from neighbours
  int nx() const { return static_cast<int>(node_x.size()); }
  int ny() const { return static_cast<int>(node_y.size()); }
};

/// Background and rms at full resolution, evaluated on demand. Holds one of:
/// a coarse grid (interpolated bilinearly), full-resolution images (e.g.
/// supplied by the user), or constant values. Cheap to copy (shared data).
class NoiseMaps {
 public:
  NoiseMaps() = default;
  static NoiseMaps from_grid(BackgroundGrid grid);
  /// Full-resolution maps of the image's size (not copied again after the move).
  static NoiseMaps from_images(ImageF background, ImageF rms);
  static NoiseMaps constant(int width, int height, float background, float rms);

  int width() const { return width_; }
  int height() const { return height_; }
  bool empty() const { return kind_ == Kind::none; }
  /// The coarse grid, or nullptr when the maps are not grid-based.
  const BackgroundGrid* grid() const;

  /// Evaluate row y (0 <= y < height) into bg[0..width) and rms[0..width).
  void row(int y, float* bg, float* rms) const;
  float background_at(int x, int y) const;
  float rms_at(int x, int y) const;
  /// Whole full-resolution maps (allocate width*height floats each).
  ImageF background_image() const;
  ImageF rms_image() const;

 private:
  enum class Kind { none, grid, images, constant };
  struct Data;
  Kind kind_ = Kind::none;
  int width_ = 0, height_ = 0;
  std::shared_ptr<const Data> data_;
};

struct BackgroundOptions {
  /// Beam size in pixels, used for sizes given in beams: the geometric-mean
  /// FWHM sqrt(bmaj bmin) [pixels]; if 0, derived from beam_area_pix as
  /// sqrt(beam_area_pix / (pi / (4 ln 2))).
  double beam_fwhm_pix = 0.0;
  double beam_area_pix = 0.0;  ///< Omega_beam_pix = pi bmaj bmin / (4 ln 2) [pixels]
  /// Box side [pixels]; 0 = box_beams * beam FWHM. A box of 30 beams across
  /// holds ~ 30^2 / 1.133 = 794 independent beams, enough for an rms good to
  /// ~ 1/sqrt(2 * 794) = 2.5 % (plus the clipping's efficiency loss), and
  /// still small against the scale on which the noise of a wide field varies.
  int box_pixels = 0;
  double box_beams = 30.0;
  /// Node spacing [pixels]; 0 = step_beams * beam FWHM, or = box when
  /// step_beams is 0 too (the default: boxes tile the image).
  int step_pixels = 0;
  double step_beams = 0.0;
  double clip_sigma = 3.0;       ///< k of the sigma clipping (>= 2; below ~1.8 iterated clipping collapses)
  int max_clip_iterations = 50;  ///< iteration cap (the kept set usually settles in < 10)
  /// A box needs at least this fraction of its area as finite unmasked pixels
  /// and at least min_valid_pixels of them; otherwise it is filled from neighbours.
  double min_valid_fraction = 0.2;
  int min_valid_pixels = 32;

  /// Empty when valid; otherwise one line naming the field, its value and the rule.
  std::string validate() const;
};

enum class BackgroundStatus {
  ok,            ///< maps produced, rms > 0 at every node
  no_data,       ///< no box had enough valid pixels (e.g. all-NaN image); maps empty
  zero_rms,      ///< maps produced, but the rms is zero or negative at every node (constant image)
};
const char* to_string(BackgroundStatus s);

struct BackgroundResult {
  BackgroundStatus status = BackgroundStatus::no_data;
  std::string message;     ///< one line for the user when status != ok
  NoiseMaps maps;          ///< grid-based; empty when status == no_data
  int boxes_filled = 0;    ///< nodes filled from neighbours
  int boxes_nonpositive_rms = 0;  ///< nodes whose own rms came out <= 0 (replaced by neighbours when any is > 0)
};

/// Estimate background and rms maps. `exclude` (optional, same shape as the
/// image): pixels with a non-zero value are left out of the statistics (second
/// pass). Throws std::invalid_argument when options.validate() fails or the
/// mask's shape differs.
BackgroundResult estimate_background(const ImageF& image, const BackgroundOptions& options,
                                     const MaskU8* exclude = nullptr);

/// Mask for the second pass: pixels with labels != 0, dilated by margin_pixels
/// (Chebyshev distance: a square of side 2 margin + 1 around each island pixel).
MaskU8 grow_mask(const LabelsI32& labels, int margin_pixels);

/// Check a supplied rms map against its image: same shape, finite and > 0 at
/// every pixel where the image has data. Empty string when fine; otherwise one
/// line naming the first bad pixel (0-based x, y) and its value.
std::string check_rms_map(const ImageF& image, const ImageF& rms);
/// Same for a supplied background map: same shape, finite where the image has data.
std::string check_background_map(const ImageF& image, const ImageF& background);

// ---- Robust statistics of one sample (used per box; public for tests) ------

/// Result of iterative median-centred sigma clipping.
struct ClipResult {
  double centre = 0.0;        ///< median of the kept values
  double sigma_raw = 0.0;     ///< standard deviation of the kept values (biased low)
  double sigma = 0.0;         ///< sigma_raw * clipped_sigma_correction(k)
  std::int64_t n_valid = 0;   ///< finite input values
  std::int64_t n_kept = 0;    ///< values kept at the end
  int iterations = 0;
  bool converged = false;     ///< kept set stopped changing before the cap
};

/// Iterative sigma clipping of the finite values in `values` (reordered in
/// place; NaNs ignored). Start: median and sigma = IQR / 1.3489795 (REF-ROBUST-02);
/// then repeat {keep |x - median| <= k s; median, s = std of kept} until the
/// kept set is unchanged.
ClipResult sigma_clip(std::vector<float>& values, double k, int max_iterations = 50);

/// Correction factor 1/s* for iterated clipping at k: s* is the non-zero fixed
/// point of s^2 = 1 - 2 k s phi(k s) / (2 Phi(k s) - 1) reached from s = 1
/// (REF-ROBUST-03). k = 3 gives 1.015386985053. Throws std::invalid_argument
/// for k < 2 (below ~1.8 the iteration collapses towards 0; 2 gives 1.378).
double clipped_sigma_correction(double k);
/// Correction for a single clip at the true sigma: 1 / sqrt(1 - 2 k phi(k) / (2 Phi(k) - 1)).
double clipped_sigma_correction_single(double k);

/// Median absolute deviation scaled to a Gaussian sigma: MAD / Phi^-1(3/4)
/// (Rousseeuw & Croux 1993, JASA 88, 1273; REF-ROBUST-01). Finite values only;
/// `values` is reordered. NaN when there are none.
double mad_sigma(std::vector<float>& values);

}  // namespace skerry
