#pragma once
// Internal: parallel, canonical 8-connected labelling over runs.
//
// Method (common practice for connected-component labelling, e.g. the
// run-based two-pass scheme of Rosenfeld & Pfaltz 1966, J. ACM 13, 471, with
// union-find; parallelised over row strips):
//  1. The image is cut into strips of `strip_rows` rows. Each strip is scanned
//     row by row (in parallel across strips): the foreground pixels of a row
//     form runs [x0, x1]; a run joins every run of the previous row that
//     overlaps [x0 - 1, x1 + 1] (8-connectivity) through union-find.
//  2. Runs get global indices in raster order (strip, row, x). The last row of
//     each strip is joined to the first row of the next one, serially.
//  3. Union always makes the lower index the root, so every parent points to a
//     lower index and the root of a component is its first run in raster order;
//     one increasing sweep flattens all paths.
//  4. Components with a seed run and >= min_pixels pixels are numbered 1, 2, ...
//     in the order of their roots, i.e. of their first pixel in raster order.
// Every step's result depends only on the image, never on the number of
// threads, and not on strip_rows either (the partition only changes which
// unions are made where, not the components or their raster-first runs).
#include <tbb/blocked_range.h>
#include <tbb/parallel_for.h>

#include <algorithm>
#include <cstdint>
#include <vector>

#include "skerry/image.h"

namespace skerry::detail {

/// One run of foreground pixels of one row, with per-run statistics.
struct Run {
  int y = 0;
  int x0 = 0, x1 = 0;        // inclusive
  bool seed = false;
  bool edge = false;
  bool blank = false;
  float peak_snr = 0.0f;     // largest snr in the run (first on ties)
  int peak_x = 0;
  double sum = 0.0;          // sum of (I - B) over the run, left to right
};

struct Strip {
  std::vector<Run> runs;
  std::vector<std::int64_t> parent;  // local indices
};

inline std::int64_t uf_find(std::vector<std::int64_t>& p, std::int64_t a) {
  while (p[a] != a) {
    p[a] = p[p[a]];  // path halving: still points to a lower index
    a = p[a];
  }
  return a;
}
inline void uf_union(std::vector<std::int64_t>& p, std::int64_t a, std::int64_t b) {
  a = uf_find(p, a);
  b = uf_find(p, b);
  if (a == b) return;
  if (a < b) p[b] = a;
  else p[a] = b;
}

/// Join the runs [a0, a1) of one row with the runs [b0, b1) of the next row
/// (both sorted by x) where they touch under 8-connectivity. Indices into p.
template <class RunAt>
void join_rows(std::vector<std::int64_t>& p, RunAt run_at, std::int64_t a0, std::int64_t a1,
               std::int64_t b0, std::int64_t b1) {
  std::int64_t i = a0, j = b0;
  while (i < a1 && j < b1) {
    const Run& ra = run_at(i);
    const Run& rb = run_at(j);
    // Touch when ra.x0 <= rb.x1 + 1 and rb.x0 <= ra.x1 + 1.
    if (ra.x0 <= rb.x1 + 1 && rb.x0 <= ra.x1 + 1) uf_union(p, i, j);
    // Advance the one that ends first.
    if (ra.x1 < rb.x1) ++i;
    else ++j;
  }
}

/// Labelling driver. `scan_row(y, out_runs)` appends the runs of row y (sorted
/// by x, with their statistics) to out_runs; it is called concurrently for
/// different strips. Returns the global runs (raster order), the root of each
/// run, and the canonical label of each run (0 = dropped).
struct Components {
  std::vector<Run> runs;                 // raster order
  std::vector<std::int64_t> root;        // per run: index of its component's first run
  std::vector<std::int32_t> label;       // per run: canonical label, 0 = dropped
  std::vector<std::int64_t> strip_first; // per strip: first global run index (+ total at end)
  std::int64_t dropped_small = 0;        // seeded components below min_pixels
  std::int32_t count = 0;                // number of labels
};

template <class ScanRow>
Components label_components(int width, int height, int strip_rows, std::int64_t min_pixels,
                            ScanRow scan_row) {
  (void)width;
  const int nstrips = height == 0 ? 0 : (height + strip_rows - 1) / strip_rows;
  std::vector<Strip> strips(static_cast<std::size_t>(nstrips));
  std::vector<std::vector<std::int64_t>> row_begin(static_cast<std::size_t>(nstrips));
  tbb::parallel_for(tbb::blocked_range<int>(0, nstrips, 1), [&](const tbb::blocked_range<int>& r) {
    for (int s = r.begin(); s < r.end(); ++s) {
      Strip& st = strips[s];
      auto& rb = row_begin[s];
      const int y0 = s * strip_rows, y1 = std::min(height, y0 + strip_rows);
      rb.assign(1, 0);
      for (int y = y0; y < y1; ++y) {
        scan_row(y, st.runs);
        rb.push_back(static_cast<std::int64_t>(st.runs.size()));
      }
      st.parent.resize(st.runs.size());
      for (std::size_t i = 0; i < st.parent.size(); ++i) st.parent[i] = static_cast<std::int64_t>(i);
      auto at = [&](std::int64_t i) -> const Run& { return st.runs[static_cast<std::size_t>(i)]; };
      for (int k = 1; k < y1 - y0; ++k) join_rows(st.parent, at, rb[k - 1], rb[k], rb[k], rb[k + 1]);
    }
  });

  Components c;
  c.strip_first.assign(static_cast<std::size_t>(nstrips) + 1, 0);
  for (int s = 0; s < nstrips; ++s) c.strip_first[s + 1] = c.strip_first[s] + static_cast<std::int64_t>(strips[s].runs.size());
  const std::int64_t total = c.strip_first[nstrips];
  c.runs.resize(static_cast<std::size_t>(total));
  std::vector<std::int64_t>& p = c.root;
  p.resize(static_cast<std::size_t>(total));
  tbb::parallel_for(tbb::blocked_range<int>(0, nstrips, 1), [&](const tbb::blocked_range<int>& r) {
    for (int s = r.begin(); s < r.end(); ++s) {
      const std::int64_t off = c.strip_first[s];
      Strip& st = strips[s];
      for (std::size_t i = 0; i < st.runs.size(); ++i) {
        c.runs[off + i] = st.runs[i];
        p[off + i] = st.parent[i] + off;
      }
      std::vector<Run>().swap(st.runs);
      std::vector<std::int64_t>().swap(st.parent);
    }
  });
  // Joins across strip boundaries (serial: at most one row of runs per side).
  auto gat = [&](std::int64_t i) -> const Run& { return c.runs[static_cast<std::size_t>(i)]; };
  for (int s = 0; s + 1 < nstrips; ++s) {
    const auto& ra = row_begin[s];
    const auto& rb = row_begin[s + 1];
    const std::int64_t a0 = c.strip_first[s] + ra[ra.size() - 2], a1 = c.strip_first[s] + ra.back();
    const std::int64_t b0 = c.strip_first[s + 1] + rb[0], b1 = c.strip_first[s + 1] + rb[1];
    join_rows(p, gat, a0, a1, b0, b1);
  }
  // Flatten: parents point to lower indices, so one increasing sweep suffices.
  for (std::int64_t i = 0; i < total; ++i) p[i] = p[p[i]];
  // Component sizes and seeds, accumulated at the roots.
  std::vector<std::int64_t> npix(static_cast<std::size_t>(total), 0);
  std::vector<std::uint8_t> seeded(static_cast<std::size_t>(total), 0);
  for (std::int64_t i = 0; i < total; ++i) {
    const Run& r = c.runs[i];
    npix[p[i]] += r.x1 - r.x0 + 1;
    seeded[p[i]] |= r.seed ? 1 : 0;
  }
  c.label.assign(static_cast<std::size_t>(total), 0);
  std::int32_t next = 0;
  for (std::int64_t i = 0; i < total; ++i) {
    if (p[i] != i) {
      c.label[i] = c.label[p[i]];
      continue;
    }
    if (!seeded[i]) continue;
    if (npix[i] < min_pixels) {
      ++c.dropped_small;
      continue;
    }
    c.label[i] = ++next;
  }
  c.count = next;
  return c;
}

/// Paint the label map from the components (parallel over the same strips).
inline void paint_labels(const Components& c, int width, int height, int strip_rows, LabelsI32& labels) {
  labels.resize(height, width);
  const int nstrips = height == 0 ? 0 : (height + strip_rows - 1) / strip_rows;
  tbb::parallel_for(tbb::blocked_range<int>(0, nstrips, 1), [&](const tbb::blocked_range<int>& r) {
    for (int s = r.begin(); s < r.end(); ++s) {
      const int y0 = s * strip_rows, y1 = std::min(height, y0 + strip_rows);
      if (width == 0) continue;
      for (int y = y0; y < y1; ++y) std::fill_n(&labels(y, 0), width, 0);
      for (std::int64_t i = c.strip_first[s]; i < c.strip_first[s + 1]; ++i) {
        const std::int32_t l = c.label[i];
        if (l == 0) continue;
        const Run& run = c.runs[i];
        std::fill(&labels(run.y, run.x0), &labels(run.y, run.x0) + (run.x1 - run.x0 + 1), l);
      }
    }
  });
}

}  // namespace skerry::detail
