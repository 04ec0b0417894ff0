// The data event of a node: which template nodes around it are informed, and their codes. Read
// once per simulated node, so it has a vector version (AVX-512 gathers, chosen at construction
// where the processor has them and STRATALOOM_KERNELS is not "portable") beside the plain loop;
// both give the same events.
#pragma once

#include <cstdint>
#include <vector>

#include "core/grid.hpp"
#include "core/template.hpp"

namespace sl {

class EventGather {
 public:
  // Entries past the last informed node that gather() may write in `index` and `value`.
  static constexpr std::size_t kPad = 16;

  // The template `offsets` (level cells) at multiple-grid step `step` on `grid`.
  EventGather(const Grid& grid, const std::vector<Offset>& offsets, Index step);

  // Writes the template indices and codes of the informed nodes (code >= 0) around cell `cell`
  // (coordinates `c`) to `index` and `value`, in template order, at most `cap` of them; returns
  // how many. `sim` holds the grid's codes (-1 = not informed) and one more entry past the last
  // cell (the vector version reads 4 bytes per node). `index` and `value` have room for
  // offsets.size() + kPad entries.
  int gather(const std::int16_t* sim, Index cell, const Ijk& c, int cap, std::int32_t* index,
             std::uint8_t* value) const;

 private:
  // Whether every template node of cell c lies inside the grid (c is away from its faces).
  bool away_from_faces(const Ijk& c) const noexcept {
    const Ijk& n = grid_.shape();
    bool inside = true;
    for (int a = 0; a < 3; ++a) inside = inside && c[a] >= reach_[a] && c[a] < n[a] - reach_[a];
    return inside;
  }
  int gather_plain(const std::int16_t* sim, Index cell, const Ijk& c, int cap, std::int32_t* index,
                   std::uint8_t* value) const;
  int gather_vector(const std::int16_t* sim, Index cell, const Ijk& c, int cap, std::int32_t* index,
                    std::uint8_t* value) const;

  Grid grid_;
  std::vector<Ijk> offsets_;  // scaled by the step
  std::vector<Index> flat_;   // flat offset of each template node
  Ijk reach_{0, 0, 0};        // largest |offset| per axis
  // For the vector version: per node, its flat offset and scaled offsets as 32-bit lanes, padded to
  // a multiple of 16.
  std::vector<std::int32_t> flat32_, dz_, dy_, dx_;
  bool vector_ = false;
};

}  // namespace sl
