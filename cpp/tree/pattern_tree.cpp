#include "tree/pattern_tree.hpp"

#include <unistd.h>

#include <algorithm>
#include <array>
#include <string>

#include "core/error.hpp"

namespace sl {

namespace {

constexpr std::int64_t kMiB = 1 << 20;

std::string mib(std::int64_t bytes) { return std::to_string((bytes + kMiB - 1) / kMiB) + " MiB"; }

}  // namespace

std::int64_t default_memory_limit() {
  const long pages = sysconf(_SC_PHYS_PAGES);
  const long page = sysconf(_SC_PAGE_SIZE);
  if (pages <= 0 || page <= 0) return std::int64_t{4} << 30;
  return static_cast<std::int64_t>(pages) * page / 2;
}

PatternTree::PatternTree(CategoricalImage ti, const Template& tpl, int levels, std::int64_t memory_limit)
    : ti_(std::move(ti)), template_(tpl) {
  const Ijk& n = ti_.shape;
  require(n[0] >= 1 && n[1] >= 1 && n[2] >= 1, "training_image", "must not be empty.");
  require(static_cast<Index>(ti_.codes.size()) == n[0] * n[1] * n[2], "training_image",
          "has a data size that does not match its shape.");
  require(ti_.categories >= 1 && ti_.categories <= 254, "training_image", "must hold codes 0..K-1 with K <= 254.");
  require(levels >= 1 && levels <= 12, "levels", "must be an integer in [1, 12]; got " + std::to_string(levels) + ".");
  require(memory_limit > 0, "memory_limit", "must be a positive number of bytes.");
  require(template_.size() <= 4096, "template", "must hold at most 4096 nodes for a pattern tree.");
  const Offset reach = template_.reach();
  const char* axes[3] = {"z", "y", "x"};
  for (int a = 0; a < 3; ++a) {
    const Index scaled = Index{reach[a]} << (levels - 1);
    require(scaled < n[a] || reach[a] == 0, "template",
            std::string("reaches ") + std::to_string(scaled) + " cells along " + axes[a] + " at level " +
                std::to_string(levels - 1) + " but the training image has only " + std::to_string(n[a]) +
                " cells there; use a smaller template, fewer levels or a larger training image.");
    pad_[a] = scaled;
    padded_shape_[a] = n[a] + 2 * scaled;
  }
  // Padded copy with a masked border: every template lookup from a TI centre stays in bounds.
  padded_.assign(static_cast<std::size_t>(padded_shape_[0] * padded_shape_[1] * padded_shape_[2]),
                 CategoricalImage::kMasked);
  root_counts_.assign(static_cast<std::size_t>(ti_.categories), 0);
  for (Index z = 0; z < n[0]; ++z)
    for (Index y = 0; y < n[1]; ++y)
      for (Index x = 0; x < n[2]; ++x) {
        const std::uint8_t c = ti_.codes[static_cast<std::size_t>((z * n[1] + y) * n[2] + x)];
        const Index p = ((z + pad_[0]) * padded_shape_[1] + (y + pad_[1])) * padded_shape_[2] + (x + pad_[2]);
        if (c == CategoricalImage::kMasked) continue;
        require(c < ti_.categories, "training_image", "holds a code outside 0..K-1.");
        padded_[static_cast<std::size_t>(p)] = c;
        centres_.push_back(p);
        root_counts_[c] += 1;
      }
  require(!centres_.empty(), "training_image", "is entirely masked; at least one cell must hold a code >= 0.");
  require(centres_.size() < (std::size_t{1} << 32) - 1, "training_image", "has more than 2**32 - 2 informed cells.");
  std::int64_t used = static_cast<std::int64_t>(padded_.size() + centres_.size() * sizeof(std::int64_t));
  require(used <= memory_limit, "memory_limit",
          "of " + mib(memory_limit) + " is below the " + mib(used) + " the training image alone needs.");
  for (int level = 0; level < levels; ++level) build_level(level, memory_limit, used);
}

void PatternTree::build_level(int level, std::int64_t memory_limit, std::int64_t& used) {
  const std::size_t K = static_cast<std::size_t>(ti_.categories);
  const std::size_t S = K + 1;  // symbols: codes and `missing`
  const std::size_t D = template_.size();
  const std::size_t N = centres_.size();
  Level L;
  L.delta.resize(D);
  for (std::size_t i = 0; i < D; ++i) {
    const Offset& o = template_.offsets()[i];
    L.delta[i] = ((Index{o[0]} << level) * padded_shape_[1] + (Index{o[1]} << level)) * padded_shape_[2] +
                 (Index{o[2]} << level);
  }
  const std::int64_t bytes_per_node = static_cast<std::int64_t>(4 * K + 5);
  // Working memory of the build: two orderings of the centres.
  const std::int64_t work = static_cast<std::int64_t>(2 * N * sizeof(std::uint32_t));
  auto check = [&](std::size_t nodes) {
    const std::int64_t need = used + static_cast<std::int64_t>(nodes) * bytes_per_node + work;
    if (need > memory_limit)
      throw MemoryLimitError("Building the pattern tree of level " + std::to_string(level) + " needs more than " +
                             mib(need) + ", above the memory_limit of " + mib(memory_limit) +
                             ". Use a template with fewer nodes (max_nodes), fewer levels or a smaller "
                             "training image, or raise memory_limit.");
  };
  // Root.
  L.symbol.push_back(0);
  L.counts.resize(K);
  for (std::size_t k = 0; k < K; ++k) L.counts[k] = static_cast<std::uint32_t>(root_counts_[k]);
  std::vector<std::uint32_t> order(N), scratch(N);
  for (std::size_t i = 0; i < N; ++i) order[i] = static_cast<std::uint32_t>(i);
  // group[j] .. group[j + 1]: the centres (in `order`) of node j of the current depth.
  std::vector<std::uint32_t> group{0, static_cast<std::uint32_t>(N)}, next_group;
  std::size_t depth_first = 0;  // id of the first node of the current depth
  std::vector<std::uint32_t> bucket(S);
  std::vector<std::uint32_t> bucket_counts(S * K);
  const std::uint8_t* padded = padded_.data();
  for (std::size_t d = 0; d < D; ++d) {
    const std::int64_t delta = L.delta[d];
    const std::size_t nodes_here = group.size() - 1;
    next_group.clear();
    next_group.push_back(0);
    L.first_child.resize(depth_first + nodes_here);
    for (std::size_t j = 0; j < nodes_here; ++j) {
      L.first_child[depth_first + j] = static_cast<std::uint32_t>(L.symbol.size());
      const std::uint32_t b = group[j], e = group[j + 1];
      std::fill(bucket.begin(), bucket.end(), 0);
      std::fill(bucket_counts.begin(), bucket_counts.end(), 0);
      for (std::uint32_t p = b; p < e; ++p) {
        const std::int64_t c = centres_[order[p]];
        std::uint8_t s = padded[c + delta];
        if (s == CategoricalImage::kMasked) s = static_cast<std::uint8_t>(K);
        bucket[s] += 1;
        bucket_counts[s * K + padded[c]] += 1;
      }
      // Stable counting sort of the group's centres by symbol; one child per non-empty symbol.
      std::uint32_t start = b;
      std::array<std::uint32_t, 256> pos{};
      for (std::size_t s = 0; s < S; ++s) {
        pos[s] = start;
        if (bucket[s] == 0) continue;
        L.symbol.push_back(static_cast<std::uint8_t>(s));
        for (std::size_t k = 0; k < K; ++k) L.counts.push_back(bucket_counts[s * K + k]);
        start += bucket[s];
        next_group.push_back(start);
      }
      for (std::uint32_t p = b; p < e; ++p) {
        const std::int64_t c = centres_[order[p]];
        std::uint8_t s = padded[c + delta];
        if (s == CategoricalImage::kMasked) s = static_cast<std::uint8_t>(K);
        scratch[pos[s]++] = order[p];
      }
    }
    check(L.symbol.size());
    if (L.symbol.size() >= (std::size_t{1} << 32) - 1)
      throw MemoryLimitError("The pattern tree of level " + std::to_string(level) +
                             " would hold more than 2**32 nodes; use a template with fewer nodes.");
    order.swap(scratch);
    group.swap(next_group);
    depth_first += nodes_here;
  }
  // Leaves have no children: their ranges are empty at the end of the array.
  L.first_child.resize(L.symbol.size() + 1, static_cast<std::uint32_t>(L.symbol.size()));
  L.symbol.shrink_to_fit();
  L.counts.shrink_to_fit();
  used += static_cast<std::int64_t>(L.symbol.size()) * bytes_per_node;
  levels_.push_back(std::move(L));
}

std::int64_t PatternTree::node_count(int level) const {
  require(level >= 0 && level < levels(), "level",
          "must be in [0, " + std::to_string(levels() - 1) + "]; got " + std::to_string(level) + ".");
  return static_cast<std::int64_t>(levels_[static_cast<std::size_t>(level)].symbol.size());
}

std::int64_t PatternTree::memory_bytes() const noexcept {
  std::int64_t b = static_cast<std::int64_t>(padded_.size() + centres_.size() * sizeof(std::int64_t));
  for (const auto& L : levels_)
    b += static_cast<std::int64_t>(L.symbol.size() + L.first_child.size() * sizeof(std::uint32_t) +
                                   L.counts.size() * sizeof(std::uint32_t));
  return b;
}

EventAnswer PatternTree::query(int level, const std::int32_t* index, const std::uint8_t* value, int m,
                               std::int64_t min_replicates, bool stop_when_pure, QueryScratch& sc) const {
  const Level& L = levels_[static_cast<std::size_t>(level)];
  const std::size_t K = static_cast<std::size_t>(ti_.categories);
  sc.best.assign(root_counts_.begin(), root_counts_.end());
  sc.counts.resize(K);
  EventAnswer ans;
  ans.replicates = static_cast<std::int64_t>(centres_.size());
  auto pure = [&](const std::vector<std::int64_t>& c) {
    int nonzero = 0;
    for (std::size_t k = 0; k < K; ++k) nonzero += c[k] > 0;
    return nonzero <= 1;
  };
  if (m == 0 || (stop_when_pure && pure(sc.best))) return ans;
  sc.frontier.assign(1, 0);
  // Visiting more tree nodes than there are centres costs more than scanning the TI.
  const std::size_t budget = centres_.size() + 64;
  std::size_t visited = 0;
  std::size_t depth = 0;
  const std::uint32_t* fc = L.first_child.data();
  const std::uint8_t* sym = L.symbol.data();
  const std::uint32_t* cnt = L.counts.data();
  for (int k = 0; k < m; ++k) {
    const std::size_t t = static_cast<std::size_t>(index[k]);
    // Marginalise the template nodes before the next informed one: follow every branch.
    while (depth < t) {
      sc.next.clear();
      for (std::uint32_t j : sc.frontier)
        for (std::uint32_t c = fc[j]; c < fc[j + 1]; ++c) sc.next.push_back(c);
      visited += sc.next.size();
      if (visited > budget) return scan(level, index, value, m, min_replicates, sc);
      sc.frontier.swap(sc.next);
      ++depth;
    }
    // The informed node: keep the child holding its value.
    sc.next.clear();
    std::fill(sc.counts.begin(), sc.counts.end(), 0);
    std::int64_t total = 0;
    const std::uint8_t v = value[k];
    for (std::uint32_t j : sc.frontier) {
      for (std::uint32_t c = fc[j]; c < fc[j + 1]; ++c) {
        if (sym[c] < v) continue;
        if (sym[c] == v) {
          sc.next.push_back(c);
          for (std::size_t q = 0; q < K; ++q) sc.counts[q] += cnt[static_cast<std::size_t>(c) * K + q];
        }
        break;
      }
    }
    visited += sc.frontier.size();
    ++depth;
    for (std::size_t q = 0; q < K; ++q) total += sc.counts[q];
    if (total < min_replicates || total == 0) break;  // counts only fall as nodes are added
    sc.best.swap(sc.counts);
    sc.counts.resize(K);
    ans.replicates = total;
    ans.kept = k + 1;
    if (stop_when_pure && pure(sc.best)) break;
    sc.frontier.swap(sc.next);
    if (visited > budget) return scan(level, index, value, m, min_replicates, sc);
  }
  return ans;
}

EventAnswer PatternTree::scan(int level, const std::int32_t* index, const std::uint8_t* value, int m,
                              std::int64_t min_replicates, QueryScratch& sc) const {
  const Level& L = levels_[static_cast<std::size_t>(level)];
  const std::size_t K = static_cast<std::size_t>(ti_.categories);
  const std::size_t M = static_cast<std::size_t>(m);
  sc.prefix_hist.assign((M + 1) * K, 0);
  const std::uint8_t* padded = padded_.data();
  // For every centre, the length of the prefix of the event it matches.
  for (const std::int64_t c : centres_) {
    std::size_t j = 0;
    while (j < M && padded[c + L.delta[static_cast<std::size_t>(index[j])]] == value[j]) ++j;
    sc.prefix_hist[j * K + padded[c]] += 1;
  }
  // Replicates of the first k nodes: the centres that match at least k of them.
  EventAnswer ans;
  sc.best.assign(root_counts_.begin(), root_counts_.end());
  ans.replicates = static_cast<std::int64_t>(centres_.size());
  ans.scanned = true;
  sc.counts.assign(K, 0);
  for (std::size_t k = M; k >= 1; --k) {
    for (std::size_t q = 0; q < K; ++q) sc.counts[q] += sc.prefix_hist[k * K + q];
    std::int64_t total = 0;
    for (std::size_t q = 0; q < K; ++q) total += sc.counts[q];
    if (total >= min_replicates && total > 0) {
      sc.best = sc.counts;
      ans.replicates = total;
      ans.kept = static_cast<int>(k);
      break;
    }
  }
  return ans;
}

}  // namespace sl
