#pragma once
/// Survey merge: one catalogue from many overlapping tiles.
///
/// Three pure pieces, no files, no command line:
///  1. Ownership by measurement quality. Each sky position belongs to the tile
///     with the lowest local noise there among the tiles with valid data there
///     (TileNoise: the tile's rms map on HEALPix cells; ties go to the lower
///     tile index). Without noise maps the local noise is replaced by the
///     angular distance from the tile centre (the primary-beam response of a
///     circular beam falls monotonically with it), which makes the owner the
///     nearest tile centre. Each component gets a rank key (owned by its tile
///     first, then the local noise of its own tile at its position, tile index,
///     row); a component is kept unless a component of another tile within the
///     match radius has a better key. So a source detected by its owner is kept
///     from the owner; a source the owner missed (blank there, or below its
///     threshold) is kept from the lowest-noise tile that detected it and marked
///     `rescued`; every other copy is counted as a duplicate removed. The rule
///     looks only at components within one match radius, so it is the same in
///     every sky partition. It never keeps "the highest signal-to-noise copy",
///     which would prefer upward noise fluctuations.
///  2. Sky partitions. The sky is cut into HEALPix pixels (NESTED scheme,
///     Gorski et al. 2005, ApJ 622, 759; REF-HEALPIX-01) at `partition_order`.
///     Each partition holds the components whose position lies in it ("home")
///     plus every component within an overlap margin of it, and is processed
///     independently: ownership and duplicate removal, a self-match of the kept
///     components as a check (pairs from different tiles closer than the match
///     radius are counted; zero by construction), and designations with their
///     collision suffixes. The partitions are concatenated in pixel order.
///     Within a partition rows are sorted by (NESTED index at order 29, RA, Dec,
///     tile, row); since a NESTED pixel at any order is a contiguous range of
///     order-29 indices, the concatenation is the same catalogue for every
///     partition order.
///  3. Designations in the IAU-recommended style, PREFIX JHHMMSS.s+DDMMSS, from
///     the position truncated, never rounded (IAU Commission 5 "Specifications
///     concerning designations for astronomical radiation sources", common
///     practice in survey catalogues; docs/CONVENTIONS.md "Catalogues and names").
#include <cstdint>
#include <string>
#include <vector>

namespace skerry::survey {

/// A sky position, ICRS [deg].
struct SkyPoint {
  double ra_deg = 0.0;
  double dec_deg = 0.0;
};

/// Index of the tile whose centre is nearest to `p` by great-circle distance,
/// ties broken by the lower index. `centres` must not be empty.
std::size_t nearest_tile(const std::vector<SkyPoint>& centres, const SkyPoint& p);

/// IAU-style designation: `prefix + " J" + HHMMSS.s + sign + DDMMSS`.
/// RA is reduced to [0, 360) deg, then truncated to 0.1 s of time; |Dec| is
/// truncated to 1 arcsec; the sign is '-' for every Dec < 0, including
/// -0 deg 0' 0.5" (which reads -000000). Truncation absorbs the binary
/// representation error of decimal inputs: a value within 1e-7 of a unit
/// boundary (in units of 0.1 s or 1 arcsec) counts as on it, so RA 201.25 deg
/// gives 132500.0, not 132459.9. Requires finite values and |Dec| <= 90.
std::string designation(const std::string& prefix, double ra_deg, double dec_deg);

/// An integer that two positions share exactly when their designations (with
/// one prefix) are equal: (t * 2 + [Dec < 0]) * 324001 + |Dec| arcsec, with t
/// the RA in truncated tenths of a second of time.
std::int64_t designation_key(double ra_deg, double dec_deg);

/// Collision suffix for rank `rank` (0-based) among components that share one
/// designation, in catalogue order: a, b, ..., z, aa, ab, ... A designation
/// held by a single component gets no suffix.
std::string collision_suffix(std::size_t rank);

/// Sort key of a position: its HEALPix NESTED pixel index at order 29.
std::int64_t sky_sort_key(double ra_deg, double dec_deg);

/// One component of one tile, as the merge sees it.
struct TileComponent {
  double ra_deg = 0.0;
  double dec_deg = 0.0;
  std::int32_t tile = 0;  ///< index into the tile-centre list
  std::int64_t row = 0;   ///< row in the tile's own catalogue (0-based)
};

/// One tile's local noise on HEALPix cells (NESTED at `order`): the median of
/// the tile's rms map [Jy/beam] over the map pixels with valid data whose centres
/// lie in the cell. A position whose cell is absent has no valid data of the
/// tile. An empty map (order < 0) has no valid data anywhere.
struct TileNoise {
  int order = -1;
  std::vector<std::int64_t> cells;  ///< sorted, unique
  std::vector<double> rms;          ///< per cell, finite and > 0 [Jy/beam]
  /// A cap holding every cell (set by make_tile_noise): a quick test before
  /// the cell look-up.
  double cap_ra_deg = 0.0, cap_dec_deg = 0.0, cap_radius_deg = -1.0;
};

/// Builds a TileNoise from (cell, rms) pairs in any order (validate()d; the cap
/// computed). Throws std::invalid_argument.
TileNoise make_tile_noise(int order, std::vector<std::pair<std::int64_t, double>> cells);

/// The tile's local noise at a position given by its sort key (sky_sort_key)
/// [Jy/beam]; +infinity where the tile has no valid data.
double local_noise(const TileNoise& noise, std::int64_t sort_key);

/// Throws std::invalid_argument when the cells are not sorted and unique, a
/// value is not finite and positive, or the order is outside -1..29.
void validate(const TileNoise& noise);

struct MergeOptions {
  /// HEALPix order of the sky partitions (N_side = 2^order, 12 N_side^2 pixels).
  /// The result does not depend on it; memory per partition does.
  int partition_order = 4;
  /// Self-match radius of the duplicate check [arcsec].
  double match_radius_arcsec = 5.0;
  /// Overlap margin of each partition, in match radii (>= 2: whether a
  /// neighbour of a home component is kept depends on its own neighbours). The
  /// margin is at least 2 arcsec + one radius too, so that every component
  /// sharing a designation with a home component is present with its
  /// neighbours (one designation spans < 1.9 arcsec).
  double margin_match_radii = 3.0;
  /// Designation prefix (our invented survey: "SKDC").
  std::string designation_prefix = "SKDC";
};

/// Throws std::invalid_argument naming the option and the rule it breaks.
void validate(const MergeOptions& options);

/// One partition's input: its HEALPix pixel and every component that lies in it
/// or within its margin (any order; duplicates of an input are not allowed).
struct PartitionInput {
  std::int64_t pixel = 0;
  std::vector<TileComponent> members;
};

/// Rows a partition contributes to the catalogue: its home components that lie
/// in their own tile's cell, in catalogue order.
struct PartitionResult {
  std::int64_t pixel = 0;
  std::vector<TileComponent> kept;   ///< in catalogue order
  std::vector<std::string> names;    ///< designation (+ collision suffix) per kept row
  /// Per kept row: 1 when its tile does not own its position (no owner's copy
  /// within the match radius; kept from the best tile that detected it).
  std::vector<char> rescued;
  std::size_t home_rows = 0;         ///< home components seen
  /// Home components not kept: a component of another tile within the match
  /// radius ranks better (the same source measured better).
  std::size_t duplicates_removed = 0;
  std::size_t rescued_rows = 0;      ///< kept home rows marked rescued
  /// Pairs of kept components from different tiles closer than the match radius
  /// (each pair counted once, by the partition of the earlier one): a check,
  /// zero by construction of the rule.
  std::size_t residual_duplicate_pairs = 0;
  std::size_t name_collisions = 0;   ///< kept rows that needed a suffix
};

/// Processes one partition. Pure and independent of every other partition.
/// `noise` is empty (ownership by the nearest tile centre) or holds one map per
/// tile centre.
PartitionResult merge_partition(const PartitionInput& input, const std::vector<SkyPoint>& tile_centres,
                                const MergeOptions& options, const std::vector<TileNoise>& noise = {});

/// Scatter: the partition pixels (sorted, unique) a component belongs to, its
/// home pixel and every pixel that overlaps the margin disc around it (a
/// conservative HEALPix disc query: never misses a pixel, may add one).
std::vector<std::int64_t> partitions_of(double ra_deg, double dec_deg, const MergeOptions& options);

/// Scatter without a disc query per component: `scatter_cell` maps a sort key
/// (sky_sort_key) to a cell (a HEALPix NESTED pixel three orders finer than the
/// partitions) whose components all belong to the same partitions,
/// `partitions_of_cell(cell)` = partitions_of of any of its components, and
/// `home_partition` is the partition a sort key lies in.
std::int64_t scatter_cell(std::int64_t sort_key, const MergeOptions& options);
std::vector<std::int64_t> partitions_of_cell(std::int64_t cell, const MergeOptions& options);
std::int64_t home_partition(std::int64_t sort_key, const MergeOptions& options);

struct MergeResult {
  std::vector<TileComponent> kept;   ///< catalogue order
  std::vector<std::string> names;
  std::vector<char> rescued;         ///< per kept row
  std::size_t input_rows = 0;
  std::size_t duplicates_removed = 0;
  std::size_t rescued_rows = 0;
  std::size_t residual_duplicate_pairs = 0;
  std::size_t name_collisions = 0;
  std::size_t partitions = 0;        ///< non-empty partitions processed
};

/// The whole merge in memory: scatter into partitions, merge_partition on each
/// (in parallel, oneTBB), concatenate in pixel order. Byte-identical results
/// for every thread count and every partition order.
MergeResult merge_components(const std::vector<TileComponent>& components,
                             const std::vector<SkyPoint>& tile_centres, const MergeOptions& options,
                             const std::vector<TileNoise>& noise = {});

}  // namespace skerry::survey
