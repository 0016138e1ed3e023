// Plot and raster helpers: nice ticks, PNG round trip, base64 (RFC 4648 test vectors).
#include <gtest/gtest.h>

#include <cmath>

#include "skerry/plot.h"

namespace skerry::plot {
namespace {

TEST(Ticks, NiceValues) {
  // Heckbert (1990) labelling [from memory]: steps of 1, 2 or 5 x 10^k inside the range.
  const auto t = nice_ticks(0.13, 9.7, 6);
  ASSERT_FALSE(t.empty());
  for (std::size_t i = 1; i < t.size(); ++i) EXPECT_NEAR(t[i] - t[i - 1], 2.0, 1e-12);
  EXPECT_NEAR(t.front(), 2.0, 1e-12);
  const auto l = log_ticks(3e-4, 2.0);
  EXPECT_NEAR(l.front(), 1e-3, 1e-15);
  EXPECT_NEAR(l.back(), 1.0, 1e-12);
  EXPECT_EQ(tick_label(0.001), "0.001");
  EXPECT_EQ(tick_label(1e-5), "1e-5");
  EXPECT_EQ(tick_label(250), "250");
}

TEST(Base64, Rfc4648Vectors) {
  // RFC 4648 section 10 test vectors.
  auto b = [](const std::string& s) { return base64(std::vector<std::uint8_t>(s.begin(), s.end())); };
  EXPECT_EQ(b(""), "");
  EXPECT_EQ(b("f"), "Zg==");
  EXPECT_EQ(b("fo"), "Zm8=");
  EXPECT_EQ(b("foo"), "Zm9v");
  EXPECT_EQ(b("foob"), "Zm9vYg==");
  EXPECT_EQ(b("fooba"), "Zm9vYmE=");
  EXPECT_EQ(b("foobar"), "Zm9vYmFy");
}

TEST(Raster, ThumbnailOrientationAndPngRoundTrip) {
  ImageF img = ImageF::Zero(40, 60);
  img(0, 0) = 10.0f;  // FITS pixel (1, 1): bottom-left of the picture
  img(39, 59) = std::nanf("");
  Stretch s;
  s.vmin = 0;
  s.vmax = 1;
  double scale = 0;
  const Raster r = thumbnail(img, s, ColourMap::Grey, 60, &scale);
  EXPECT_EQ(r.width, 60);
  EXPECT_EQ(r.height, 40);
  EXPECT_EQ(scale, 1.0);
  auto px = [&](int x, int y) { return &r.rgb[(static_cast<std::size_t>(y) * 60 + x) * 3]; };
  EXPECT_EQ(px(0, 39)[0], 255);  // bright pixel at the bottom-left
  EXPECT_EQ(px(0, 0)[0], 0);
  EXPECT_EQ(px(59, 0)[0], 128);  // NaN: neutral grey, top-right
  const auto png = encode_png(r);
  ASSERT_GT(png.size(), 8u);
  const Raster back = decode_png(png);
  EXPECT_EQ(back.width, r.width);
  EXPECT_EQ(back.height, r.height);
  EXPECT_EQ(back.rgb, r.rgb);
  EXPECT_THROW(decode_png({1, 2, 3, 4, 5, 6, 7, 8, 9}), std::runtime_error);
}

TEST(Raster, AsinhStretchInverse) {
  Stretch s;
  s.vmin = -2e-4;
  s.vmax = 0.05;
  s.asinh_soft = 1e-4;
  for (double t : {0.0, 0.1, 0.5, 0.9, 1.0}) EXPECT_NEAR(s.to_unit(s.from_unit(t)), t, 1e-12);
  // asinh shows faint emission: 1 sigma above vmin already uses a visible share of the scale.
  EXPECT_GT(s.to_unit(s.vmin + 3e-4), 0.2);
}

TEST(Svg, PlotHasAxesLabelsAndNoData) {
  Plot p;
  p.id = "t1";
  p.x_label = "S [mJy]";
  p.y_label = "N";
  p.x_log = true;
  p.series.push_back({SeriesKind::Points, {1, 10, 100, -1}, {1, 2, 3, 4}, {}, {}, colour::kBlue, "a", 2, 1, false});
  const std::string svg = render_svg(p);
  EXPECT_NE(svg.find("id=\"t1\""), std::string::npos);
  EXPECT_NE(svg.find("S [mJy]"), std::string::npos);
  EXPECT_EQ(svg.find("no data"), std::string::npos);
  std::size_t circles = 0;
  for (std::size_t pos = 0; (pos = svg.find("<circle", pos)) != std::string::npos; ++pos) ++circles;
  EXPECT_EQ(circles, 3u);  // the non-positive x is left out on a log axis
  Plot e;
  e.id = "t2";
  EXPECT_NE(render_svg(e).find("no data"), std::string::npos);
}

}  // namespace
}  // namespace skerry::plot
