#pragma once
/// Plots and thumbnails as pure functions: SVG text for plots (axes, ticks at
/// nice values, labels with units, linear or log axes), PNG bytes for image
/// thumbnails (libpng, in memory). No files, no printing.
///
/// Palette: Okabe & Ito (2008, "Color Universal Design") colours, distinguishable
/// with the common colour-vision deficiencies.
#include <cstdint>
#include <optional>
#include <string>
#include <vector>

#include "skerry/image.h"

namespace skerry::plot {

/// Okabe-Ito colours as "#rrggbb".
namespace colour {
inline constexpr const char* kBlack = "#000000";
inline constexpr const char* kOrange = "#E69F00";
inline constexpr const char* kSkyBlue = "#56B4E9";
inline constexpr const char* kGreen = "#009E73";
inline constexpr const char* kYellow = "#F0E442";
inline constexpr const char* kBlue = "#0072B2";
inline constexpr const char* kVermillion = "#D55E00";
inline constexpr const char* kPurple = "#CC79A7";
}  // namespace colour

enum class SeriesKind { Points, Line, Steps, ErrorPoints, Bars };

struct Series {
  SeriesKind kind = SeriesKind::Points;
  std::vector<double> x, y;
  std::vector<double> y_lo, y_hi;  ///< ErrorPoints: absolute lower/upper ends (NaN: none)
  /// Steps/Bars: x holds the n+1 bin edges, y the n heights.
  std::string colour = colour::kBlue;
  std::string label;               ///< legend entry ("" = none)
  double point_radius_px = 2.5;
  double line_width_px = 1.6;
  bool dashed = false;
};

struct Plot {
  std::string id;                  ///< element id of the <svg> (for tests and anchors)
  std::string title;
  std::string x_label, y_label;    ///< with units, e.g. "S_int [mJy]"
  bool x_log = false, y_log = false;
  std::optional<double> x_min, x_max, y_min, y_max;  ///< default: from the data (+ margin)
  std::vector<Series> series;
  std::vector<double> v_lines, h_lines;  ///< dotted reference lines
  std::string note;                ///< small text in the upper-left corner of the plot area
  int width_px = 520, height_px = 360;
};

/// The plot as a standalone <svg> element. Non-finite points (and points <= 0 on
/// a log axis) are left out. A plot without any drawable point says so in its
/// centre ("no data") instead of failing.
std::string render_svg(const Plot& plot);

/// Tick positions at "nice" values (1, 2, 5 x 10^k; Heckbert 1990, "Nice numbers
/// for graph labels", Graphics Gems I [from memory]) covering [lo, hi], about
/// `target` of them, all inside [lo, hi].
std::vector<double> nice_ticks(double lo, double hi, int target = 6);
/// Decades (and 2, 5 times them when few decades) inside [lo, hi], lo > 0.
std::vector<double> log_ticks(double lo, double hi);
/// Short tick text: "0.5", "20", "1e-05" style only where needed.
std::string tick_label(double v);

/// Escape &, <, >, " for XML text and attributes.
std::string xml_escape(const std::string& s);

// ---------------------------------------------------------------- rasters

/// 8-bit RGB raster, row 0 at the top.
struct Raster {
  int width = 0, height = 0;
  std::vector<std::uint8_t> rgb;  ///< width * height * 3
};

enum class ColourMap { Grey, Diverging, Sequential };

/// RGB of a colour map at t in [0, 1] (clamped). Grey: black -> white. Diverging:
/// Okabe-Ito blue -> white -> vermillion. Sequential: dark blue -> green -> yellow
/// (monotonic lightness). NaN pixels are drawn in a neutral mid grey elsewhere.
void colour_at(ColourMap map, double t, std::uint8_t rgb[3]);

/// Display scaling of an image to [0, 1].
struct Stretch {
  double vmin = 0, vmax = 1;   ///< data values [image units] at 0 and 1
  double asinh_soft = 0;       ///< > 0: t = asinh((v - vmin)/soft) / asinh((vmax - vmin)/soft)
  double to_unit(double v) const;
  /// Data value at display position t (inverse of to_unit), for colour-bar labels.
  double from_unit(double t) const;
};

/// At most `max_samples` finite pixels of `image` taken at a fixed stride
/// (deterministic; all of them when there are fewer): the statistics of a display
/// stretch do not need every pixel of a large map.
std::vector<float> sample_pixels(const ImageF& image, std::size_t max_samples = 1u << 20);

/// asinh stretch that shows faint emission: vmin = median - 2 sigma_robust,
/// soft = sigma_robust, vmax = the 99.9th percentile (at least vmin + 20 soft).
/// sigma_robust = 1.4826 MAD (common practice). `symmetric`: vmin = -vmax, linear
/// (residual maps). Linear percentile stretch (0.5 %, 99.5 %) when `linear`.
/// Quantiles from sample_pixels (2^20 pixels at most).
Stretch auto_stretch(const ImageF& image, bool symmetric = false, bool linear = false);

/// Thumbnail of `image` (row 0 of the image = bottom of the picture, FITS
/// convention) at most `max_side` pixels on its longer side (block-averaged,
/// NaN-aware). `scale_out` receives the thumbnail pixels per image pixel.
Raster thumbnail(const ImageF& image, const Stretch& stretch, ColourMap map, int max_side,
                 double* scale_out = nullptr);

/// PNG bytes (libpng, 8-bit RGB, no interlace). Throws std::runtime_error on a
/// libpng failure.
std::vector<std::uint8_t> encode_png(const Raster& raster);
/// Decode 8-bit RGB(A)/grey PNG bytes into an RGB raster (used by tests and
/// checks). Throws std::runtime_error for bytes that are not a PNG.
Raster decode_png(const std::vector<std::uint8_t>& bytes);

/// 8-bit indexed raster, row 0 at the top: indices 0..254 are colour-map steps
/// t = i / 254, index 255 is "no data" (drawn mid grey). One byte per pixel, so a
/// PNG of it is about a third of the RGB one (zoomable maps in the report).
struct IndexedRaster {
  int width = 0, height = 0;
  std::vector<std::uint8_t> idx;  ///< width * height
};
inline constexpr std::uint8_t kNoDataIndex = 255;

/// The block (x0, y0, w, h) of `image` (0-based, y up; clipped to the image) as an
/// indexed raster, flipped so that the picture has north-ish up (FITS row 0 at the
/// bottom).
IndexedRaster index_block(const ImageF& image, long x0, long y0, long w, long h, const Stretch& stretch);

/// NaN-aware 2 x 2 block mean (odd edges averaged over what is there): one level
/// of a multi-resolution pyramid, (rows+1)/2 x (cols+1)/2.
ImageF halve(const ImageF& image);

/// PNG bytes of an indexed raster with the palette of `map` (PNG colour type 3).
/// `zlib_level` 1 (fast) .. 9 (small).
std::vector<std::uint8_t> encode_png_indexed(const IndexedRaster& raster, ColourMap map, int zlib_level = 6);

/// Base64 (RFC 4648) of bytes, for data: URIs.
std::string base64(const std::vector<std::uint8_t>& bytes);

/// A horizontal colour bar as an <svg>: the map, tick values from `stretch` at
/// nice data values, and `unit_label` (e.g. "mJy/beam") under it. Values are
/// multiplied by `value_scale` for display (e.g. 1e3 for Jy -> mJy).
std::string colour_bar_svg(const Stretch& stretch, ColourMap map, const std::string& unit_label,
                           double value_scale, int width_px = 360);

}  // namespace skerry::plot
