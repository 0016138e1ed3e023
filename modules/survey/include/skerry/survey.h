#pragma once
/// Survey merge: one catalogue from many overlapping tiles.
///
/// Three pure pieces, no files, no command line:
///  1. Tile cells. A component is kept only by the tile in whose cell it lies;
///     the cell of tile i is the set of sky points nearer tile i's centre than
///     any other tile's centre (great-circle distance; ties go to the lower tile
///     index). This is a spherical Voronoi partition: deterministic, and decided
///     for each component alone, so it is the same in every sky partition. It
///     never keeps "the highest signal-to-noise duplicate", which would prefer
///     upward noise fluctuations.
///  2. Sky partitions. The sky is cut into HEALPix pixels (NESTED scheme,
///     Gorski et al. 2005, ApJ 622, 759; REF-HEALPIX-01) at `partition_order`.
///     Each partition holds the components whose position lies in it ("home")
///     plus every component within an overlap margin of it, and is processed
///     independently: cell selection, a self-match of the kept components as a
///     check (pairs from different tiles closer than the match radius are
///     counted, never removed), and designations with their collision suffixes.
///     The partitions are concatenated in pixel order. Within a partition rows
///     are sorted by (NESTED index at order 29, RA, Dec, tile, row); since a
///     NESTED pixel at any order is a contiguous range of order-29 indices, the
///     concatenation is the same catalogue for every partition order.
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

struct MergeOptions {
  /// HEALPix order of the sky partitions (N_side = 2^order, 12 N_side^2 pixels).
  /// The result does not depend on it; memory per partition does.
  int partition_order = 4;
  /// Self-match radius of the duplicate check [arcsec].
  double match_radius_arcsec = 5.0;
  /// Overlap margin of each partition, in match radii (>= 1). The margin is at
  /// least 2 arcsec too, so that every component sharing a designation with a
  /// home component is present (one designation spans < 1.9 arcsec).
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
  std::size_t home_rows = 0;         ///< home components seen
  std::size_t dropped_by_cell = 0;   ///< home components outside their tile's cell
  /// Pairs of kept components from different tiles closer than the match radius
  /// (each pair counted once, by the partition of the earlier one): duplicates
  /// that cell selection left. Zero for tiles that overlap and agree on positions.
  std::size_t residual_duplicate_pairs = 0;
  std::size_t name_collisions = 0;   ///< kept rows that needed a suffix
};

/// Processes one partition. Pure and independent of every other partition.
PartitionResult merge_partition(const PartitionInput& input, const std::vector<SkyPoint>& tile_centres,
                                const MergeOptions& options);

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
  std::size_t input_rows = 0;
  std::size_t dropped_by_cell = 0;
  std::size_t residual_duplicate_pairs = 0;
  std::size_t name_collisions = 0;
  std::size_t partitions = 0;        ///< non-empty partitions processed
};

/// The whole merge in memory: scatter into partitions, merge_partition on each
/// (in parallel, oneTBB), concatenate in pixel order. Byte-identical results
/// for every thread count and every partition order.
MergeResult merge_components(const std::vector<TileComponent>& components,
                             const std::vector<SkyPoint>& tile_centres, const MergeOptions& options);

}  // namespace skerry::survey
