// skerry report RUN_DIR: the run report page (report_page.h).
//
// Exit codes (errors.h): 0 page written; 3 the folder holds no catalogue (the page
// is still written and says so); 8 the catalogue is empty (page written, says so);
// 2 bad options; 4 the page could not be written.
#include <iostream>

#include "app/console.h"
#include "app/command.h"
#include "app/errors.h"
#include "app/options.h"
#include "report/report_page.h"

namespace skerry {
namespace {

int run_report(const std::vector<std::string>& args) {
  po::options_description desc("report options");
  desc.add_options()
      ("run_dir", po::value<std::string>(), "run folder written by skerry extract")
      ("report.name", po::value<std::string>()->default_value(""), "NAME of the run in the folder; default: the only one")
      ("report.thumbnail_px", po::value<int>()->default_value(1024), "longer side of the map viewer's whole-map level [pixels]")
      ("report.detail_pixels", po::value<long>()->default_value(1000000), "full-resolution map pixels embedded per map at most, around islands (brightest first) [pixels]")
      ("report.count_bins_per_decade", po::value<int>()->default_value(5), "source-count bins per decade of flux density")
      ("report.output", po::value<std::string>()->default_value(""), "page file; default RUN_DIR/NAME.report.html");
  ParsedOptions p = parse_options("report", "RUN_DIR [options]", desc, {{"run_dir", 1}}, args);
  if (p.help) return kExitOk;
  if (!p.vm.count("run_dir")) throw UsageError("report: give the run folder (skerry report RUN_DIR)");
  ReportOptions o;
  o.run_dir = p.vm["run_dir"].as<std::string>();
  o.name = p.vm["report.name"].as<std::string>();
  o.thumbnail_px = p.vm["report.thumbnail_px"].as<int>();
  o.count_bins_per_decade = p.vm["report.count_bins_per_decade"].as<int>();
  o.detail_pixels = p.vm["report.detail_pixels"].as<long>();
  o.output = p.vm["report.output"].as<std::string>();
  require(o.thumbnail_px >= 64 && o.thumbnail_px <= 4096, "report.thumbnail_px", std::to_string(o.thumbnail_px), "64 <= value <= 4096");
  require(o.detail_pixels >= 0 && o.detail_pixels <= 400000000L, "report.detail_pixels", std::to_string(o.detail_pixels),
          "0 <= value <= 400000000");
  require(o.count_bins_per_decade >= 1 && o.count_bins_per_decade <= 50, "report.count_bins_per_decade",
          std::to_string(o.count_bins_per_decade), "1 <= value <= 50");
  const ReportResult r = write_report(o);
  say("report " + r.name + " -> " + r.path);
  if (!r.catalogue_found) {
    std::cerr << "skerry: error: " << o.run_dir << ": no component catalogue (" << r.name
              << ".components.csv); the page " << r.path << " says what is missing\n";
    return kExitBadInput;
  }
  if (r.n_components == 0) {
    std::cerr << "skerry: error: " << o.run_dir << ": the component catalogue is empty; the page " << r.path
              << " says so\n";
    return kExitNoData;
  }
  return kExitOk;
}

const CommandRegistrar reg{"report", "run folder -> self-contained HTML report page", &run_report};

}  // namespace
}  // namespace skerry
