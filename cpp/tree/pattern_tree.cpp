#include "tree/pattern_tree.hpp"

#include <unistd.h>

#include <algorithm>
#include <array>
#include <bit>
#include <string>

#include "core/error.hpp"

namespace sl {

namespace {

constexpr std::int64_t kMiB = 1 << 20;

std::string mib(std::int64_t bytes) {
  if (bytes < kMiB) return std::to_string((bytes + 1023) / 1024) + " KiB";
  return std::to_string((bytes + kMiB - 1) / kMiB) + " MiB";
}

}  // namespace

namespace detail {

// The bit-plane kernel: x86-64 processors have had a popcount instruction since about 2008, but the
// baseline target does not, so a clone that uses it is chosen at load time where available.
#if defined(__x86_64__) && defined(__ELF__) && (defined(__GNUC__) || defined(__clang__)) && !defined(STRATALOOM_NO_CLONES)
#define SL_POPCOUNT_KERNEL __attribute__((target_clones("default", "popcnt")))
#else
#define SL_POPCOUNT_KERNEL
#endif

SL_POPCOUNT_KERNEL std::size_t keep_matching(std::uint32_t* word_index, std::uint64_t* word_alive, std::size_t n,
                                             const std::uint64_t* plane, const std::uint64_t* category,
                                             std::size_t words, std::size_t K, std::int64_t* counts) {
  for (std::size_t q = 0; q < K; ++q) counts[q] = 0;
  std::size_t out = 0;
  for (std::size_t i = 0; i < n; ++i) {
    const std::uint32_t w = word_index[i];
    const std::uint64_t a = word_alive[i] & plane[w];
    if (!a) continue;
    word_index[out] = w;
    word_alive[out] = a;
    ++out;
    for (std::size_t q = 0; q < K; ++q) counts[q] += std::popcount(a & category[q * words + w]);
  }
  return out;
}

}  // namespace detail

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
  if (used > memory_limit)
    throw MemoryLimitError("The memory_limit of " + mib(memory_limit) + " is below the " + mib(used) +
                           " the training image alone needs; raise memory_limit or use a smaller training image.");
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
  const std::int64_t bytes_per_node = static_cast<std::int64_t>(4 * K + 8);
  // Working memory of the build: two orderings of the centres, and the sorted centres kept.
  const std::int64_t work = static_cast<std::int64_t>(N * (2 * sizeof(std::uint32_t) + sizeof(std::int64_t)));
  auto check = [&](std::size_t nodes) {
    const std::int64_t need = used + static_cast<std::int64_t>(nodes) * bytes_per_node + work;
    if (need > memory_limit)
      throw MemoryLimitError("Building the pattern tree of level " + std::to_string(level) + " needs more than " +
                             mib(need) + ", above the memory_limit of " + mib(memory_limit) +
                             ". Use a template with fewer nodes (max_nodes), fewer levels or a smaller "
                             "training image, or raise memory_limit.");
  };
  // Root.
  L.first_centre.push_back(0);
  L.counts.resize(K);
  for (std::size_t k = 0; k < K; ++k) L.counts[k] = static_cast<std::uint32_t>(root_counts_[k]);
  L.depth_start.push_back(0);
  std::vector<std::uint32_t> order(N), scratch(N);
  for (std::size_t i = 0; i < N; ++i) order[i] = static_cast<std::uint32_t>(i);
  std::size_t depth_first = 0;  // id of the first node of the current depth
  std::array<std::uint32_t, 256> bucket{};
  std::vector<std::uint32_t> bucket_counts(S * K);
  const std::uint8_t* padded = padded_.data();
  for (std::size_t d = 0; d < D; ++d) {
    const std::int64_t delta = L.delta[d];
    const std::size_t depth_end = L.first_centre.size();
    L.depth_start.push_back(static_cast<std::uint32_t>(depth_end));
    L.first_child.resize(depth_end);
    for (std::size_t j = depth_first; j < depth_end; ++j) {
      L.first_child[j] = static_cast<std::uint32_t>(L.first_centre.size());
      // The nodes of one depth partition the centres in order.
      const std::uint32_t b = L.first_centre[j];
      const std::uint32_t e = j + 1 < depth_end ? L.first_centre[j + 1] : static_cast<std::uint32_t>(N);
      std::fill(bucket.begin(), bucket.begin() + static_cast<std::ptrdiff_t>(S), 0);
      std::fill(bucket_counts.begin(), bucket_counts.end(), 0);
      for (std::uint32_t p = b; p < e; ++p) {
        const std::int64_t c = centres_[order[p]];
        std::uint8_t s = padded[c + delta];
        if (s == CategoricalImage::kMasked) s = static_cast<std::uint8_t>(K);
        bucket[s] += 1;
        bucket_counts[s * K + padded[c]] += 1;
      }
      // Stable counting sort of the node's centres by symbol; one child per non-empty symbol.
      std::uint32_t start = b;
      std::array<std::uint32_t, 256> pos{};
      for (std::size_t s = 0; s < S; ++s) {
        pos[s] = start;
        if (bucket[s] == 0) continue;
        L.first_centre.push_back(start);
        for (std::size_t k = 0; k < K; ++k) L.counts.push_back(bucket_counts[s * K + k]);
        start += bucket[s];
      }
      for (std::uint32_t p = b; p < e; ++p) {
        const std::int64_t c = centres_[order[p]];
        std::uint8_t s = padded[c + delta];
        if (s == CategoricalImage::kMasked) s = static_cast<std::uint8_t>(K);
        scratch[pos[s]++] = order[p];
      }
    }
    check(L.first_centre.size());
    if (L.first_centre.size() >= (std::size_t{1} << 32) - 1)
      throw MemoryLimitError("The pattern tree of level " + std::to_string(level) +
                             " would hold more than 2**32 nodes; use a template with fewer nodes.");
    order.swap(scratch);
    depth_first = depth_end;
  }
  const std::size_t total = L.first_centre.size();
  L.depth_start.push_back(static_cast<std::uint32_t>(total));
  // Leaves have no children: their ranges are empty at the end of the array.
  L.first_child.resize(total + 1, static_cast<std::uint32_t>(total));
  L.sorted.resize(N);
  for (std::size_t p = 0; p < N; ++p) L.sorted[p] = centres_[order[p]];
  // Bit planes in pattern order (see Level).
  const std::size_t words = (N + 63) / 64;
  L.words = words;
  const std::size_t planes = D * K + K;
  const std::int64_t plane_bytes = static_cast<std::int64_t>(words * planes * sizeof(std::uint64_t));
  check(total + static_cast<std::size_t>(plane_bytes / bytes_per_node));
  L.planes.assign(words * planes, 0);
  for (std::size_t p = 0; p < N; ++p) {
    const std::int64_t c = L.sorted[p];
    const std::size_t w = p / 64;
    const std::uint64_t bit = std::uint64_t{1} << (p % 64);
    for (std::size_t i = 0; i < D; ++i) {
      const std::uint8_t v = padded[c + L.delta[i]];
      if (v != CategoricalImage::kMasked) L.planes[(i * K + v) * words + w] |= bit;
    }
    L.planes[(D * K + padded[c]) * words + w] |= bit;
  }
  used += plane_bytes;
  L.first_centre.shrink_to_fit();
  L.counts.shrink_to_fit();
  used += static_cast<std::int64_t>(total) * bytes_per_node + static_cast<std::int64_t>(N * sizeof(std::int64_t));
  levels_.push_back(std::move(L));
}

std::int64_t PatternTree::node_count(int level) const {
  require(level >= 0 && level < levels(), "level",
          "must be in [0, " + std::to_string(levels() - 1) + "]; got " + std::to_string(level) + ".");
  return static_cast<std::int64_t>(levels_[static_cast<std::size_t>(level)].first_centre.size());
}

std::int64_t PatternTree::memory_bytes() const noexcept {
  std::int64_t b = static_cast<std::int64_t>(padded_.size() + centres_.size() * sizeof(std::int64_t));
  for (const auto& L : levels_)
    b += static_cast<std::int64_t>((L.first_child.size() + L.first_centre.size() + L.counts.size() +
                                    L.depth_start.size()) * sizeof(std::uint32_t) +
                                   L.sorted.size() * sizeof(std::int64_t) + L.planes.size() * sizeof(std::uint64_t));
  return b;
}

std::int64_t PatternTree::node_bytes() const noexcept {
  std::int64_t b = 0;
  for (const auto& L : levels_)
    b += static_cast<std::int64_t>((L.first_child.size() + L.first_centre.size() + L.counts.size()) * sizeof(std::uint32_t));
  return b;
}

EventAnswer PatternTree::query(int level, const std::int32_t* index, const std::uint8_t* value, int m,
                               std::int64_t min_replicates, bool stop_when_pure, QueryScratch& sc) const {
  const Level& L = levels_[static_cast<std::size_t>(level)];
  const std::size_t K = static_cast<std::size_t>(ti_.categories);
  const std::uint8_t missing = static_cast<std::uint8_t>(K);
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
  std::size_t depth = 0;
  const std::size_t last = static_cast<std::size_t>(index[m - 1]);
  const std::uint32_t* fc = L.first_child.data();
  const std::uint32_t* fcen = L.first_centre.data();
  const std::int64_t* sorted = L.sorted.data();
  const std::uint8_t* padded = padded_.data();
  const std::uint32_t* cnt = L.counts.data();
  // Walking on costs about frontier * remaining depth; checking the frontier's centres on the TI
  // costs about a few operations per centre (the replicates so far).
  auto walking_is_dearer = [&]() {
    return sc.frontier.size() * (last + 1 - depth) > static_cast<std::size_t>(ans.replicates) / 8 + 64;
  };
  for (int k = 0; k < m; ++k) {
    const std::size_t t = static_cast<std::size_t>(index[k]);
    // Marginalise the template nodes before the next informed one: follow every branch.
    while (depth < t) {
      if (walking_is_dearer()) return check_centres(L, index, value, m, k, min_replicates, stop_when_pure, depth, ans, sc);
      sc.next.clear();
      for (std::uint32_t j : sc.frontier)
        for (std::uint32_t c = fc[j]; c < fc[j + 1]; ++c) sc.next.push_back(c);
      ans.visited += static_cast<std::int64_t>(sc.next.size());
      sc.frontier.swap(sc.next);
      ++depth;
    }
    if (walking_is_dearer()) return check_centres(L, index, value, m, k, min_replicates, stop_when_pure, depth, ans, sc);
    // The informed node: keep the child holding its value (children come in symbol order).
    sc.next.clear();
    std::fill(sc.counts.begin(), sc.counts.end(), 0);
    const std::uint8_t v = value[k];
    const std::int64_t delta = L.delta[t];
    for (std::uint32_t j : sc.frontier) {
      for (std::uint32_t c = fc[j]; c < fc[j + 1]; ++c) {
        std::uint8_t s = padded[sorted[fcen[c]] + delta];
        if (s == CategoricalImage::kMasked) s = missing;
        if (s < v) continue;
        if (s == v) {
          sc.next.push_back(c);
          for (std::size_t q = 0; q < K; ++q) sc.counts[q] += cnt[static_cast<std::size_t>(c) * K + q];
        }
        break;
      }
    }
    ans.visited += static_cast<std::int64_t>(sc.frontier.size());
    ++depth;
    std::int64_t total = 0;
    for (std::size_t q = 0; q < K; ++q) total += sc.counts[q];
    if (total < min_replicates || total == 0) break;  // counts only fall as nodes are added
    sc.best.swap(sc.counts);
    sc.counts.resize(K);
    ans.replicates = total;
    ans.kept = k + 1;
    if (stop_when_pure && pure(sc.best)) break;
    sc.frontier.swap(sc.next);
  }
  return ans;
}

EventAnswer PatternTree::check_centres(const Level& L, const std::int32_t* index, const std::uint8_t* value, int m,
                                       int k, std::int64_t min_replicates, bool stop_when_pure, std::size_t depth,
                                       EventAnswer ans, QueryScratch& sc) const {
  const std::size_t K = static_cast<std::size_t>(ti_.categories);
  const std::uint32_t N = static_cast<std::uint32_t>(centres_.size());
  const std::uint32_t depth_end = L.depth_start[depth + 1];
  const std::size_t words = L.words;
  const std::uint64_t* planes = L.planes.data();
  const std::uint64_t* category = planes + L.delta.size() * K * words;
  ans.scanned = true;
  // The frontier's centres as (word, bits) pairs; neighbouring ranges may share a word.
  sc.word_index.clear();
  sc.word_alive.clear();
  for (std::uint32_t j : sc.frontier) {
    const std::uint32_t b = L.first_centre[j];
    const std::uint32_t e = j + 1 < depth_end ? L.first_centre[j + 1] : N;
    if (b >= e) continue;
    ans.visited += e - b;
    for (std::uint32_t w = b / 64; w <= (e - 1) / 64; ++w) {
      const std::uint32_t lo = std::max(b, w * 64) - w * 64, hi = std::min<std::uint32_t>(e, w * 64 + 64) - w * 64;
      const std::uint64_t bits = (hi == 64 ? ~std::uint64_t{0} : ((std::uint64_t{1} << hi) - 1)) & (~std::uint64_t{0} << lo);
      if (!sc.word_index.empty() && sc.word_index.back() == w) {
        sc.word_alive.back() |= bits;
      } else {
        sc.word_index.push_back(w);
        sc.word_alive.push_back(bits);
      }
    }
  }
  // Add the informed nodes one at a time, keeping only words with centres still matching; stop
  // when too few replicates remain (node dropping) or, in simulation, when one category holds all.
  sc.counts.resize(K);
  for (std::size_t n = static_cast<std::size_t>(k); n < static_cast<std::size_t>(m); ++n) {
    const std::uint64_t* plane = planes + (static_cast<std::size_t>(index[n]) * K + value[n]) * words;
    const std::size_t out = detail::keep_matching(sc.word_index.data(), sc.word_alive.data(), sc.word_index.size(),
                                                  plane, category, words, K, sc.counts.data());
    sc.word_index.resize(out);
    sc.word_alive.resize(out);
    ans.visited += static_cast<std::int64_t>(out) * 64;
    std::int64_t total = 0;
    int nonzero = 0;
    for (std::size_t q = 0; q < K; ++q) {
      total += sc.counts[q];
      nonzero += sc.counts[q] > 0;
    }
    if (total < min_replicates || total == 0) break;
    sc.best = sc.counts;
    ans.replicates = total;
    ans.kept = static_cast<int>(n + 1);
    if (stop_when_pure && nonzero <= 1) break;
  }
  return ans;
}

EventAnswer PatternTree::scan(int level, const std::int32_t* index, const std::uint8_t* value, int m,
                              std::int64_t min_replicates, QueryScratch& sc) const {
  const Level& L = levels_[static_cast<std::size_t>(level)];
  EventAnswer ans;
  sc.best.assign(root_counts_.begin(), root_counts_.end());
  ans.replicates = static_cast<std::int64_t>(centres_.size());
  sc.frontier.assign(1, 0);
  return check_centres(L, index, value, m, 0, min_replicates, false, 0, ans, sc);
}

}  // namespace sl
