#pragma once
/// The run report: one self-contained HTML page (no network; images embedded as
/// data: URIs; one small inline script for the zoomable map viewer) summarising a run folder written by
/// `skerry extract` (and, where present, `skerry match`, `skerry bands` and
/// `skerry completeness` outputs placed in the same folder).
#include <string>
#include <vector>

namespace skerry {

struct ReportOptions {
  std::string run_dir;        ///< folder with NAME.run.json, NAME.components.csv, ...
  std::string name;           ///< NAME; "" = the single NAME.run.json (or NAME.components.csv) found
  int thumbnail_px = 1024;    ///< longer side of the viewer's complete overview level [px]
  long detail_pixels = 1000000;  ///< full-resolution pixels embedded per map at most (around islands)
  int count_bins_per_decade = 5;
  std::string output;         ///< page path; "" = RUN_DIR/NAME.report.html
};

struct ReportResult {
  std::string path;                     ///< where the page was written
  std::string name;                     ///< NAME used
  std::vector<std::string> missing;     ///< what the page could not show, one line each
  std::vector<std::string> warnings;    ///< where the run could mislead (shown prominently)
  bool catalogue_found = false;
  std::size_t n_components = 0;
};

/// Build and write the page (atomically). Throws InputError when the folder
/// does not exist or holds no run at all; a run without (or with an empty)
/// catalogue still gets a page that says what is missing.
ReportResult write_report(const ReportOptions& options);

}  // namespace skerry
