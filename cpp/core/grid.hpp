// Regular 3-D grid: index math between (iz, iy, ix), flat cell index and coordinates, and the
// multiple-grid levels. Axes are (z, y, x), C order: x varies fastest. Cell (0, 0, 0) has its lower
// corner at `origin`; cell centres lie at origin + (i + 0.5) * spacing.
#pragma once

#include <array>
#include <cmath>
#include <cstdint>
#include <limits>
#include <string>

#include "core/error.hpp"

namespace sl {

using Index = std::int64_t;
using Ijk = std::array<Index, 3>;    // (iz, iy, ix)
using Xyz = std::array<double, 3>;   // (z, y, x) coordinates

// Largest number of cells a grid may have (2**40, about 10**12): keeps index math in int64.
inline constexpr Index kMaxCells = Index{1} << 40;
// Deepest multiple-grid level: level g visits every 2**g-th cell.
inline constexpr int kMaxLevel = 20;

// Division by a fixed divisor as a multiply and a shift (Lemire, Kaser & Kurz 2019, "Faster
// remainder by direct computation: applications to compilers and software libraries", Software:
// Practice and Experience 49(6)): with m = ceil(2**64 / d), n / d = (m * n) >> 64 exactly for all
// n, d below 2**32. Larger dividends fall back to the division instruction.
class Divider {
 public:
  Divider() = default;
  explicit Divider(Index d) : d_(d) {
    if (d > 1 && d < (Index{1} << 32)) m_ = ~std::uint64_t{0} / static_cast<std::uint64_t>(d) + 1;
  }
  // n / d for n >= 0.
  Index divide(Index n) const noexcept {
#if defined(__SIZEOF_INT128__)
    __extension__ using Wide = unsigned __int128;
    if (m_ != 0 && static_cast<std::uint64_t>(n) < (std::uint64_t{1} << 32))
      return static_cast<Index>((static_cast<Wide>(m_) * static_cast<std::uint64_t>(n)) >> 64);
#endif
    return d_ == 1 ? n : n / d_;
  }

 private:
  Index d_ = 1;
  std::uint64_t m_ = 0;  // 0: use the division instruction
};

class Grid {
 public:
  Grid() = default;
  Grid(const Ijk& shape, const Xyz& spacing = {1, 1, 1}, const Xyz& origin = {0, 0, 0})
      : shape_(shape), spacing_(spacing), origin_(origin) {
    const char* axes[3] = {"z", "y", "x"};
    double cells = 1;
    for (int a = 0; a < 3; ++a) {
      require(shape[a] >= 1, "shape",
              std::string("must hold positive sizes; axis ") + axes[a] + " has " + std::to_string(shape[a]) + ".");
      require(std::isfinite(spacing[a]) && spacing[a] > 0, "spacing",
              std::string("must hold finite positive cell sizes; axis ") + axes[a] + " has " +
                  std::to_string(spacing[a]) + ".");
      require(std::isfinite(origin[a]), "origin", "must hold finite coordinates.");
      cells *= static_cast<double>(shape[a]);
    }
    require(cells <= static_cast<double>(kMaxCells), "shape",
            "gives more than 2**40 cells; split the model into smaller grids.");
    per_row_ = Divider(shape[2]);
    per_layer_ = Divider(shape[1]);
  }

  const Ijk& shape() const noexcept { return shape_; }
  const Xyz& spacing() const noexcept { return spacing_; }
  const Xyz& origin() const noexcept { return origin_; }
  Index size() const noexcept { return shape_[0] * shape_[1] * shape_[2]; }

  bool contains(const Ijk& c) const noexcept {
    return c[0] >= 0 && c[0] < shape_[0] && c[1] >= 0 && c[1] < shape_[1] && c[2] >= 0 && c[2] < shape_[2];
  }
  // Flat C-order index of a cell that lies inside the grid.
  Index index(const Ijk& c) const noexcept { return (c[0] * shape_[1] + c[1]) * shape_[2] + c[2]; }
  // Cell of a flat index in [0, size()).
  Ijk cell(Index i) const noexcept {
    const Index rest = per_row_.divide(i);
    const Index z = per_layer_.divide(rest);
    return {z, rest - z * shape_[1], i - rest * shape_[2]};
  }
  Xyz centre(const Ijk& c) const noexcept {
    return {origin_[0] + (static_cast<double>(c[0]) + 0.5) * spacing_[0],
            origin_[1] + (static_cast<double>(c[1]) + 0.5) * spacing_[1],
            origin_[2] + (static_cast<double>(c[2]) + 0.5) * spacing_[2]};
  }
  // Cell containing point p; a point on an inner face belongs to the upper cell. Returns false when
  // p lies outside the grid (the upper outer faces are outside).
  bool locate(const Xyz& p, Ijk& out) const noexcept {
    for (int a = 0; a < 3; ++a) {
      const double f = std::floor((p[a] - origin_[a]) / spacing_[a]);
      if (!(f >= 0) || f >= static_cast<double>(shape_[a])) return false;
      out[a] = static_cast<Index>(f);
    }
    return true;
  }

  // Stride of multiple-grid level g (2**g).
  static Index level_step(int level) noexcept { return Index{1} << level; }
  // True when cell c is a node of level g: every coordinate a multiple of 2**g.
  static bool on_level(const Ijk& c, int level) noexcept {
    const Index mask = level_step(level) - 1;
    return ((c[0] | c[1] | c[2]) & mask) == 0;
  }
  // Number of nodes of level g along axis a.
  Index level_extent(int level, int axis) const noexcept {
    const Index s = level_step(level);
    return (shape_[axis] + s - 1) / s;
  }
  Index level_size(int level) const noexcept {
    return level_extent(level, 0) * level_extent(level, 1) * level_extent(level, 2);
  }

 private:
  Ijk shape_{1, 1, 1};
  Xyz spacing_{1, 1, 1};
  Xyz origin_{0, 0, 0};
  Divider per_row_, per_layer_;  // by shape_[2] and shape_[1], for cell()
};

// Checks a multiple-grid level number against the range [0, kMaxLevel].
inline void require_level(int level, const char* parameter = "level") {
  require(level >= 0 && level <= kMaxLevel, parameter,
          "must be an integer in [0, " + std::to_string(kMaxLevel) + "]; got " + std::to_string(level) + ".");
}

}  // namespace sl
