#include "core/path.hpp"

#include <algorithm>

#include "core/error.hpp"
#include "core/random.hpp"

namespace sl {

std::vector<Index> level_cells(const Grid& grid, int level, int coarsest) {
  require_level(level);
  require_level(coarsest, "coarsest");
  require(level <= coarsest, "level", "must not exceed the coarsest level.");
  const Index s = Grid::level_step(level);
  std::vector<Index> out;
  out.reserve(static_cast<std::size_t>(grid.level_size(level)));
  const auto& n = grid.shape();
  for (Index z = 0; z < n[0]; z += s)
    for (Index y = 0; y < n[1]; y += s)
      for (Index x = 0; x < n[2]; x += s) {
        const Ijk c{z, y, x};
        if (level < coarsest && Grid::on_level(c, level + 1)) continue;
        out.push_back(grid.index(c));
      }
  return out;
}

void shuffle_path(std::vector<Index>& cells, std::uint64_t seed, int level) {
  struct Keyed {
    std::uint64_t key;
    Index cell;
  };
  std::vector<Keyed> keyed(cells.size());
  for (std::size_t i = 0; i < cells.size(); ++i)
    keyed[i] = {random_bits(seed, static_cast<std::uint32_t>(level), static_cast<std::uint64_t>(cells[i]), Stream::path),
                cells[i]};
  std::sort(keyed.begin(), keyed.end(), [](const Keyed& a, const Keyed& b) {
    return a.key != b.key ? a.key < b.key : a.cell < b.cell;
  });
  for (std::size_t i = 0; i < cells.size(); ++i) cells[i] = keyed[i].cell;
}

std::vector<std::int64_t> conflict_free_batches(const Grid& grid, int level, const Offset& reach,
                                                std::vector<Index>& path, std::int64_t max_batch) {
  require_level(level);
  require(max_batch >= 1, "max_batch", "must be at least 1.");
  for (int a = 0; a < 3; ++a) require(reach[a] >= 0, "reach", "must be non-negative.");
  const Index step = Grid::level_step(level);
  // Buckets of (reach + 1) level cells: nodes in buckets that are not neighbours cannot conflict,
  // so a node is admitted when none of its 27 neighbouring buckets holds a node of this batch.
  Ijk bucket{}, nb{};
  for (int a = 0; a < 3; ++a) {
    bucket[a] = Index{reach[a]} + 1;
    nb[a] = (grid.level_extent(level, a) + bucket[a] - 1) / bucket[a];
  }
  // blocked[b] == id: bucket b neighbours a bucket holding a node of batch id. Marking the 27
  // neighbours of each node taken lets a candidate check only its own bucket.
  std::vector<std::int64_t> blocked(static_cast<std::size_t>(nb[0] * nb[1] * nb[2]), -1);
  auto bucket_of = [&](Index cell) {
    const Ijk c = grid.cell(cell);
    return Ijk{c[0] / step / bucket[0], c[1] / step / bucket[1], c[2] / step / bucket[2]};
  };
  auto flat = [&](const Ijk& b) { return static_cast<std::size_t>((b[0] * nb[1] + b[1]) * nb[2] + b[2]); };
  auto block_around = [&](const Ijk& b, std::int64_t id) {
    for (Index z = std::max<Index>(0, b[0] - 1); z <= std::min(nb[0] - 1, b[0] + 1); ++z)
      for (Index y = std::max<Index>(0, b[1] - 1); y <= std::min(nb[1] - 1, b[1] + 1); ++y)
        for (Index x = std::max<Index>(0, b[2] - 1); x <= std::min(nb[2] - 1, b[2] + 1); ++x)
          blocked[static_cast<std::size_t>((z * nb[1] + y) * nb[2] + x)] = id;
  };
  // The bucket of every path node, computed once (each node may be considered many times).
  std::vector<std::uint32_t> bucket_index(path.size());
  for (std::size_t i = 0; i < path.size(); ++i) bucket_index[i] = static_cast<std::uint32_t>(flat(bucket_of(path[i])));
  const std::int64_t window = 4 * max_batch;  // candidates looked at per batch
  std::vector<Index> out;
  out.reserve(path.size());
  std::vector<std::int64_t> starts;
  // Nodes deferred by earlier batches (positions in `path`), in path order; path nodes not yet
  // looked at start at `next` and are only taken once no deferred node is left.
  std::vector<std::size_t> pending, deferred;
  std::size_t next = 0;
  std::int64_t id = 0;
  while (next < path.size() || !pending.empty()) {
    starts.push_back(static_cast<std::int64_t>(out.size()));
    std::int64_t taken = 0, seen = 0;
    deferred.clear();
    auto consider = [&](std::size_t i) {
      const std::uint32_t b = bucket_index[i];
      if (blocked[b] != id) {
        block_around(bucket_of(path[i]), id);
        out.push_back(path[i]);
        ++taken;
      } else {
        deferred.push_back(i);
      }
      ++seen;
    };
    std::size_t head = 0;
    while (head < pending.size() && taken < max_batch && seen < window) consider(pending[head++]);
    while (next < path.size() && head == pending.size() && taken < max_batch && seen < window) consider(next++);
    // Deferred nodes come before the pending ones not looked at: both keep their path order.
    deferred.insert(deferred.end(), pending.begin() + static_cast<std::ptrdiff_t>(head), pending.end());
    pending.swap(deferred);
    ++id;
  }
  starts.push_back(static_cast<std::int64_t>(out.size()));
  path.swap(out);
  return starts;
}

}  // namespace sl
