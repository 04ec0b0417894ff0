// Search templates: ordered lists of (dz, dy, dx) offsets around a centre node.
//
// Order rule (documented, deterministic): offsets are sorted by their anisotropic distance
// sqrt((dz/rz)^2 + (dy/ry)^2 + (dx/rx)^2), nearest first; ties are broken by the plain squared
// distance in cells dz^2 + dy^2 + dx^2, then lexicographically by (dz, dy, dx), smallest first.
// An axis whose radius is 0 admits only offset 0 along it (a 2-D template).
#pragma once

#include <array>
#include <cstdint>
#include <vector>

namespace sl {

using Offset = std::array<std::int32_t, 3>;  // (dz, dy, dx)

// Largest number of nodes a template may hold.
inline constexpr std::int64_t kMaxTemplateNodes = 20000;

class Template {
 public:
  Template() = default;
  // Offsets in the caller's order. Throws ParameterError on a duplicate, the centre (0, 0, 0),
  // an empty list or more than kMaxTemplateNodes entries.
  explicit Template(std::vector<Offset> offsets);

  // All offsets of the box |dz| <= rz, |dy| <= ry, |dx| <= rx except the centre, in the order rule.
  static Template box(const std::array<std::int32_t, 3>& radius);
  // Offsets inside the ellipsoid (dz/rz)^2 + (dy/ry)^2 + (dx/rx)^2 <= 1 except the centre, in the
  // order rule, keeping at most max_nodes (the nearest); max_nodes <= 0 keeps all.
  static Template ellipsoid(const std::array<double, 3>& radius, std::int64_t max_nodes);

  const std::vector<Offset>& offsets() const noexcept { return offsets_; }
  std::size_t size() const noexcept { return offsets_.size(); }
  // Largest |offset| along each axis (before any level scaling).
  Offset reach() const noexcept;
  // The same offsets times 2**level.
  Template at_level(int level) const;

 private:
  std::vector<Offset> offsets_;
};

// Sorts offsets in place by the order rule for the given radii (an axis radius 0 counts as 1).
void sort_by_anisotropic_distance(std::vector<Offset>& offsets, const std::array<double, 3>& radius);

}  // namespace sl
