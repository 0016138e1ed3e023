#pragma once
/// The extract job: one radio image (already read) to noise maps, islands,
/// fitted components and sources, in memory. No file is read or written and
/// nothing is printed here; `skerry extract` (cmd_extract.cpp) turns options
/// into an ExtractConfig, reads the inputs, runs the job and writes the outputs,
/// and `skerry bands` and `skerry completeness` run it in process.
///
/// Stages (reported, with their wall times, through ExtractHooks::stage):
///   noise_pass1, islands_pass1, noise_pass2 (when the second pass runs),
///   islands, cutouts, fit, catalogue.
///   noise      background and rms maps: two passes, the second with the first
///              pass's islands (grown by mask_margin_beams) masked
///   islands    hysteresis islands in SNR (IslandOptions)
///   cutouts    (image - background) around each island (cut_out_island)
///   fit        multi-Gaussian fits (FitOptions), sky measurements with errors
///              (SkyOptions)
///   catalogue  position flags, island statistics, source grouping
#include <cstdint>
#include <functional>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "extract/catalogue_tables.h"
#include "io/fits_image.h"
#include "skerry/background.h"
#include "skerry/catalogue.h"
#include "skerry/fitting.h"
#include "skerry/islands.h"

namespace skerry {

/// What the job computes and how (every field checked by the caller's option
/// table; the module options validate themselves again in the job). The
/// defaults are those of `skerry extract`'s options.
struct ExtractConfig {
  /// The image's beam PA is measured from the north of its own frame (a beam
  /// from the header); false when the PA is already east of ICRS north (a beam
  /// given by the user). Galactic images turn a header beam (SkyBeam).
  bool beam_pa_in_image_frame = true;
  double pb_cut = 0.2;  ///< components where the primary beam is below this get kFlagBelowPbCut
  BackgroundOptions noise;  ///< beam sizes are filled in by the job
  bool second_pass = true;
  double mask_margin_beams = 1.0;
  std::optional<double> fixed_rms;         ///< constant rms [Jy/beam] instead of an estimate
  std::optional<double> fixed_background;  ///< constant background [Jy/beam] instead of an estimate
  IslandOptions islands = [] {
    IslandOptions o;
    o.min_pixels = 3;  // detect.min_pixels
    return o;
  }();
  FitOptions fit;
  SkyOptions sky;
  FlagOptions flags;
  GroupingOptions grouping;
  bool render_model = true;  ///< fill ExtractResult::model
  bool keep_labels = false;  ///< keep the island label map in ExtractResult::labels
};

/// Optional inputs on the image's grid (empty = none); the caller has read and
/// checked them (read_primary_beam, check_rms_map, check_background_map).
struct ExtractInputs {
  ImageF primary_beam;    ///< response in (0, 1], NaN where unknown
  ImageF rms_map;         ///< user rms [Jy/beam] instead of an estimate
  ImageF background_map;  ///< user background [Jy/beam] instead of an estimate
};

/// Observers of a running job; every member may be empty.
struct ExtractHooks {
  /// A stage ended after `seconds` of wall time (in stage order).
  std::function<void(const std::string& stage, double seconds)> stage;
  /// A stage starts (in stage order); e.g. show it while it runs.
  std::function<void(const std::string& stage)> stage_started;
  /// The noise maps and the island labels are final (called once, before the
  /// fit): e.g. start writing them. The pointers keep the data alive.
  std::function<void(const NoiseMaps& maps, std::shared_ptr<const LabelsI32> labels)> maps_final;
  /// `done` of `total` islands fitted (called from the job's thread).
  std::function<void(std::size_t done, std::size_t total)> fit_progress;
};

struct ExtractResult {
  Beam beam;                 ///< the restoring beam at the image centre, PA east of ICRS north
  NoiseMaps maps;            ///< background and rms
  std::shared_ptr<const LabelsI32> labels;  ///< island label map (keep_labels), else null
  ImageF model;              ///< sum of the fitted components (render_model), else empty
  std::vector<CatalogueComponent> components;  ///< in (island, component) order
  std::vector<IslandRecord> islands;           ///< in island order
  std::vector<CatalogueSource> sources;        ///< in source order
  int noise_passes = 0;      ///< 0 (maps given), 1 or 2
  double peak_snr_used = 0.0, grow_snr_used = 0.0;
  std::int64_t islands_too_small = 0;
  std::int64_t components_fit_failed = 0;
};

/// The provenance every table of the job's results carries: `tool`, version and
/// revision, the input image's file name and SHA-256, its frame, the beam at the
/// centre, the frequency, the thresholds applied and the number of noise passes.
Provenance extract_provenance(const std::string& tool, const SkyImage& sky, const std::string& image_path,
                              const std::string& image_sha256, const ExtractResult& result);

/// The checks of the image alone that the job makes first (a usable beam, some
/// data, a beam of at least one pixel at the centre): InputError / NoDataError
/// naming sky.path. Callers that read more inputs run it before reading them.
void check_extract_image(const SkyImage& sky, const ExtractConfig& cfg);

/// The job's noise stage alone: the background and rms maps exactly as
/// run_extract_job makes them (one or two passes, the second with the first
/// pass's islands grown by mask_margin_beams masked; user or fixed maps as
/// given), for commands that measure at given positions (`skerry stack`).
/// Stages noise_pass1, islands_pass1, noise_pass2, islands are reported through
/// hooks.stage. Same errors as run_extract_job.
struct NoiseStageResult {
  Beam beam;         ///< the restoring beam at the image centre, PA east of ICRS north
  NoiseMaps maps;    ///< background and rms [Jy/beam]
  int noise_passes = 0;
};
NoiseStageResult run_noise_stage(const SkyImage& sky, const ExtractInputs& inputs, const ExtractConfig& cfg,
                                 const ExtractHooks& hooks = {});

/// Runs the job. Throws InputError / NoDataError (naming sky.path) for an image
/// the job cannot measure, UsageError for module options out of range.
/// Results do not depend on the thread count.
ExtractResult run_extract_job(const SkyImage& sky, const ExtractInputs& inputs, const ExtractConfig& cfg,
                              const ExtractHooks& hooks = {});

}  // namespace skerry
