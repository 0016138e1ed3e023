// Thumbnails: display stretch, colour maps, block averaging, PNG through libpng.
#include <png.h>

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <limits>
#include <sstream>
#include <stdexcept>

#include "skerry/plot.h"

namespace skerry::plot {
namespace {

struct Rgb { double r, g, b; };

// Piecewise-linear interpolation through anchor colours (equally spaced in t).
void interp(const Rgb* a, int n, double t, std::uint8_t out[3]) {
  t = std::clamp(std::isfinite(t) ? t : 0.0, 0.0, 1.0);
  const double u = t * (n - 1);
  const int i = std::min(static_cast<int>(u), n - 2);
  const double f = u - i;
  out[0] = static_cast<std::uint8_t>(std::lround(a[i].r + f * (a[i + 1].r - a[i].r)));
  out[1] = static_cast<std::uint8_t>(std::lround(a[i].g + f * (a[i + 1].g - a[i].g)));
  out[2] = static_cast<std::uint8_t>(std::lround(a[i].b + f * (a[i + 1].b - a[i].b)));
}

double quantile(std::vector<float>& v, double q) {
  if (v.empty()) return 0;
  const std::size_t k = std::min(v.size() - 1, static_cast<std::size_t>(q * static_cast<double>(v.size() - 1)));
  std::nth_element(v.begin(), v.begin() + static_cast<long>(k), v.end());
  return v[k];
}

void png_error_fn(png_structp, png_const_charp msg) { throw std::runtime_error(std::string("libpng: ") + msg); }
void png_warn_fn(png_structp, png_const_charp) {}

}  // namespace

void colour_at(ColourMap map, double t, std::uint8_t rgb[3]) {
  static const Rgb grey[] = {{0, 0, 0}, {255, 255, 255}};
  // Okabe-Ito blue (0,114,178) -> white -> vermillion (213,94,0).
  static const Rgb div[] = {{0, 114, 178}, {255, 255, 255}, {213, 94, 0}};
  // Own sequential map: lightness increases monotonically (navy -> teal -> green -> yellow).
  static const Rgb seq[] = {{20, 24, 82}, {0, 94, 140}, {0, 150, 130}, {120, 200, 90}, {250, 235, 80}};
  switch (map) {
    case ColourMap::Grey: interp(grey, 2, t, rgb); return;
    case ColourMap::Diverging: interp(div, 3, t, rgb); return;
    case ColourMap::Sequential: interp(seq, 5, t, rgb); return;
  }
}

double Stretch::to_unit(double v) const {
  if (!(vmax > vmin)) return 0;
  if (asinh_soft > 0) {
    const double d = std::max(v - vmin, 0.0);
    return std::clamp(std::asinh(d / asinh_soft) / std::asinh((vmax - vmin) / asinh_soft), 0.0, 1.0);
  }
  return std::clamp((v - vmin) / (vmax - vmin), 0.0, 1.0);
}

double Stretch::from_unit(double t) const {
  if (asinh_soft > 0) return vmin + asinh_soft * std::sinh(t * std::asinh((vmax - vmin) / asinh_soft));
  return vmin + t * (vmax - vmin);
}

std::vector<float> sample_pixels(const ImageF& image, std::size_t max_samples) {
  const std::size_t n = static_cast<std::size_t>(image.size());
  const std::size_t stride = std::max<std::size_t>(1, (n + max_samples - 1) / std::max<std::size_t>(max_samples, 1));
  std::vector<float> v;
  v.reserve(std::min(n, max_samples));
  for (std::size_t i = 0; i < n; i += stride)
    if (std::isfinite(image.data()[i])) v.push_back(image.data()[i]);
  return v;
}

Stretch auto_stretch(const ImageF& image, bool symmetric, bool linear) {
  std::vector<float> v = sample_pixels(image);
  Stretch s;
  if (v.empty()) return s;
  if (symmetric) {
    std::vector<float> a(v.size());
    for (std::size_t i = 0; i < v.size(); ++i) a[i] = std::fabs(v[i]);
    const double m = std::max(quantile(a, 0.995), 1e-30);
    s.vmin = -m; s.vmax = m;
    return s;
  }
  if (linear) {
    s.vmin = quantile(v, 0.005);
    s.vmax = quantile(v, 0.995);
    if (!(s.vmax > s.vmin)) s.vmax = s.vmin + std::max(std::fabs(s.vmin), 1e-30);
    return s;
  }
  const double med = quantile(v, 0.5);
  std::vector<float> dev(v.size());
  for (std::size_t i = 0; i < v.size(); ++i) dev[i] = static_cast<float>(std::fabs(v[i] - med));
  double sigma = 1.4826 * quantile(dev, 0.5);  // robust sigma from the MAD (common practice)
  if (!(sigma > 0)) sigma = std::max(std::fabs(med) * 1e-3, 1e-30);
  s.vmin = med - 2 * sigma;
  s.asinh_soft = sigma;
  s.vmax = std::max(quantile(v, 0.999), s.vmin + 20 * sigma);
  return s;
}

Raster thumbnail(const ImageF& image, const Stretch& stretch, ColourMap map, int max_side, double* scale_out) {
  Raster r;
  const long ny = image.rows(), nx = image.cols();
  if (nx <= 0 || ny <= 0 || max_side < 1) return r;
  const long f = std::max(1L, static_cast<long>(std::ceil(static_cast<double>(std::max(nx, ny)) / max_side)));
  r.width = static_cast<int>((nx + f - 1) / f);
  r.height = static_cast<int>((ny + f - 1) / f);
  r.rgb.assign(static_cast<std::size_t>(r.width) * static_cast<std::size_t>(r.height) * 3, 0);
  if (scale_out) *scale_out = 1.0 / static_cast<double>(f);
  for (int ty = 0; ty < r.height; ++ty) {
    for (int tx = 0; tx < r.width; ++tx) {
      double sum = 0;
      int n = 0;
      for (long y = ty * f; y < std::min(ny, (ty + 1) * f); ++y)
        for (long x = tx * f; x < std::min(nx, (tx + 1) * f); ++x) {
          const float v = image(y, x);
          if (std::isfinite(v)) { sum += v; ++n; }
        }
      // Image row 0 is the bottom of the picture: flip vertically.
      std::uint8_t* px = &r.rgb[(static_cast<std::size_t>(r.height - 1 - ty) * static_cast<std::size_t>(r.width) + static_cast<std::size_t>(tx)) * 3];
      if (n == 0) { px[0] = px[1] = px[2] = 128; continue; }
      colour_at(map, stretch.to_unit(sum / n), px);
    }
  }
  return r;
}

IndexedRaster index_block(const ImageF& image, long x0, long y0, long w, long h, const Stretch& stretch) {
  IndexedRaster r;
  const long nx = image.cols(), ny = image.rows();
  const long xa = std::max(0L, x0), ya = std::max(0L, y0), xb = std::min(nx, x0 + w), yb = std::min(ny, y0 + h);
  if (xb <= xa || yb <= ya) return r;
  r.width = static_cast<int>(xb - xa);
  r.height = static_cast<int>(yb - ya);
  r.idx.resize(static_cast<std::size_t>(r.width) * static_cast<std::size_t>(r.height));
  for (long y = ya; y < yb; ++y) {
    std::uint8_t* row = &r.idx[static_cast<std::size_t>(yb - 1 - y) * static_cast<std::size_t>(r.width)];
    for (long x = xa; x < xb; ++x) {
      const float v = image(y, x);
      row[x - xa] = std::isfinite(v) ? static_cast<std::uint8_t>(std::lround(254.0 * stretch.to_unit(v))) : kNoDataIndex;
    }
  }
  return r;
}

ImageF halve(const ImageF& image) {
  const long ny = image.rows(), nx = image.cols();
  ImageF o((ny + 1) / 2, (nx + 1) / 2);
  for (long y = 0; y < o.rows(); ++y)
    for (long x = 0; x < o.cols(); ++x) {
      double s = 0;
      int n = 0;
      for (long yy = 2 * y; yy < std::min(ny, 2 * y + 2); ++yy)
        for (long xx = 2 * x; xx < std::min(nx, 2 * x + 2); ++xx) {
          const float v = image(yy, xx);
          if (std::isfinite(v)) { s += v; ++n; }
        }
      o(y, x) = n ? static_cast<float>(s / n) : std::numeric_limits<float>::quiet_NaN();
    }
  return o;
}

std::vector<std::uint8_t> encode_png_indexed(const IndexedRaster& raster, ColourMap map, int zlib_level) {
  if (raster.width <= 0 || raster.height <= 0 ||
      raster.idx.size() != static_cast<std::size_t>(raster.width) * static_cast<std::size_t>(raster.height))
    throw std::runtime_error("encode_png_indexed: raster size does not match its pixels");
  std::vector<std::uint8_t> out;
  png_structp png = png_create_write_struct(PNG_LIBPNG_VER_STRING, nullptr, png_error_fn, png_warn_fn);
  if (!png) throw std::runtime_error("libpng: cannot create a write struct");
  png_infop info = png_create_info_struct(png);
  if (!info) { png_destroy_write_struct(&png, nullptr); throw std::runtime_error("libpng: cannot create an info struct"); }
  try {
    png_set_write_fn(png, &out, [](png_structp p, png_bytep data, png_size_t len) {
      auto* v = static_cast<std::vector<std::uint8_t>*>(png_get_io_ptr(p));
      v->insert(v->end(), data, data + len);
    }, nullptr);
    png_set_compression_level(png, std::clamp(zlib_level, 1, 9));
    png_set_IHDR(png, info, static_cast<png_uint_32>(raster.width), static_cast<png_uint_32>(raster.height), 8,
                 PNG_COLOR_TYPE_PALETTE, PNG_INTERLACE_NONE, PNG_COMPRESSION_TYPE_DEFAULT, PNG_FILTER_TYPE_DEFAULT);
    png_color pal[256];
    for (int i = 0; i < 255; ++i) {
      std::uint8_t c[3];
      colour_at(map, i / 254.0, c);
      pal[i] = {c[0], c[1], c[2]};
    }
    pal[kNoDataIndex] = {128, 128, 128};
    png_set_PLTE(png, info, pal, 256);
    png_write_info(png, info);
    for (int y = 0; y < raster.height; ++y)
      png_write_row(png, const_cast<png_bytep>(&raster.idx[static_cast<std::size_t>(y) * static_cast<std::size_t>(raster.width)]));
    png_write_end(png, nullptr);
  } catch (...) {
    png_destroy_write_struct(&png, &info);
    throw;
  }
  png_destroy_write_struct(&png, &info);
  return out;
}

std::vector<std::uint8_t> encode_png(const Raster& raster) {
  if (raster.width <= 0 || raster.height <= 0 ||
      raster.rgb.size() != static_cast<std::size_t>(raster.width) * static_cast<std::size_t>(raster.height) * 3)
    throw std::runtime_error("encode_png: raster size does not match its pixels");
  std::vector<std::uint8_t> out;
  png_structp png = png_create_write_struct(PNG_LIBPNG_VER_STRING, nullptr, png_error_fn, png_warn_fn);
  if (!png) throw std::runtime_error("libpng: cannot create a write struct");
  png_infop info = png_create_info_struct(png);
  if (!info) { png_destroy_write_struct(&png, nullptr); throw std::runtime_error("libpng: cannot create an info struct"); }
  try {
    png_set_write_fn(png, &out, [](png_structp p, png_bytep data, png_size_t len) {
      auto* v = static_cast<std::vector<std::uint8_t>*>(png_get_io_ptr(p));
      v->insert(v->end(), data, data + len);
    }, nullptr);
    png_set_IHDR(png, info, static_cast<png_uint_32>(raster.width), static_cast<png_uint_32>(raster.height), 8,
                 PNG_COLOR_TYPE_RGB, PNG_INTERLACE_NONE, PNG_COMPRESSION_TYPE_DEFAULT, PNG_FILTER_TYPE_DEFAULT);
    png_write_info(png, info);
    for (int y = 0; y < raster.height; ++y)
      png_write_row(png, const_cast<png_bytep>(&raster.rgb[static_cast<std::size_t>(y) * static_cast<std::size_t>(raster.width) * 3]));
    png_write_end(png, nullptr);
  } catch (...) {
    png_destroy_write_struct(&png, &info);
    throw;
  }
  png_destroy_write_struct(&png, &info);
  return out;
}

Raster decode_png(const std::vector<std::uint8_t>& bytes) {
  if (bytes.size() < 8 || png_sig_cmp(bytes.data(), 0, 8) != 0) throw std::runtime_error("not a PNG (bad signature)");
  png_image img;
  std::memset(&img, 0, sizeof img);
  img.version = PNG_IMAGE_VERSION;
  if (!png_image_begin_read_from_memory(&img, bytes.data(), bytes.size()))
    throw std::runtime_error(std::string("PNG: ") + img.message);
  img.format = PNG_FORMAT_RGB;
  Raster r;
  r.width = static_cast<int>(img.width);
  r.height = static_cast<int>(img.height);
  r.rgb.resize(PNG_IMAGE_SIZE(img));
  if (!png_image_finish_read(&img, nullptr, r.rgb.data(), 0, nullptr)) {
    const std::string m = img.message;
    png_image_free(&img);
    throw std::runtime_error("PNG: " + m);
  }
  return r;
}

std::string base64(const std::vector<std::uint8_t>& b) {
  static const char* t = "ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
  std::string o;
  o.reserve((b.size() + 2) / 3 * 4);
  std::size_t i = 0;
  for (; i + 2 < b.size(); i += 3) {
    const unsigned v = (b[i] << 16) | (b[i + 1] << 8) | b[i + 2];
    o += t[(v >> 18) & 63]; o += t[(v >> 12) & 63]; o += t[(v >> 6) & 63]; o += t[v & 63];
  }
  if (i + 1 == b.size()) {
    const unsigned v = b[i] << 16;
    o += t[(v >> 18) & 63]; o += t[(v >> 12) & 63]; o += "==";
  } else if (i + 2 == b.size()) {
    const unsigned v = (b[i] << 16) | (b[i + 1] << 8);
    o += t[(v >> 18) & 63]; o += t[(v >> 12) & 63]; o += t[(v >> 6) & 63]; o += '=';
  }
  return o;
}

std::string colour_bar_svg(const Stretch& s, ColourMap map, const std::string& unit_label, double value_scale,
                           int width_px) {
  // Side margins wide enough for a centred end label such as "-0.015" (no clipping).
  const int W = width_px, H = 52, x0 = 30, x1 = W - 30, bh = 14;
  std::ostringstream o;
  o << "<svg xmlns=\"http://www.w3.org/2000/svg\" class=\"colourbar\" width=\"" << W << "\" height=\"" << H
    << "\" viewBox=\"0 0 " << W << ' ' << H << "\" font-family=\"DejaVu Sans, Verdana, sans-serif\" font-size=\"11\">\n";
  const int n = 64;
  for (int i = 0; i < n; ++i) {
    std::uint8_t c[3];
    colour_at(map, (i + 0.5) / n, c);
    char col[8];
    std::snprintf(col, sizeof col, "#%02x%02x%02x", c[0], c[1], c[2]);
    const double a = x0 + (x1 - x0) * static_cast<double>(i) / n, w = (x1 - x0) / static_cast<double>(n) + 0.6;
    o << "<rect x=\"" << a << "\" y=\"2\" width=\"" << w << "\" height=\"" << bh << "\" fill=\"" << col << "\"/>";
  }
  o << "\n<rect x=\"" << x0 << "\" y=\"2\" width=\"" << (x1 - x0) << "\" height=\"" << bh
    << "\" fill=\"none\" stroke=\"#444\"/>\n";
  // Ticks at nice data values between vmin and vmax, placed by the stretch.
  std::vector<double> vals;
  if (s.asinh_soft > 0) {
    // asinh: ticks at nice values of the displayed positions 0, .25, .5, .75, 1 rounded to 2 significant digits.
    for (double t : {0.0, 0.2, 0.4, 0.6, 0.8, 1.0}) {
      const double v = s.from_unit(t) * value_scale;
      if (v == 0) { vals.push_back(0); continue; }
      const double e = std::pow(10.0, std::floor(std::log10(std::fabs(v))) - 1);
      vals.push_back(std::round(v / e) * e / value_scale);
    }
  } else {
    for (double v : nice_ticks(s.vmin * value_scale, s.vmax * value_scale, 6)) vals.push_back(v / value_scale);
  }
  double last_x = -1e9;
  for (double v : vals) {
    const double t = s.to_unit(v);
    if (v < s.vmin - 1e-12 * std::fabs(s.vmin) || v > s.vmax + 1e-12 * std::fabs(s.vmax)) continue;
    const double x = x0 + t * (x1 - x0);
    if (x - last_x < 34) continue;
    last_x = x;
    o << "<line x1=\"" << x << "\" y1=\"" << 2 + bh << "\" x2=\"" << x << "\" y2=\"" << 6 + bh << "\" stroke=\"#444\"/>"
      << "<text class=\"cbtick\" x=\"" << x << "\" y=\"" << 18 + bh << "\" text-anchor=\"middle\" fill=\"#333\">"
      << tick_label(v * value_scale) << "</text>\n";
  }
  o << "<text class=\"cbunit\" x=\"" << W / 2 << "\" y=\"" << H - 3 << "\" text-anchor=\"middle\" fill=\"#222\">"
    << xml_escape(unit_label) << (s.asinh_soft > 0 ? " (asinh stretch)" : "") << "</text>\n</svg>\n";
  return o.str();
}

}  // namespace skerry::plot
