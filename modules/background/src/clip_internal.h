#pragma once
// Internal: robust statistics on sorted samples (shared by sigma_clip and the boxes).
#include <cstddef>
#include <cstdint>
#include <vector>

#include "skerry/background.h"

namespace skerry::detail {

/// Sort n finite floats ascending (LSD radix sort on the order-preserving
/// integer image of the IEEE-754 bits, 3 passes of 11 bits; std::sort for
/// small n). `scratch` is resized as needed. The result is the same as std::sort's.
void sort_floats(float* v, std::size_t n, std::vector<std::uint32_t>& scratch);

/// Iterative median-centred sigma clipping on sorted finite values v[0..n).
/// `correction` = clipped_sigma_correction(k).
ClipResult clip_sorted(const float* v, std::int64_t n, double k, int max_iterations,
                       double correction);

}  // namespace skerry::detail
