#pragma once
/// `skerry extract`'s settings as other commands use them: how the image is
/// read, which optional inputs go with it and the job's configuration, from the
/// same option table (and the same checks) as the command line of
/// `skerry extract` (cmd_extract.cpp).
#include <string>

#include "app/run_record.h"
#include "extract/extract_job.h"
#include "io/fits_image.h"

namespace skerry {

struct ExtractSettings {
  ImageReadOptions read;                            ///< image.* options
  std::string primary_beam, rms_map, background_map;  ///< optional inputs ("" = none)
  ExtractConfig job;
  std::string designation_prefix = "SKDC";          ///< catalogue.designation_prefix
};

/// The settings of a configuration file of `skerry extract` ([section] key =
/// value; "" = every default). Throws UsageError / InputError naming the file
/// or the option.
ExtractSettings extract_settings_from_file(const std::string& config_file);

/// The primary beam and the user noise maps of `s`, read for `sky` and checked
/// against it (InputError naming the file); each is added to `record` if given.
ExtractInputs read_extract_inputs(const ExtractSettings& s, const SkyImage& sky, RunRecord* record);

}  // namespace skerry
