#include "core/path.hpp"

#include <algorithm>
#include <array>
#include <bit>
#include <utility>

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

namespace {
// Appends the starts of pieces of at most max_batch positions covering [begin, end).
void add_pieces(std::vector<std::int64_t>& starts, std::int64_t begin, std::int64_t end, std::int64_t max_batch) {
  for (std::int64_t s = begin; s < end; s += max_batch) starts.push_back(s);
}
}  // namespace

void shuffle_path(std::vector<Index>& cells, std::uint64_t seed, int level) {
  const std::size_t n = cells.size();
  const CellBits key_of(seed, static_cast<std::uint32_t>(level), Stream::path);
  auto key = [&](Index cell) { return key_of(static_cast<std::uint64_t>(cell)); };
  // The keys are uniform: one counting pass on their top bits spreads the cells over n to 2 n
  // buckets in order (n / 2 to n past 2**16 cells, where the counts leave the cache; at most
  // 2**24), then each bucket is sorted by the next 32 bits of the keys, kept
  // beside the cells (full keys only for the rare ties there). Same order as one comparison sort
  // of the full keys (ties, of probability 2**-64, to the lower cell). Keys are drawn twice
  // rather than stored whole: fresh pages for them cost more than the draws on small grids.
  // (Small buckets keep the sort's branches predictable: the sort took 18 us against 30 us with
  // n / 4 buckets for 4096 cells. A whole shuffle of 4096 cells takes 36-39 us, against 45-58 us
  // with the keys stored; of 10**6 cells 22-36 ms, against 20-29 ms.)
  const int bits = std::clamp(static_cast<int>(std::bit_width(n)) - (n > 65536 ? 1 : 0), 1, 24);
  auto bucket_of = [&](std::uint64_t k) { return static_cast<std::size_t>(k >> (64 - bits)); };
  auto next_bits = [&](std::uint64_t k) { return static_cast<std::uint32_t>(k << bits >> 32); };
  // end[b]: first counts per bucket, then (after the scatter) the end of bucket b, whose start is
  // end[b - 1] (0 for the first).
  std::vector<std::uint32_t> end(std::size_t{1} << bits, 0);
  for (Index cell : cells) ++end[bucket_of(key(cell))];
  std::uint32_t total = 0;
  for (std::uint32_t& e : end) total += std::exchange(e, total);
  std::vector<Index> sorted(n);
  std::vector<std::uint32_t> minor(n);
  for (Index cell : cells) {
    const std::uint64_t k = key(cell);
    const std::uint32_t at = end[bucket_of(k)]++;
    sorted[at] = cell;
    minor[at] = next_bits(k);
  }
  auto before = [&](std::uint32_t ma, Index a, std::uint32_t mb, Index b) {
    if (ma != mb) return ma < mb;
    const std::uint64_t ka = key(a), kb = key(b);
    return ka != kb ? ka < kb : a < b;
  };
  for (std::size_t b = 0, first = 0; b < end.size(); first = end[b++]) {
    if (end[b] - first > 16) {
      std::vector<std::pair<std::uint32_t, Index>> big(end[b] - first);
      for (std::size_t i = first; i < end[b]; ++i) big[i - first] = {minor[i], sorted[i]};
      std::sort(big.begin(), big.end(), [&](const auto& x, const auto& y) { return before(x.first, x.second, y.first, y.second); });
      for (std::size_t i = first; i < end[b]; ++i) sorted[i] = big[i - first].second;
      continue;
    }
    for (std::size_t i = first + 1; i < end[b]; ++i) {
      const Index x = sorted[i];
      const std::uint32_t mx = minor[i];
      std::size_t j = i;
      for (; j > first && before(mx, x, minor[j - 1], sorted[j - 1]); --j) {
        sorted[j] = sorted[j - 1];
        minor[j] = minor[j - 1];
      }
      sorted[j] = x;
      minor[j] = mx;
    }
  }
  cells.swap(sorted);
}

std::vector<std::int64_t> conflict_free_batches(const Grid& grid, int level, const Offset& reach,
                                                std::vector<Index>& path, std::int64_t max_batch) {
  require_level(level);
  require(max_batch >= 1, "max_batch", "must be at least 1.");
  for (int a = 0; a < 3; ++a) require(reach[a] >= 0, "reach", "must be non-negative.");
  require(path.size() < (std::size_t{1} << 32), "path", "must hold fewer than 2**32 nodes.");
  // Buckets of (reach + 1) level cells: nodes in buckets that are not neighbours cannot read each
  // other; nodes in neighbouring buckets (or the same one) are taken to conflict. The buckets are
  // stored with a border of one on each axis that has more than one, so that the neighbours of a
  // bucket are fixed flat offsets.
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
  // The batch of each node: one past the last batch of the earlier nodes it conflicts with, found
  // as the latest batch of any node so far in each neighbouring bucket (latest[b]; 0 = none yet).
  std::vector<std::uint32_t> latest(static_cast<std::size_t>(padded[0] * padded[1] * padded[2]), 0);
  std::vector<std::uint32_t> batch_of(path.size());
  const Divider by_bucket[3] = {Divider(bucket[0]), Divider(bucket[1]), Divider(bucket[2])};
  std::uint32_t batches = 0;
  std::uint32_t* latest_at = latest.data();
  for (std::size_t i = 0; i < path.size(); ++i) {
    const Ijk c = grid.cell(path[i]);
    Index f = 0;
    for (int a = 0; a < 3; ++a) f = f * padded[a] + by_bucket[a].divide(c[a] >> level) + (padded[a] > 1 ? 1 : 0);
    std::uint32_t after = 0;
    for (std::int64_t o : around) after = std::max(after, latest_at[f + o]);
    latest_at[f] = batch_of[i] = after + 1;
    batches = std::max(batches, after + 1);
  }
  // The nodes batch by batch, in path order within a batch (a stable counting sort); batches
  // larger than max_batch are cut into pieces in that order.
  std::vector<std::int64_t> first(static_cast<std::size_t>(batches) + 2, 0);
  for (std::uint32_t b : batch_of) ++first[b + 1];
  for (std::size_t b = 1; b < first.size(); ++b) first[b] += first[b - 1];
  std::vector<std::int64_t> starts;
  for (std::size_t b = 1; b <= batches; ++b) add_pieces(starts, first[b], first[b + 1], max_batch);
  starts.push_back(static_cast<std::int64_t>(path.size()));
  std::vector<Index> out(path.size());
  for (std::size_t i = 0; i < path.size(); ++i) out[static_cast<std::size_t>(first[batch_of[i]]++)] = path[i];
  path.swap(out);
  return starts;
}

std::vector<std::int64_t> path_pieces(std::size_t count, std::int64_t max_batch) {
  require(max_batch >= 1, "max_batch", "must be at least 1.");
  std::vector<std::int64_t> starts;
  add_pieces(starts, 0, static_cast<std::int64_t>(count), max_batch);
  starts.push_back(static_cast<std::int64_t>(count));
  return starts;
}

}  // namespace sl
