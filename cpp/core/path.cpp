#include "core/path.hpp"

#include <algorithm>
#include <array>
#include <bit>

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
  auto before = [](const Keyed& a, const Keyed& b) { return a.key != b.key ? a.key < b.key : a.cell < b.cell; };
  const std::size_t n = cells.size();
  auto key_of = [&](Index cell) {
    return random_bits(seed, static_cast<std::uint32_t>(level), static_cast<std::uint64_t>(cell), Stream::path);
  };
  // The keys are uniform: one counting pass on their top bits spreads the cells over about n / 4
  // buckets in order, then each (small) bucket is sorted. Same order as one comparison sort. The
  // keys are drawn twice (counting, then placing) rather than held twice.
  const int bits = std::clamp(static_cast<int>(std::bit_width(n)) - 2, 1, 16);
  std::vector<std::size_t> start((std::size_t{1} << bits) + 1, 0);
  for (Index cell : cells) ++start[(key_of(cell) >> (64 - bits)) + 1];
  for (std::size_t b = 1; b < start.size(); ++b) start[b] += start[b - 1];
  std::vector<std::size_t> fill(start.begin(), start.end() - 1);
  std::vector<Keyed> sorted(n);
  for (Index cell : cells) {
    const std::uint64_t key = key_of(cell);
    sorted[fill[key >> (64 - bits)]++] = {key, cell};
  }
  // Buckets hold about four cells (up to 2**18 cells; more past that): insertion sort for small
  // ones.
  for (std::size_t b = 0; b + 1 < start.size(); ++b) {
    if (start[b + 1] - start[b] > 16) {
      std::sort(sorted.begin() + static_cast<std::ptrdiff_t>(start[b]),
                sorted.begin() + static_cast<std::ptrdiff_t>(start[b + 1]), before);
      continue;
    }
    for (std::size_t i = start[b] + 1; i < start[b + 1]; ++i) {
      const Keyed x = sorted[i];
      std::size_t j = i;
      for (; j > start[b] && before(x, sorted[j - 1]); --j) sorted[j] = sorted[j - 1];
      sorted[j] = x;
    }
  }
  for (std::size_t i = 0; i < n; ++i) cells[i] = sorted[i].cell;
}

std::vector<std::int64_t> conflict_free_batches(const Grid& grid, int level, const Offset& reach,
                                                std::vector<Index>& path, std::int64_t max_batch) {
  require_level(level);
  require(max_batch >= 1, "max_batch", "must be at least 1.");
  for (int a = 0; a < 3; ++a) require(reach[a] >= 0, "reach", "must be non-negative.");
  // Buckets of (reach + 1) level cells: nodes in buckets that are not neighbours cannot conflict,
  // so a node is admitted when none of its 27 neighbouring buckets holds a node of this batch.
  // The buckets are stored with a border of one on each axis that has more than one, so that the
  // neighbours of a bucket are fixed flat offsets.
  Ijk nb{}, padded{};
  std::int64_t bucket[3];
  for (int a = 0; a < 3; ++a) {
    bucket[a] = Index{reach[a]} + 1;
    nb[a] = (grid.level_extent(level, a) + bucket[a] - 1) / bucket[a];
    padded[a] = nb[a] > 1 ? nb[a] + 2 : 1;
  }
  std::vector<std::int64_t> around;  // flat offsets of a bucket's neighbours and itself
  for (Index z = padded[0] > 1 ? -1 : 0; z <= (padded[0] > 1 ? 1 : 0); ++z)
    for (Index y = padded[1] > 1 ? -1 : 0; y <= (padded[1] > 1 ? 1 : 0); ++y)
      for (Index x = padded[2] > 1 ? -1 : 0; x <= (padded[2] > 1 ? 1 : 0); ++x)
        around.push_back((z * padded[1] + y) * padded[2] + x);
  // blocked[b] == id: bucket b neighbours a bucket holding a node of batch id. Marking the
  // neighbours of each node taken lets a candidate check only its own bucket.
  std::vector<std::int64_t> blocked(static_cast<std::size_t>(padded[0] * padded[1] * padded[2]), -1);
  // The (padded) bucket of every path node, computed once: each node may be looked at many times.
  std::vector<std::uint64_t> bucket_index(path.size());
  const Divider by_bucket[3] = {Divider(bucket[0]), Divider(bucket[1]), Divider(bucket[2])};
  for (std::size_t i = 0; i < path.size(); ++i) {
    const Ijk c = grid.cell(path[i]);
    Index f = 0;
    for (int a = 0; a < 3; ++a) f = f * padded[a] + by_bucket[a].divide(c[a] >> level) + (padded[a] > 1 ? 1 : 0);
    bucket_index[i] = static_cast<std::uint64_t>(f);
  }
  // Candidates looked at per batch. (A max_batch past the path's length changes nothing; capping
  // it keeps the window from overflowing.)
  max_batch = std::min<std::int64_t>(max_batch, static_cast<std::int64_t>(path.size()) + 1);
  const std::int64_t window = 4 * max_batch;
  std::vector<Index> out(path.size());
  std::size_t placed = 0;
  std::vector<std::int64_t> starts;
  // Nodes deferred by earlier batches (positions in `path`), in path order; path nodes not yet
  // looked at start at `next` and are only taken once no deferred node is left. Both lists hold
  // at most `window` nodes (and at most the path): raw stores, no growth checks.
  const std::size_t list_size = std::min(static_cast<std::size_t>(window), path.size());
  std::vector<std::size_t> pending(list_size), deferred(list_size);
  std::size_t pending_count = 0;
  std::size_t next = 0;
  std::int64_t id = 0;
  std::int64_t* blocked_at = blocked.data();
  const std::uint64_t* bucket_of = bucket_index.data();
  const std::int64_t* around_at = around.data();
  const std::size_t around_count = around.size();
  const Index* path_at = path.data();
  while (next < path.size() || pending_count > 0) {
    starts.push_back(static_cast<std::int64_t>(placed));
    std::int64_t taken = 0, seen = 0;
    std::size_t deferred_count = 0;
    auto consider = [&](std::size_t i) {
      const std::uint64_t b = bucket_of[i];
      if (blocked_at[b] != id) {
        for (std::size_t o = 0; o < around_count; ++o) blocked_at[static_cast<std::int64_t>(b) + around_at[o]] = id;
        out[placed++] = path_at[i];
        ++taken;
      } else {
        deferred[deferred_count++] = i;
      }
      ++seen;
    };
    std::size_t head = 0;
    while (head < pending_count && taken < max_batch && seen < window) consider(pending[head++]);
    while (next < path.size() && head == pending_count && taken < max_batch && seen < window) consider(next++);
    // Deferred nodes come before the pending ones not looked at: both keep their path order.
    for (; head < pending_count; ++head) deferred[deferred_count++] = pending[head];
    pending.swap(deferred);
    pending_count = deferred_count;
    ++id;
  }
  starts.push_back(static_cast<std::int64_t>(placed));
  path.swap(out);
  return starts;
}

std::int64_t batch_capacity(const Grid& grid, int level, const Offset& reach) {
  require_level(level);
  std::int64_t buckets = 1;
  for (int a = 0; a < 3; ++a) {
    const Index bucket = Index{reach[a]} + 1;
    buckets *= (grid.level_extent(level, a) + bucket - 1) / bucket;
  }
  return buckets / 4 + 1;
}

}  // namespace sl
