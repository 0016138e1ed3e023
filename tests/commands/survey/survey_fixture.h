#pragma once
// Helpers of the survey pipeline tests: run the skerry executable, build a small
// simulated survey (one simulated field of the invented Lanternfish Field cut
// into overlapping tiles), read files.
#include <set>
#include <string>
#include <vector>

#include "skerry_test_support.h"

namespace skerry::testing {

// Running the executable and reading files: the shared test support library.
using test::RunResult;
/// Runs SKERRY_BINARY with `args`; stdout and stderr captured.
using test::run_skerry;
/// Runs SKERRY_BINARY with a file-size limit (RLIMIT_FSIZE, as `ulimit -f`) of
/// `fsize_bytes`; the exit code is 128 + signal when a signal ended it.
RunResult run_skerry_limited(const std::vector<std::string>& args, long long fsize_bytes);
/// Starts SKERRY_BINARY in the background; returns its PID (stdout/stderr to files in `log_dir`).
int start_skerry(const std::vector<std::string>& args, const std::string& log_dir);
/// Waits for a PID started by start_skerry; returns its exit code (128 + signal).
inline int wait_skerry(int pid) { return test::wait_exit(pid); }

/// A fresh empty folder under the test temporary root.
std::string fresh_dir(const std::string& name);

/// Simulated field (skerry simulate, one band, 640 x 640 pixels of 1.5 arcsec)
/// cut into a 2 x 2 grid of 384-pixel tiles overlapping by 128 pixels
/// (192 arcsec, 32 beams). Built once per test program; returns the folder
/// holding tile_00.fits ... tile_11.fits.
const std::string& survey_tiles();

/// Copies the tiles into `dir`/tiles and writes `dir`/survey.ini with `extra`
/// lines appended (INI text). Returns the configuration path.
std::string make_survey(const std::string& dir, const std::string& extra = "");

/// Three-band version (900, 1400, 3000 MHz; `skerry simulate --bands.freq_mhz
/// 900,1400,3000`, one pixel grid for all bands) of the same 2 x 2 tiling:
/// tile_JI_900MHz.fits, tile_JI_1400MHz.fits, tile_JI_3000MHz.fits.
const std::string& multiband_tiles();

/// Like make_survey for the three-band tiles, with [survey] bands set
/// (detection band _1400MHz) and the spectral index map off.
std::string make_multiband_survey(const std::string& dir, const std::string& extra = "");

inline std::string read_file(const std::string& path) { return test::slurp(path); }
using test::write_file;

/// Events of the JSON-lines log (`survey.jsonl`) with "event" == `event`, of the
/// last run only (after its run_start), as raw JSON text per line.
std::vector<std::string> last_run_events(const std::string& out_dir, const std::string& event);

/// The tiles named in JSON-lines log events (their "tile" field).
std::set<std::string> tiles_of(const std::vector<std::string>& events);

/// Changes the lowest mantissa byte of the first data pixel of a FITS file in
/// place (same size and inode, new content); a gtest failure if it has no END card.
void edit_first_pixel(const std::string& path);

}  // namespace skerry::testing
