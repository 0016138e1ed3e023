#pragma once
/// Islands: connected regions of significant emission, found with hysteresis
/// thresholds in signal-to-noise.
///
///   snr(x, y) = (I - B) / rms          (island SNR convention, docs/CONVENTIONS.md)
///
/// A pixel is a seed when snr >= peak threshold and belongs to the foreground
/// when snr >= grow threshold; an island is an 8-connected component of
/// foreground pixels that holds at least one seed and min_pixels pixels.
/// Pixels whose image value, background or rms is not finite, or whose rms is
/// <= 0, are blank: never foreground.
///
/// Labelling is parallel (row strips labelled independently with union-find
/// over runs, then merged across strip boundaries) and canonical: islands are
/// numbered 1, 2, ... in the raster order (y, then x) of their first pixel, so
/// labels and island tables are identical for any thread count and strip size.
///
/// The peak threshold may instead come from a false discovery rate
/// (Benjamini & Hochberg 1995, J. R. Stat. Soc. B 57, 289; applied to radio
/// images by Hopkins et al. 2002, AJ 123, 1086): see fdr_threshold().
#include <cstdint>
#include <span>
#include <string>
#include <vector>

#include "skerry/background.h"
#include "skerry/image.h"

namespace skerry {

enum class PeakThreshold {
  fixed,  ///< IslandOptions::peak_snr
  fdr,    ///< from the false discovery rate IslandOptions::fdr_alpha
};

struct IslandOptions {
  double peak_snr = 5.0;       ///< seed threshold (PeakThreshold::fixed) [SNR]; > 0
  double grow_snr = 3.0;       ///< growth threshold [SNR]; > 0 and <= peak_snr (fixed)
  PeakThreshold peak_threshold = PeakThreshold::fixed;
  double fdr_alpha = 0.05;     ///< allowed false discovery rate (PeakThreshold::fdr), 0 < alpha < 1
  /// Benjamini & Yekutieli (2001, Ann. Stat. 29, 1165) constant c_N = sum 1/j for
  /// arbitrary dependence; false = c_N = 1 (BH; valid for the positively correlated
  /// one-sided tests of beam-correlated Gaussian noise).
  bool fdr_arbitrary_dependence = false;
  std::int64_t min_pixels = 1; ///< smaller islands are dropped (>= 1)
  int strip_rows = 64;         ///< rows per labelling strip (>= 1); does not change results

  /// Empty when valid; otherwise one line naming the field, its value and the rule.
  std::string validate() const;
};

/// One island. Coordinates 0-based (x = column, y = row); bounding box inclusive.
struct Island {
  std::int32_t label = 0;        ///< value in the label map (1, 2, ... canonical)
  std::int64_t pixels = 0;       ///< number of pixels
  double peak_snr = 0.0;         ///< largest (I - B) / rms over its pixels [SNR]
  float peak_value = 0.0f;       ///< image value I at that pixel [image units, Jy/beam]
  float peak_background = 0.0f;  ///< B at that pixel [Jy/beam]
  float peak_rms = 0.0f;         ///< rms at that pixel [Jy/beam]
  int peak_x = 0, peak_y = 0;    ///< pixel of the peak SNR (first in raster order on ties)
  int x_min = 0, x_max = 0, y_min = 0, y_max = 0;  ///< inclusive bounding box
  int first_x = 0, first_y = 0;  ///< first pixel in raster order
  /// Sum of (I - B) over the island's pixels [Jy/beam * pixel]; divide by the
  /// beam area in pixels for a flux density in Jy (REF-GAUSS-04).
  double sum_minus_background = 0.0;
  bool touches_edge = false;     ///< a pixel lies on the first/last row or column
  bool touches_blank = false;    ///< a pixel is 8-adjacent to a NaN (no data) image pixel
};

struct IslandResult {
  LabelsI32 labels;              ///< (y, x): 0 = no island, else Island::label
  std::vector<Island> islands;   ///< sorted by label (index = label - 1)
  double peak_snr_used = 0.0;    ///< seed threshold applied (+inf when the FDR rejects nothing)
  double grow_snr_used = 0.0;    ///< growth threshold applied (min(grow_snr, peak_snr_used))
  std::int64_t fdr_tests = 0;    ///< N of the FDR (non-blank pixels); 0 for a fixed threshold
  std::int64_t fdr_rejections = 0;  ///< k of the FDR (pixels with snr >= threshold)
  std::int64_t islands_too_small = 0;  ///< seeded components dropped by min_pixels
};

/// Find the islands of `image` given its background and rms. The maps must have
/// the image's size. Throws std::invalid_argument when options.validate() fails
/// or the sizes differ.
IslandResult find_islands(const ImageF& image, const NoiseMaps& maps, const IslandOptions& options);

/// Label an already-thresholded image: `level` holds per pixel 0 (background),
/// 1 (foreground) or 2 (seed, also foreground). The same canonical 8-connected
/// labelling as find_islands (islands without a seed or below min_pixels get 0),
/// without statistics. For tests and for masks built by other stages.
LabelsI32 label_levels(const MaskU8& level, std::int64_t min_pixels = 1, int strip_rows = 64);

/// Result of a Benjamini-Hochberg / Benjamini-Yekutieli procedure.
struct FdrResult {
  std::int64_t tests = 0;        ///< N
  std::int64_t rejections = 0;   ///< k: largest i with p_(i) <= i alpha / (c_N N); 0 = none
  double p_threshold = 0.0;      ///< p_(k); 0 when k = 0
  double c_n = 1.0;              ///< c_N used
};

/// BH / BY on explicit p-values (NaNs ignored): reject every p <= p_threshold.
/// REF-FDR-01 procedure.
FdrResult fdr_from_pvalues(std::span<const double> p_values, double alpha,
                           bool arbitrary_dependence);

/// FDR peak threshold on an image: one-sided p = erfc(snr / sqrt 2) / 2 per
/// non-blank pixel (REF-ROBUST-04), then BH/BY. Returns the threshold SNR (the
/// snr of p_(k): pixels with snr >= it are rejected); +inf when nothing is
/// rejected. `result` (optional) receives N, k and p_(k).
double fdr_threshold(const ImageF& image, const NoiseMaps& maps, double alpha,
                     bool arbitrary_dependence, FdrResult* result = nullptr);

/// c_N = sum_{j=1..N} 1/j (Benjamini & Yekutieli 2001, Theorem 1.3).
double by_constant(std::int64_t n);

}  // namespace skerry
