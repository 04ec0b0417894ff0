#include "core/template.hpp"

#include <algorithm>
#include <cmath>
#include <set>
#include <string>

#include "core/error.hpp"
#include "core/grid.hpp"

namespace sl {

namespace {

std::string too_many(double n) {
  return "gives " + std::to_string(static_cast<long long>(n)) + " template nodes; at most " +
         std::to_string(kMaxTemplateNodes) + " are allowed. Use a smaller radius or set max_nodes.";
}

}  // namespace

Template::Template(std::vector<Offset> offsets) : offsets_(std::move(offsets)) {
  require(!offsets_.empty(), "offsets", "must hold at least one offset.");
  require(static_cast<std::int64_t>(offsets_.size()) <= kMaxTemplateNodes, "offsets",
          too_many(static_cast<double>(offsets_.size())));
  std::set<Offset> seen;
  for (const auto& o : offsets_) {
    require(!(o[0] == 0 && o[1] == 0 && o[2] == 0), "offsets", "must not contain the centre (0, 0, 0).");
    for (int a = 0; a < 3; ++a)
      require(std::abs(o[a]) <= (1 << 24), "offsets", "must hold offsets of at most 2**24 cells.");
    require(seen.insert(o).second, "offsets",
            "must not repeat an offset; (" + std::to_string(o[0]) + ", " + std::to_string(o[1]) + ", " +
                std::to_string(o[2]) + ") appears twice.");
  }
}

void sort_by_anisotropic_distance(std::vector<Offset>& offsets, const std::array<double, 3>& radius) {
  std::array<double, 3> inv{};
  for (int a = 0; a < 3; ++a) inv[a] = radius[a] > 0 ? 1.0 / radius[a] : 1.0;
  struct Keyed {
    double aniso;
    std::int64_t plain;
    Offset o;
  };
  std::vector<Keyed> keyed;
  keyed.reserve(offsets.size());
  for (const auto& o : offsets) {
    double d = 0;
    std::int64_t p = 0;
    for (int a = 0; a < 3; ++a) {
      const double s = o[a] * inv[a];
      d += s * s;
      p += std::int64_t{o[a]} * o[a];
    }
    keyed.push_back({d, p, o});
  }
  std::sort(keyed.begin(), keyed.end(), [](const Keyed& a, const Keyed& b) {
    if (a.aniso != b.aniso) return a.aniso < b.aniso;
    if (a.plain != b.plain) return a.plain < b.plain;
    return a.o < b.o;
  });
  for (std::size_t i = 0; i < offsets.size(); ++i) offsets[i] = keyed[i].o;
}

Template Template::box(const std::array<std::int32_t, 3>& radius) {
  double count = 1;
  for (int a = 0; a < 3; ++a) {
    require(radius[a] >= 0, "radius", "must hold non-negative integers; got " + std::to_string(radius[a]) + ".");
    count *= 2.0 * radius[a] + 1.0;
  }
  require(count > 1, "radius", "must be positive along at least one axis.");
  require(count - 1 <= static_cast<double>(kMaxTemplateNodes), "radius", too_many(count - 1));
  std::vector<Offset> out;
  out.reserve(static_cast<std::size_t>(count));
  for (std::int32_t z = -radius[0]; z <= radius[0]; ++z)
    for (std::int32_t y = -radius[1]; y <= radius[1]; ++y)
      for (std::int32_t x = -radius[2]; x <= radius[2]; ++x)
        if (z || y || x) out.push_back({z, y, x});
  sort_by_anisotropic_distance(out, {double(radius[0]), double(radius[1]), double(radius[2])});
  return Template(std::move(out));
}

Template Template::ellipsoid(const std::array<double, 3>& radius, std::int64_t max_nodes) {
  std::array<std::int32_t, 3> r{};
  double candidates = 1;
  for (int a = 0; a < 3; ++a) {
    require(std::isfinite(radius[a]) && radius[a] >= 0, "radius", "must hold finite non-negative numbers.");
    require(radius[a] <= 4096, "radius", "must hold radii of at most 4096 cells.");
    r[a] = static_cast<std::int32_t>(std::floor(radius[a]));
    candidates *= 2.0 * r[a] + 1.0;
  }
  require(candidates > 1, "radius", "must reach at least one cell (a radius >= 1 along some axis).");
  require(candidates <= 5e7, "radius", "spans more than 5e7 candidate cells; use smaller radii.");
  std::vector<Offset> out;
  for (std::int32_t z = -r[0]; z <= r[0]; ++z)
    for (std::int32_t y = -r[1]; y <= r[1]; ++y)
      for (std::int32_t x = -r[2]; x <= r[2]; ++x) {
        if (!(z || y || x)) continue;
        const Offset o{z, y, x};
        double d = 0;
        for (int a = 0; a < 3; ++a)
          if (o[a] != 0) d += (o[a] / radius[a]) * (o[a] / radius[a]);
        if (d <= 1.0 + 1e-12) out.push_back(o);
      }
  sort_by_anisotropic_distance(out, radius);
  if (max_nodes > 0 && static_cast<std::int64_t>(out.size()) > max_nodes) out.resize(static_cast<std::size_t>(max_nodes));
  require(static_cast<std::int64_t>(out.size()) <= kMaxTemplateNodes, "max_nodes", too_many(static_cast<double>(out.size())));
  return Template(std::move(out));
}

Offset Template::reach() const noexcept {
  Offset r{0, 0, 0};
  for (const auto& o : offsets_)
    for (int a = 0; a < 3; ++a) r[a] = std::max(r[a], std::abs(o[a]));
  return r;
}

Template Template::at_level(int level) const {
  require_level(level);
  const std::int64_t s = std::int64_t{1} << level;
  std::vector<Offset> out(offsets_);
  for (auto& o : out)
    for (int a = 0; a < 3; ++a) {
      const std::int64_t v = std::int64_t{o[a]} * s;
      require(std::abs(v) <= (std::int64_t{1} << 24), "level", "scales the template beyond 2**24 cells.");
      o[a] = static_cast<std::int32_t>(v);
    }
  Template t;
  t.offsets_ = std::move(out);
  return t;
}

}  // namespace sl
