#pragma once
/// Completeness by injection and reliability from the negated image, measured
/// by running the extract job (extract_job.h) in process on modified copies of
/// the image, with the settings of `skerry extract` (extract_settings.h), so that
/// detection and fitting are exactly the stages of a real run.
#include <cstdint>
#include <string>
#include <vector>

#include "skerry/quality.h"

namespace skerry {

struct InjectionOptions {
  std::string image;            ///< input FITS image
  std::string out_dir;          ///< where NAME.completeness.csv etc. go
  std::string name;             ///< NAME; "" = the image's stem
  std::string extract_config;   ///< configuration file of `skerry extract` for every job ("" = defaults)
  int rounds = 8;               ///< independent injection rounds (parallel)
  int per_round = 150;          ///< sources injected per round
  double snr_min = 1.0, snr_max = 30.0;  ///< grid of injected peaks, in units of the median rms
  int levels = 16;              ///< grid points (log-spaced)
  double avoid_beams = 3.0;     ///< keep injections this many beam FWHMs from catalogued sources and each other
  double match_beams = 0.5;     ///< an injection is recovered by a component within this many beam FWHMs
  std::uint64_t seed = 1;
  bool reliability = true;      ///< also run the negated image
};

struct InjectionResult {
  std::vector<FractionBin> by_flux, by_snr, reliability;
  std::size_t injected = 0, recovered = 0;
  double median_rms_jy_per_beam = 0;
  double peak_snr_threshold = 5;
  std::vector<std::string> outputs;
};

/// Runs the base extract, the negated image and the injection rounds; writes
/// NAME.completeness.csv, NAME.reliability.csv, NAME.injections.csv and
/// NAME.completeness.svg into out_dir (atomically). Deterministic for a seed,
/// whatever the thread count.
InjectionResult run_injection(const InjectionOptions& options);

}  // namespace skerry
