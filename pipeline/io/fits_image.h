#pragma once
/// FITS images in and out (CFITSIO), with their celestial WCS (WCSLIB, wcs.h).
/// The only place that converts between FITS 1-based pixels and the 0-based
/// pixels of the modules is wcs.cpp.
///
/// Reader decisions (documented for users):
///  - BUNIT (FITS Standard 4.0 sec. 4.3 unit strings; REF-UNIT-05): "Jy/beam" in
///    any letter case and product form ("Jy/bm", "Jy beam-1", "beam-1 Jy",
///    "Jy.beam-1") is taken as is; with the prefix m or u it is scaled to Jy/beam.
///    "K" (brightness temperature; also mK, uK) is converted with the Rayleigh-Jeans
///    relation (REF-UNIT-04), which needs the beam and the frequency; "Jy/pixel"
///    ("Jy/pix", "Jy pixel-1") is multiplied by the beam area in pixels at the
///    image centre (REF-UNIT-06), which needs the beam. The factor is
///    SkyImage::bunit_scale (already applied to the pixels) and the rule
///    SkyImage::bunit_rule. Any other unit, no BUNIT, or K / Jy/pixel without
///    what the conversion needs: InputError naming the option that overrides it,
///    unless accept_any_bunit is set (the values are then taken as Jy/beam, not
///    converted).
///  - Frequency, first found: the override; a spectral axis CTYPEn = 'FREQ...'
///    (n = 3 or 4, at the chosen plane, CUNITn Hz/kHz/MHz/GHz; also when NAXIS = 2
///    and only the keywords are present); the keyword FREQ [Hz] (what
///    header_for_grid writes); RESTFRQ / RESTFREQ [Hz].
///  - Beam: the override when given; else the row of a beam table (binary-table
///    extension EXTNAME = 'BEAMS', columns BMAJ, BMIN, BPA, CHAN, POL; REF-FITS-08)
///    for the plane read; else BMAJ/BMIN [deg, FWHM] and BPA [deg east of north]
///    (BPA may be missing only for a circular beam); else the last AIPS-style
///    HISTORY card of a CLEAN giving "BMAJ= ... BMIN= ... BPA= ..." [deg]
///    (REF-FITS-07). SkyImage::beam_origin says which. BMIN > BMAJ is
///    read as the same ellipse with the axes swapped (PA + 90). Missing, zero or
///    negative beam keywords: InputError when require_beam.
///  - BLANK (integer data) and NaN both become NaN; BSCALE/BZERO are applied by
///    CFITSIO. A plane where every pixel is blank throws NoDataError unless
///    allow_all_blank.
#include <limits>
#include <memory>
#include <optional>
#include <string>
#include <utility>
#include <vector>

#include "skerry/image.h"
#include "skerry/sky.h"

namespace skerry {

/// Initialises CFITSIO once (std::call_once). CFITSIO initialises itself on first
/// use, but tests its `need_to_initialize` flag without a lock (cfileio.c), so two
/// threads opening their first files at once race on it (ThreadSanitizer found
/// this with parallel survey workers). Every FITS reader and writer here calls it
/// first; `main` calls it before any thread exists.
void initialise_cfitsio();

/// Checks the header text of every HDU of an uncompressed FITS file before CFITSIO
/// opens it (FITS Standard 4.0 secs. 3.3, 4.1): each keyword card other than
/// COMMENT, HISTORY and blank-keyword cards holds printable ASCII only (0x20-0x7E)
/// and a string value has its closing quote. CFITSIO 4.2 overruns a buffer on
/// some headers that break this (found by fuzz_fits_table), so they are refused
/// with an InputError naming the HDU and card. A file this scan cannot follow (no
/// END, a size keyword it cannot read, gzip) is left to CFITSIO's own checks.
void check_fits_header_text(const std::string& path);

struct ImageReadOptions {
  /// HDU: "" = the primary HDU (or the first image extension when the primary has
  /// no data); a number ("2", 1-based as CFITSIO counts HDUs) or an EXTNAME.
  std::string hdu;
  /// 0-based index along each non-celestial axis of more than one plane, in axis
  /// order (e.g. {frequency plane, Stokes plane}); required where not degenerate.
  std::vector<long> plane;
  /// Accept a BUNIT the reader does not convert (the values are then taken as
  /// Jy/beam, not converted).
  bool accept_any_bunit = false;
  /// Option names that messages point to (empty: not named): the BUNIT override,
  /// the beam and the frequency options of the command that reads the image.
  std::string accept_bunit_option = "image.accept_bunit";
  std::string beam_option = "image.beam_arcsec";
  std::string freq_option = "image.freq_mhz";
  std::optional<Beam> beam_override;        ///< used when the header lacks BMAJ/BMIN/BPA (or to replace them)
  std::optional<double> freq_hz_override;   ///< observing frequency [Hz]
  bool require_beam = true;                 ///< missing beam is an error (InputError)
  bool allow_all_blank = false;             ///< else an all-blank plane throws NoDataError
};

struct SkyImage {
  std::string path;
  ImageF pixels;                          ///< (y, x), NaN = no data
  std::shared_ptr<const PixelSky> wcs;    ///< celestial axes; ICRS output
  Beam beam;                              ///< restoring beam (invalid when unknown and not required)
  double freq_hz = std::numeric_limits<double>::quiet_NaN();  ///< NaN when unknown
  std::string bunit;                      ///< as found in the header
  double bunit_scale = 1.0;               ///< factor applied to the stored values to give Jy/beam
  std::string bunit_rule;                 ///< the conversion applied, in words, with its factor
  /// Where the beam came from: "option" (the override), "beam_table" (the BEAMS
  /// table's row for the plane), "keywords" (BMAJ/BMIN/BPA), "history" (a CLEAN
  /// HISTORY card), "" (no beam).
  std::string beam_origin;
  std::string frame;                      ///< "ICRS", "FK5", "GALACTIC", ... of the image axes
  std::string object;                     ///< OBJECT keyword or the file's stem
  /// The header cards (80-char records, no END) of a 2-D image with this image's
  /// celestial WCS, beam and frequency: what derived maps are written with.
  std::string wcs_header;
};

/// Read one image plane. Throws InputError naming the file and the problem:
/// missing file, not FITS, truncated data, no celestial WCS, non-degenerate extra
/// axes without a plane, wrong BUNIT, missing beam, impossible axis lengths
/// (checked before any allocation).
SkyImage read_sky_image(const std::string& path, const ImageReadOptions& options = {});

struct GridSpec;
/// An in-memory image on a described grid (path "", object "", frame from the
/// grid): what the simulator writes through write_fits_image.
SkyImage make_sky_image(const GridSpec& grid, ImageF pixels, const std::string& object = "");

/// Read a primary-beam image for `like` (same pixel grid, values in 0..1];
/// throws InputError when its shape or its sky grid differs (checked at 5 pixels
/// to 0.01 pixel), or a value exceeds 1.001. Values <= 0 become NaN.
ImageF read_primary_beam(const std::string& path, const SkyImage& like);

/// How an output image is stored. Plain: an uncompressed primary image. Lossless
/// and Quantised: FITS tiled image compression (FITS Standard 4.0 sec. 10,
/// REF-FITS-06), readable by every FITS reader that follows the standard:
/// Lossless keeps every bit (Rice for int32, GZIP for float32); Quantised stores
/// float32 values on a grid of `step` (in the image's units: Jy/beam for the
/// maps), so that a value read back is within step / 2 of the value written.
struct MapStorage {
  enum class Kind { Plain, Lossless, Quantised };
  Kind kind = Kind::Plain;
  double step = 0.0;  ///< Quantised only: > 0, image units
};

/// Write a 2-D image with `like`'s WCS (atomically: temp file, then rename).
/// float32 (labels: int32, BUNIT omitted); cards of like.wcs_header except the
/// structural ones (SIMPLE, BITPIX, NAXIS*, EXTEND, BSCALE, BZERO, BLANK, BUNIT);
/// an extra card replaces a card of the same key. No date or host cards (outputs
/// are byte-identical for identical inputs).
/// Throws OutputError. `bunit` e.g. "Jy/beam" (the FITS Standard 4.0 sec. 4.3 spelling, which astropy parses); extra cards are (KEY, value) where
/// value is already FITS-formatted (e.g. "'text'" or "1.5").
void write_fits_image(const std::string& path, const ImageF& pixels, const SkyImage& like,
                      const std::string& bunit = "Jy/beam",
                      const std::vector<std::pair<std::string, std::string>>& extra_cards = {},
                      const MapStorage& storage = {});
void write_fits_labels(const std::string& path, const LabelsI32& labels, const SkyImage& like,
                       const std::vector<std::pair<std::string, std::string>>& extra_cards = {},
                       const MapStorage& storage = {});

}  // namespace skerry
