// Canonical labelling of a thresholded level image (0 / 1 grow / 2 seed).
#include <stdexcept>
#include <string>

#include "ccl_internal.h"
#include "skerry/islands.h"

namespace skerry {

LabelsI32 label_levels(const MaskU8& level, std::int64_t min_pixels, int strip_rows) {
  if (strip_rows < 1) throw std::invalid_argument("label_levels: strip_rows must be >= 1");
  if (min_pixels < 1) throw std::invalid_argument("label_levels: min_pixels must be >= 1");
  const int w = static_cast<int>(level.cols()), h = static_cast<int>(level.rows());
  auto scan = [&](int y, std::vector<detail::Run>& out) {
    const std::uint8_t* l = w > 0 ? &level(y, 0) : nullptr;
    int x = 0;
    while (x < w) {
      if (l[x] == 0) {
        ++x;
        continue;
      }
      detail::Run r;
      r.y = y;
      r.x0 = x;
      while (x < w && l[x] != 0) {
        r.seed = r.seed || l[x] >= 2;
        ++x;
      }
      r.x1 = x - 1;
      out.push_back(r);
    }
  };
  const detail::Components c = detail::label_components(w, h, strip_rows, min_pixels, scan);
  LabelsI32 labels;
  detail::paint_labels(c, w, h, strip_rows, labels);
  return labels;
}

}  // namespace skerry
