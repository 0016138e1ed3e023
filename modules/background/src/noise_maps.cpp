// Full-resolution evaluation of background and rms maps.
#include <algorithm>
#include <cmath>
#include <stdexcept>
#include <utility>
#include <vector>

#include "skerry/background.h"

namespace skerry {

namespace {
// Position of coordinate t among node centres c[0..n): lower node, upper node
// and weight of the upper one. Bilinear interpolation between node centres;
// constant (weight 0 on the nearest node) beyond the outermost centres.
struct Tap {
  int i0 = 0, i1 = 0;
  float w = 0.0f;
};
Tap tap_for(const std::vector<double>& c, double t) {
  const int n = static_cast<int>(c.size());
  if (n == 1 || t <= c.front()) return {0, 0, 0.0f};
  if (t >= c.back()) return {n - 1, n - 1, 0.0f};
  const int i = static_cast<int>(std::upper_bound(c.begin(), c.end(), t) - c.begin()) - 1;
  const double w = (t - c[i]) / (c[i + 1] - c[i]);
  return {i, i + 1, static_cast<float>(w)};
}
}  // namespace

struct NoiseMaps::Data {
  BackgroundGrid grid;
  std::vector<Tap> x_taps;  // per image column
  std::vector<Tap> y_taps;  // per image row
  // Columns grouped into segments of equal (i0, i1): [x_begin, x_end).
  struct Segment {
    int x_begin, x_end, i0, i1;
  };
  std::vector<Segment> segments;
  std::vector<float> x_weight;  // x_taps[x].w, contiguous for the row loop
  ImageF background, rms;   // Kind::images
  float bg_value = 0.0f, rms_value = 0.0f;  // Kind::constant
};

NoiseMaps NoiseMaps::from_grid(BackgroundGrid grid) {
  if (grid.nx() < 1 || grid.ny() < 1 || grid.background.rows() != grid.ny() ||
      grid.background.cols() != grid.nx() || grid.rms.rows() != grid.ny() || grid.rms.cols() != grid.nx())
    throw std::invalid_argument("NoiseMaps::from_grid: inconsistent grid");
  auto d = std::make_shared<Data>();
  d->x_taps.resize(static_cast<std::size_t>(grid.image_width));
  for (int x = 0; x < grid.image_width; ++x) d->x_taps[x] = tap_for(grid.node_x, x);
  d->x_weight.resize(d->x_taps.size());
  for (int x = 0; x < grid.image_width; ++x) {
    const Tap& t = d->x_taps[x];
    d->x_weight[x] = t.w;
    if (d->segments.empty() || d->segments.back().i0 != t.i0 || d->segments.back().i1 != t.i1)
      d->segments.push_back({x, x + 1, t.i0, t.i1});
    else
      d->segments.back().x_end = x + 1;
  }
  d->y_taps.resize(static_cast<std::size_t>(grid.image_height));
  for (int y = 0; y < grid.image_height; ++y) d->y_taps[y] = tap_for(grid.node_y, y);
  NoiseMaps m;
  m.kind_ = Kind::grid;
  m.width_ = grid.image_width;
  m.height_ = grid.image_height;
  d->grid = std::move(grid);
  m.data_ = std::move(d);
  return m;
}

NoiseMaps NoiseMaps::from_images(ImageF background, ImageF rms) {
  if (background.rows() != rms.rows() || background.cols() != rms.cols())
    throw std::invalid_argument("NoiseMaps::from_images: background and rms shapes differ");
  auto d = std::make_shared<Data>();
  NoiseMaps m;
  m.kind_ = Kind::images;
  m.width_ = static_cast<int>(background.cols());
  m.height_ = static_cast<int>(background.rows());
  d->background = std::move(background);
  d->rms = std::move(rms);
  m.data_ = std::move(d);
  return m;
}

NoiseMaps NoiseMaps::constant(int width, int height, float background, float rms) {
  auto d = std::make_shared<Data>();
  d->bg_value = background;
  d->rms_value = rms;
  NoiseMaps m;
  m.kind_ = Kind::constant;
  m.width_ = width;
  m.height_ = height;
  m.data_ = std::move(d);
  return m;
}

const BackgroundGrid* NoiseMaps::grid() const { return kind_ == Kind::grid ? &data_->grid : nullptr; }

void NoiseMaps::row(int y, float* bg, float* rms) const {
  if (y < 0 || y >= height_) throw std::out_of_range("NoiseMaps::row: row out of range");
  const int w = width_;
  switch (kind_) {
    case Kind::none:
      throw std::logic_error("NoiseMaps::row on empty maps");
    case Kind::constant:
      std::fill(bg, bg + w, data_->bg_value);
      std::fill(rms, rms + w, data_->rms_value);
      return;
    case Kind::images:
      std::copy_n(&data_->background(y, 0), w, bg);
      std::copy_n(&data_->rms(y, 0), w, rms);
      return;
    case Kind::grid:
      break;
  }
  // Bilinear: first along y between the two node rows (double), then along x.
  // (1 - w) a + w b with a, b > 0 and 0 <= w <= 1 stays > 0.
  const BackgroundGrid& g = data_->grid;
  const int nx = g.nx();
  const Tap ty = data_->y_taps[y];
  std::vector<float> cb(static_cast<std::size_t>(nx)), cr(static_cast<std::size_t>(nx));
  const double wy = ty.w;
  for (int i = 0; i < nx; ++i) {
    cb[i] = static_cast<float>((1.0 - wy) * g.background(ty.i0, i) + wy * g.background(ty.i1, i));
    cr[i] = static_cast<float>((1.0 - wy) * g.rms(ty.i0, i) + wy * g.rms(ty.i1, i));
  }
  // Per segment of columns between the same two node centres: a loop the
  // compiler vectorises; the same arithmetic as grid_value() below.
  const float* wxs = data_->x_weight.data();
  for (const Data::Segment& sg : data_->segments) {
    const float b0 = cb[sg.i0], b1 = cb[sg.i1], r0 = cr[sg.i0], r1 = cr[sg.i1];
    for (int x = sg.x_begin; x < sg.x_end; ++x) {
      const float wx = wxs[x];
      const float ux = 1.0f - wx;
      bg[x] = ux * b0 + wx * b1;
      rms[x] = ux * r0 + wx * r1;
    }
  }
}

namespace {
// One value of a grid map at (x, y) with exactly the arithmetic of NoiseMaps::row.
float grid_value(const ImageF& g, const Tap& tx, const Tap& ty) {
  const double wy = ty.w;
  const float c0 = static_cast<float>((1.0 - wy) * g(ty.i0, tx.i0) + wy * g(ty.i1, tx.i0));
  const float c1 = static_cast<float>((1.0 - wy) * g(ty.i0, tx.i1) + wy * g(ty.i1, tx.i1));
  const float wx = tx.w;
  const float ux = 1.0f - wx;
  return ux * c0 + wx * c1;
}
}  // namespace

float NoiseMaps::background_at(int x, int y) const {
  if (x < 0 || x >= width_ || y < 0 || y >= height_)
    throw std::out_of_range("NoiseMaps::background_at: pixel out of range");
  switch (kind_) {
    case Kind::none: throw std::logic_error("NoiseMaps::background_at on empty maps");
    case Kind::constant: return data_->bg_value;
    case Kind::images: return data_->background(y, x);
    case Kind::grid: break;
  }
  return grid_value(data_->grid.background, data_->x_taps[x], data_->y_taps[y]);
}

float NoiseMaps::rms_at(int x, int y) const {
  if (x < 0 || x >= width_ || y < 0 || y >= height_)
    throw std::out_of_range("NoiseMaps::rms_at: pixel out of range");
  switch (kind_) {
    case Kind::none: throw std::logic_error("NoiseMaps::rms_at on empty maps");
    case Kind::constant: return data_->rms_value;
    case Kind::images: return data_->rms(y, x);
    case Kind::grid: break;
  }
  return grid_value(data_->grid.rms, data_->x_taps[x], data_->y_taps[y]);
}

ImageF NoiseMaps::background_image() const {
  ImageF out(height_, width_);
  std::vector<float> r(static_cast<std::size_t>(width_));
  for (int y = 0; y < height_; ++y) row(y, &out(y, 0), r.data());
  return out;
}

ImageF NoiseMaps::rms_image() const {
  ImageF out(height_, width_);
  std::vector<float> b(static_cast<std::size_t>(width_));
  for (int y = 0; y < height_; ++y) row(y, b.data(), &out(y, 0));
  return out;
}

}  // namespace skerry
