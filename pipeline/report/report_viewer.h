#pragma once
/// The report's interactive parts: a zoomable, pannable view of the image, the
/// residual and the rms map (a tile pyramid embedded as PNG data URIs, drawn by a
/// small inline script; the page stays one self-contained file that works
/// offline), and the cut-out gallery (image / model / residual per island).
#include <array>
#include <string>
#include <vector>

#include "skerry/image.h"
#include "skerry/plot.h"

namespace skerry {

/// A pixel box, 0-based, inclusive-exclusive: [x0, x1) x [y0, y1).
struct PixBox {
  long x0 = 0, y0 = 0, x1 = 0, y1 = 0;
  long width() const { return x1 - x0; }
  long height() const { return y1 - y0; }
};

/// One map of the viewer: levels of a 2x pyramid, each a set of square tiles.
/// Level 0 is full resolution. Levels from `complete_from` up are complete;
/// level 0 holds only the tiles that meet a box of `detail` (islands), as far as
/// the pixel budget allows, and the levels between hold nothing (a sparse tile of
/// a coarser level would cover up to as many pixels as the full-resolution tiles
/// under it, doubling the page for each level; the browser scales level 0 down).
struct ViewerLayer {
  std::string key, title, unit;  ///< key: "image", "residual", "rms"
  std::string colour_bar;        ///< <svg> colour bar
  std::string detail_note;       ///< status text where the view is finer than what is embedded
  struct Tile { int level, tx, ty; std::string png_base64; };
  std::vector<Tile> tiles;
  int n_levels = 0, complete_from = 0;
  std::size_t full_res_pixels = 0;  ///< level-0 pixels embedded
  std::size_t bytes = 0;            ///< base64 bytes of all tiles
};

struct ViewerOptions {
  int tile_px = 128;               ///< tile side [pixels of its level]: small, so that full resolution is spent near islands
  int overview_px = 1024;          ///< levels are complete while their longer side is at most this
  long detail_budget_px = 1000000; ///< level-0 pixels embedded at most per map (where there are islands)
  int zlib_level = 6;
};

/// Build the layer of `image` (display `stretch`, colour `map`); `detail` lists
/// boxes (in priority order) that get the finer levels. The image is read once
/// per level; each level is made from the one below by 2 x 2 means.
ViewerLayer build_layer(const ImageF& image, const std::string& key, const std::string& title,
                        plot::ColourMap map, const plot::Stretch& stretch, const std::string& unit, double unit_scale,
                        const std::vector<PixBox>& detail, bool allow_detail, const ViewerOptions& options);

/// A component drawn in the viewer and the gallery: pixel-frame FWHM ellipse.
struct DrawnComponent {
  double x = 0, y = 0;       ///< 0-based pixel centre
  double a = 0, b = 0;       ///< major and minor FWHM on the picture [pixels]
  double angle_deg = 0;      ///< major axis from +x towards -y of the picture (y down), SVG/canvas sense
  long source = -1;          ///< index into the sources list (-1: none)
  std::size_t row = 0;       ///< catalogue row
};

struct ViewerCatalogue {
  std::vector<DrawnComponent> comps;
  std::vector<std::string> columns;             ///< header of the shown row (with units)
  std::vector<std::vector<std::string>> rows;   ///< formatted values, per catalogue row
  std::vector<std::vector<std::size_t>> source_members;  ///< components (indices into comps) per source
  std::vector<std::string> source_labels;
};

/// The viewer section (HTML + inline script). `width`, `height`: the maps' size;
/// `north`, `east`: unit vectors of north and east on the picture (x right, y up).
std::string viewer_html(const std::vector<ViewerLayer>& layers, const ViewerCatalogue& cat, long width, long height,
                        double arcsec_per_pix, const std::array<double, 2>& north, const std::array<double, 2>& east,
                        const ViewerOptions& options);

/// One cut-out of the gallery.
struct Cutout {
  std::string category;          ///< "brightest", "most components", ...
  std::string title;             ///< e.g. "island 12"
  std::string numbers_html;      ///< table rows of its catalogue numbers
  PixBox box;
  std::array<ImageF, 3> patch;   ///< image, model, residual (empty when the map is missing)
  double rms = 0;                ///< local rms for the stretch [map units]
  std::vector<std::size_t> comps;  ///< indices into ViewerCatalogue::comps
};

/// Cut the box out of `image` (NaN outside it).
ImageF cut(const ImageF& image, const PixBox& box);

/// `height`: the maps' height (picture y of the "show in the viewer" buttons).
std::string gallery_html(const std::vector<Cutout>& cutouts, const ViewerCatalogue& cat, double unit_scale,
                         const std::string& unit, long height);

}  // namespace skerry
