#include "tree/pattern_tree.hpp"

#include <unistd.h>

#include <algorithm>
#include <array>
#include <bit>
#include <limits>
#include <map>
#include <mutex>
#include <string>

#include "core/error.hpp"
#include "tree/bit_planes.hpp"

namespace sl {

namespace {

constexpr std::int64_t kMiB = 1 << 20;

// Lead answers (Level::lead_answers): at most this many entries per level, which sets how many
// leading positions they cover (7 for three categories). On the 64x64 comparison (K = 3), 6, 7
// and 8 positions cut the simulation by about 3, 6 and 4 % (larger tables leave the cache).
constexpr std::uint64_t kLeadEntries = 16384;
constexpr std::uint64_t kLeadUnknown = 0, kLeadUnresolved = 1;

// Level::plane_category_counts and Level::pair_counts are kept up to this many counts (4 MB).
constexpr std::size_t kMaxPlaneCategoryCounts = std::size_t{1} << 20;
constexpr std::size_t kMaxPairCounts = std::size_t{1} << 20;

// A lead answer: one category left, the nodes kept and the centres matching them.
std::uint64_t pack_lead_answer(int category, std::size_t kept, std::int64_t count) {
  return 2 | static_cast<std::uint64_t>(category) << 2 | static_cast<std::uint64_t>(kept) << 10 |
         static_cast<std::uint64_t>(count) << 26;
}
int lead_category(std::uint64_t e) { return static_cast<int>(e >> 2 & 0xFF); }
int lead_kept(std::uint64_t e) { return static_cast<int>(e >> 10 & 0xFFFF); }
std::int64_t lead_count(std::uint64_t e) { return static_cast<std::int64_t>(e >> 26); }

// Sizes the scratch sets of a query for planes of `words` words.
void fit_runs(QueryScratch& sc, std::size_t words) {
  if (sc.run.size() >= words + planes::kPadWords) return;
  sc.run.resize(words + planes::kPadWords);
  sc.next_run.resize(words + planes::kPadWords);
  sc.third_run.resize(words + planes::kPadWords);
}

std::string mib(std::int64_t bytes) {
  if (bytes < kMiB) return std::to_string((bytes + 1023) / 1024) + " KiB";
  return std::to_string((bytes + kMiB - 1) / kMiB) + " MiB";
}

}  // namespace


std::int64_t default_memory_limit() {
  const long pages = sysconf(_SC_PHYS_PAGES);
  const long page = sysconf(_SC_PAGE_SIZE);
  if (pages <= 0 || page <= 0) return std::int64_t{4} << 30;
  return static_cast<std::int64_t>(pages) * page / 2;
}

struct PatternTree::Variants {
  std::mutex mutex;
  // nullptr: over the memory limit. Map nodes do not move, so handed-out pointers stay valid.
  std::map<std::pair<int, std::vector<std::int32_t>>, std::unique_ptr<Level>> built;
};

namespace {
// Bytes held by one level's arrays: what memory_bytes reports and the budget counts.
std::int64_t level_bytes(const PatternTree::Level& L) {
  return static_cast<std::int64_t>(
      (L.first_child.size() + L.first_centre.size() + L.counts.size() + L.depth_start.size() + L.order.size() +
       L.plane_first.size() + L.plane_end.size()) *
          sizeof(std::uint32_t) +
      L.plane_count.size() * sizeof(std::int64_t) +
      (L.plane_category_counts.size() + L.pair_counts.size()) * sizeof(std::uint32_t) + L.pair_ready.size() +
      (L.sorted.size() + L.delta.size()) * sizeof(std::int64_t) +
      (L.planes.size() + L.category.size() + L.lead_answers.size()) * sizeof(std::uint64_t) +
      L.lead_weight.size() * sizeof(std::uint32_t));
}

std::shared_ptr<MemoryBudget> new_budget(std::int64_t memory_limit) {
  require(memory_limit > 0, "memory_limit", "must be a positive number of bytes.");
  return std::make_shared<MemoryBudget>(memory_limit);
}
}  // namespace

PatternTree::PatternTree(CategoricalImage ti, const Template& tpl, int levels, std::int64_t memory_limit)
    : PatternTree(std::move(ti), tpl, levels, new_budget(memory_limit)) {}

PatternTree::PatternTree(CategoricalImage ti, const Template& tpl, int levels, std::shared_ptr<MemoryBudget> budget)
    : ti_(std::move(ti)), template_(tpl), budget_(std::move(budget)) {
  require(budget_ != nullptr, "memory_limit", "needs a memory budget.");
  const std::int64_t memory_limit = budget_->limit;
  const Ijk& n = ti_.shape;
  require(n[0] >= 1 && n[1] >= 1 && n[2] >= 1, "training_image", "must not be empty.");
  require(static_cast<Index>(ti_.codes.size()) == n[0] * n[1] * n[2], "training_image",
          "has a data size that does not match its shape.");
  require(ti_.categories >= 1 && ti_.categories <= 254, "training_image", "must hold codes 0..K-1 with K <= 254.");
  require(levels >= 1 && levels <= 12, "levels", "must be an integer in [1, 12]; got " + std::to_string(levels) + ".");
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
  std::int64_t others = 0;  // bytes already held by trees sharing the budget
  {
    std::lock_guard<std::mutex> lock(budget_->mutex);
    others = budget_->used;
  }
  std::int64_t used = others + static_cast<std::int64_t>(padded_.size() + centres_.size() * sizeof(std::int64_t));
  if (used > memory_limit)
    throw MemoryLimitError("The memory_limit of " + mib(memory_limit) + " is below the " + mib(used) +
                           " the training image needs" + (others ? " beside the trees built before it" : "") +
                           "; raise memory_limit or use a smaller training image.");
  std::vector<std::int32_t> identity(template_.size());
  for (std::size_t i = 0; i < identity.size(); ++i) identity[i] = static_cast<std::int32_t>(i);
  for (int level = 0; level < levels; ++level)
    levels_.push_back(build_level(level, identity, node_cap(), memory_limit, used));
  {
    std::lock_guard<std::mutex> lock(budget_->mutex);
    // Trees built meanwhile on the same budget count too.
    if (budget_->used + (used - others) > memory_limit)
      throw MemoryLimitError("The pattern trees sharing a memory_limit of " + mib(memory_limit) +
                             " would need more; raise memory_limit or use a template with fewer nodes.");
    budget_->used += used - others;
  }
  variants_ = std::make_shared<Variants>();
}

std::size_t PatternTree::node_cap() const {
  // Deep tree nodes mostly hold one centre each and cost 4 K + 8 bytes, while the bit planes answer
  // those depths for K + 1 bits a centre and node. Measured on a 1M-cell, 50-node, 3-category TI:
  // with a cap of twice the centres, queries took about 1.5 times as long as with full trees, in a
  // sixth of the memory (1.3 GB of full trees for a 250,000-cell TI).
  return std::max<std::size_t>(2 * centres_.size(), 4096);
}

const PatternTree::Level* PatternTree::ordered_variant(int level, const std::vector<std::int32_t>& order) const {
  require(level >= 0 && level < levels(), "level", "must be a level of the tree.");
  require(order.size() == template_.size(), "order", "must hold every template node once.");
  std::vector<char> seen(order.size(), 0);
  for (std::int32_t i : order) {
    require(i >= 0 && static_cast<std::size_t>(i) < order.size() && !seen[static_cast<std::size_t>(i)], "order",
            "must hold every template node once.");
    seen[static_cast<std::size_t>(i)] = 1;
  }
  Variants& v = *variants_;
  auto key = std::make_pair(level, order);
  {
    std::lock_guard<std::mutex> lock(v.mutex);
    if (auto it = v.built.find(key); it != v.built.end()) return it->second.get();
  }
  std::int64_t used = 0;
  {
    std::lock_guard<std::mutex> lock(budget_->mutex);
    used = budget_->used;
  }
  // Built outside the lock, so several variants can be built at once; the memory limit is checked
  // again when the result is kept.
  std::unique_ptr<Level> made;
  const std::int64_t start = used;
  try {
    made = std::make_unique<Level>(build_level(level, order, node_cap(), budget_->limit, used));
  } catch (const MemoryLimitError&) {
    // Over the limit: the caller scans the bit planes instead (same counts, slower).
  }
  const std::int64_t bytes = used - start;
  std::lock_guard<std::mutex> lock(v.mutex);
  if (auto it = v.built.find(key); it != v.built.end()) return it->second.get();  // another thread was first
  if (made) {
    std::lock_guard<std::mutex> budget_lock(budget_->mutex);
    if (budget_->used + bytes > budget_->limit) {
      made.reset();  // variants or trees kept meanwhile took the room
    } else {
      budget_->used += bytes;
    }
  }
  const Level* out = made.get();
  v.built.emplace(std::move(key), std::move(made));
  return out;
}

EventAnswer PatternTree::query_variant(const Level& variant, const std::int32_t* index, const std::uint8_t* value,
                                       int m, std::int64_t min_replicates, bool stop_when_pure, QueryScratch& sc) const {
  return query_level(variant, index, value, m, min_replicates, stop_when_pure, sc);
}

PatternTree::Level PatternTree::build_level(int level, std::vector<std::int32_t> order, std::size_t node_cap,
                                            std::int64_t memory_limit, std::int64_t& used) const {
  const std::size_t K = static_cast<std::size_t>(ti_.categories);
  const std::size_t S = K + 1;  // symbols: codes and `missing`
  const std::size_t D = template_.size();
  const std::size_t N = centres_.size();
  Level L;
  L.order = std::move(order);
  L.delta.resize(D);
  for (std::size_t i = 0; i < D; ++i) {
    const Offset& o = template_.offsets()[static_cast<std::size_t>(L.order[i])];
    L.delta[i] = ((Index{o[0]} << level) * padded_shape_[1] + (Index{o[1]} << level)) * padded_shape_[2] +
                 (Index{o[2]} << level);
  }
  const std::int64_t used_before = used;
  const std::int64_t bytes_per_node = static_cast<std::int64_t>(4 * K + 8);
  // Working memory of the build: the centre order, the groups of one depth and the next, and the
  // sorted centres kept.
  const std::int64_t work = static_cast<std::int64_t>(N * (3 * sizeof(std::uint32_t) + 2 * sizeof(std::int64_t) + 1));
  auto check_need = [&](std::int64_t need) {
    if (need > memory_limit)
      throw MemoryLimitError("Building the pattern tree of level " + std::to_string(level) + " needs more than " +
                             mib(need) + ", above the memory_limit of " + mib(memory_limit) +
                             ". Use a template with fewer nodes (max_nodes), fewer levels or a smaller "
                             "training image, or raise memory_limit.");
  };
  auto check = [&](std::size_t nodes) { check_need(used + static_cast<std::int64_t>(nodes) * bytes_per_node + work); };
  // Root.
  L.first_centre.push_back(0);
  L.counts.resize(K);
  for (std::size_t k = 0; k < K; ++k) L.counts[k] = static_cast<std::uint32_t>(root_counts_[k]);
  L.depth_start.push_back(0);
  // The centres (padded indices) in pattern order so far, and each one's symbol at the current depth:
  // one TI read per centre and depth.
  std::vector<std::int64_t> cells(centres_), tmp;
  std::vector<std::uint8_t> sym(N);
  // Groups of centres sharing the prefix of the current depth, as [start, end) in cells; a group of
  // one centre is final and dropped. While tree nodes are stored, group g of depth d is node
  // depth_first + g (every node has at least one centre); past tree_depth only the sort goes on.
  std::vector<std::uint32_t> group_begin{0}, group_end{static_cast<std::uint32_t>(N)}, next_begin, next_end;
  std::vector<std::uint32_t> group_node{0}, next_node;
  bool storing = true;
  L.tree_depth = 0;
  std::array<std::uint32_t, 256> bucket{}, pos;  // per symbol: centres, then next slot
  std::vector<std::uint32_t> bucket_counts(S * K);
  const std::uint8_t* padded = padded_.data();
  auto symbol = [&](std::int64_t c, std::int64_t delta) {
    const std::uint8_t s = padded[c + delta];
    return s == CategoricalImage::kMasked ? static_cast<std::uint8_t>(K) : s;
  };
  for (std::size_t d = 0; d < D && !group_begin.empty(); ++d) {
    const std::int64_t delta = L.delta[d];
    const std::size_t depth_end = L.first_centre.size();
    if (storing) {
      L.depth_start.push_back(static_cast<std::uint32_t>(depth_end));
      L.first_child.resize(depth_end, static_cast<std::uint32_t>(depth_end));
    }
    next_begin.clear();
    next_end.clear();
    next_node.clear();
    std::size_t stored = depth_end;  // node ids of the next depth, if stored
    for (std::size_t g = 0; g < group_begin.size(); ++g) {
      const std::uint32_t b = group_begin[g], e = group_end[g];
      std::fill(bucket.begin(), bucket.begin() + static_cast<std::ptrdiff_t>(S), 0);
      if (storing) std::fill(bucket_counts.begin(), bucket_counts.end(), 0);
      for (std::uint32_t p = b; p < e; ++p) {
        const std::int64_t c = cells[p];
        const std::uint8_t s = symbol(c, delta);
        sym[p] = s;
        bucket[s] += 1;
        if (storing) bucket_counts[s * K + padded[c]] += 1;
      }
      // Stable counting sort of the group's centres by symbol; one child per non-empty symbol.
      std::uint32_t start = b;
      if (storing) L.first_child[group_node[g]] = static_cast<std::uint32_t>(stored);
      for (std::size_t s = 0; s < S; ++s) {
        pos[s] = start - b;
        if (bucket[s] == 0) continue;
        if (storing) {
          L.first_centre.push_back(start);
          for (std::size_t k = 0; k < K; ++k) L.counts.push_back(bucket_counts[s * K + k]);
        }
        if (bucket[s] > 1 || storing) {
          next_begin.push_back(start);
          next_end.push_back(start + bucket[s]);
          next_node.push_back(static_cast<std::uint32_t>(stored));
        }
        stored += storing;
        start += bucket[s];
      }
      tmp.resize(e - b);
      for (std::uint32_t p = b; p < e; ++p) tmp[pos[sym[p]]++] = cells[p];
      std::copy(tmp.begin(), tmp.end(), cells.begin() + b);
    }
    if (storing) {
      check(L.first_centre.size());
      if (L.first_centre.size() >= (std::size_t{1} << 32) - 1)
        throw MemoryLimitError("The pattern tree of level " + std::to_string(level) +
                               " would hold more than 2**32 nodes; use a template with fewer nodes.");
      L.tree_depth = d + 1;
      // Stop storing nodes when the next depth could pass the cap (it has at most S times as many).
      if (L.first_centre.size() + next_begin.size() * S > node_cap && d + 1 < D) {
        storing = false;
        std::size_t out = 0;  // single centres need no more sorting
        for (std::size_t g = 0; g < next_begin.size(); ++g)
          if (next_end[g] - next_begin[g] > 1) {
            next_begin[out] = next_begin[g];
            next_end[out++] = next_end[g];
          }
        next_begin.resize(out);
        next_end.resize(out);
      }
    }
    group_begin.swap(next_begin);
    group_end.swap(next_end);
    group_node.swap(next_node);
  }
  const std::size_t total = L.first_centre.size();
  L.depth_start.push_back(static_cast<std::uint32_t>(total));
  // Nodes of the last stored depth have no children: their ranges are empty at the end.
  L.first_child.resize(total + 1, static_cast<std::uint32_t>(total));
  L.first_child[total] = static_cast<std::uint32_t>(total);
  L.sorted = std::move(cells);
  // Bit planes in pattern order (see Level).
  const std::size_t words = (N + 63) / 64;
  L.words = words;
  const std::size_t plane_total = D * K + K;
  const std::int64_t plane_bytes =
      static_cast<std::int64_t>((words * plane_total + 2 * planes::kPadWords) * sizeof(std::uint64_t) +
                                D * K * (2 * sizeof(std::uint32_t) + sizeof(std::int64_t)));
  check(total + static_cast<std::size_t>(plane_bytes / bytes_per_node));
  L.planes.assign(words * D * K + planes::kPadWords, 0);
  L.category.assign(words * K + planes::kPadWords, 0);
  for (std::size_t p = 0; p < N; ++p) {
    const std::int64_t c = L.sorted[p];
    const std::size_t w = p / 64;
    const std::uint64_t bit = std::uint64_t{1} << (p % 64);
    for (std::size_t i = 0; i < D; ++i) {
      const std::uint8_t v = padded[c + L.delta[i]];
      if (v != CategoricalImage::kMasked) L.planes[(i * K + v) * words + w] |= bit;
    }
    L.category[padded[c] * words + w] |= bit;
  }
  L.plane_first.assign(D * K, 0);
  L.plane_end.assign(D * K, 0);
  L.plane_count.assign(D * K, 0);
  for (std::size_t p = 0; p < D * K; ++p) {
    const std::uint64_t* plane = L.planes.data() + p * words;
    for (std::size_t w = 0; w < words; ++w) {
      if (plane[w] == 0) continue;
      if (L.plane_count[p] == 0) L.plane_first[p] = static_cast<std::uint32_t>(w);
      L.plane_end[p] = static_cast<std::uint32_t>(w + 1);
      L.plane_count[p] += std::popcount(plane[w]);
    }
  }
  if (D * K * K <= kMaxPlaneCategoryCounts) {
    const planes::Kernels& kern = planes::best();
    L.plane_category_counts.assign(D * K * K, 0);
    for (std::size_t p = 0; p < D * K; ++p)
      for (std::size_t q = 0; q < K; ++q)
        L.plane_category_counts[p * K + q] = static_cast<std::uint32_t>(
            kern.count_and(L.planes.data() + p * words + L.plane_first[p], L.category.data() + q * words + L.plane_first[p],
                           L.plane_end[p] - L.plane_first[p]));
    const std::size_t pair_entries = D * (D - 1) / 2 * K * K;
    if (pair_entries * K <= kMaxPairCounts) {
      L.pair_counts = std::vector<std::atomic<std::uint32_t>>(pair_entries * K);
      L.pair_ready = std::vector<std::atomic<std::uint8_t>>(pair_entries);
    }
  }
  // Lead answers: as many leading positions as kLeadEntries keys allow (S symbols each: absent
  // or one of the K codes); fewer than two would only repeat the planes' own counts.
  std::size_t lead = 0;
  std::uint64_t entries = 1;
  for (; lead < D && entries * S <= kLeadEntries; ++lead) entries *= S;
  if (lead >= 2) {
    L.lead_nodes = lead;
    for (std::size_t i = 0, w = 1; i < lead; ++i, w *= S) L.lead_weight.push_back(static_cast<std::uint32_t>(w));
    L.lead_answers = std::vector<std::atomic<std::uint64_t>>(entries);
  }
  L.first_centre.shrink_to_fit();
  L.counts.shrink_to_fit();
  L.first_child.shrink_to_fit();
  used = used_before + level_bytes(L);  // the estimates above were for the checks during the build
  check_need(used);
  return L;
}

std::int64_t PatternTree::node_count(int level) const {
  require(level >= 0 && level < levels(), "level",
          "must be in [0, " + std::to_string(levels() - 1) + "]; got " + std::to_string(level) + ".");
  return static_cast<std::int64_t>(levels_[static_cast<std::size_t>(level)].first_centre.size());
}

std::int64_t PatternTree::memory_bytes() const {
  std::int64_t b = static_cast<std::int64_t>(padded_.size() + centres_.size() * sizeof(std::int64_t));
  for (const auto& L : levels_) b += level_bytes(L);
  std::lock_guard<std::mutex> lock(variants_->mutex);
  for (const auto& [key, L] : variants_->built)
    if (L) b += level_bytes(*L);
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
  return query_level(levels_[static_cast<std::size_t>(level)], index, value, m, min_replicates, stop_when_pure, sc);
}

EventAnswer PatternTree::query_level(const Level& L, const std::int32_t* index, const std::uint8_t* value, int m,
                                     std::int64_t min_replicates, bool stop_when_pure, QueryScratch& sc) const {
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
  if (m == 2 && !L.pair_counts.empty()) {
    // Two informed nodes: the pair's counts (computed once per pair of positions and codes).
    const auto p0 = static_cast<std::size_t>(index[0]), p1 = static_cast<std::size_t>(index[1]);
    const std::size_t entry = ((p1 * (p1 - 1) / 2 + p0) * K + value[0]) * K + value[1];
    if (L.pair_ready[entry].load(std::memory_order_acquire) == 0) fill_pair(L, index, value, entry);
    std::int64_t total = 0;
    for (std::size_t q = 0; q < K; ++q) total += sc.counts[q] = L.pair_counts[entry * K + q].load(std::memory_order_relaxed);
    if (total >= std::max<std::int64_t>(min_replicates, 1)) {
      sc.best.swap(sc.counts);
      ans.replicates = total;
      ans.kept = 2;
      return ans;
    }
    m = 1;  // the second node dropped
  }
  if (m == 1 && !L.plane_category_counts.empty()) {
    // One informed node: its plane's counts, kept from the build (or dropped: the proportions).
    const std::size_t p = static_cast<std::size_t>(index[0]) * K + value[0];
    if (L.plane_count[p] >= std::max<std::int64_t>(min_replicates, 1)) {
      for (std::size_t q = 0; q < K; ++q) sc.best[q] = L.plane_category_counts[p * K + q];
      ans.replicates = L.plane_count[p];
      ans.kept = 1;
    }
    return ans;
  }
  if (stop_when_pure && L.lead_nodes > 0) {
    std::uint32_t key = 0;
    int lead = 0;
    for (; lead < m && static_cast<std::size_t>(index[lead]) < L.lead_nodes; ++lead)
      key += (value[lead] + 1u) * L.lead_weight[static_cast<std::size_t>(index[lead])];
    if (lead > 0) {
      std::atomic<std::uint64_t>& slot = L.lead_answers[key];
      std::uint64_t e = slot.load(std::memory_order_relaxed);
      if (e == kLeadUnknown) {
        e = lead_answer(L, index, value, lead, sc);
        slot.store(e, std::memory_order_relaxed);
      }
      // Sets only shrink as nodes are added, so a count of at least min_replicates means no node
      // would have been dropped before.
      if (e != kLeadUnresolved && lead_count(e) >= min_replicates) {
        std::fill(sc.best.begin(), sc.best.end(), 0);
        sc.best[static_cast<std::size_t>(lead_category(e))] = lead_count(e);
        ans.replicates = lead_count(e);
        ans.kept = lead_kept(e);
        ans.remembered = true;
        return ans;
      }
    }
  }
  sc.frontier.assign(1, 0);
  std::size_t depth = 0;
  const std::size_t last = static_cast<std::size_t>(index[m - 1]);
  const std::uint32_t* fc = L.first_child.data();
  const std::uint32_t* fcen = L.first_centre.data();
  const std::int64_t* sorted = L.sorted.data();
  const std::uint8_t* padded = padded_.data();
  const std::uint32_t* cnt = L.counts.data();
  // Walking on costs about frontier * remaining depth; checking the frontier's centres on the bit
  // planes costs about their number (the replicates so far) over the centres a pass checks in the
  // time of one step of the walk: about 512 with the AVX-512 kernels, measured on 2-D TIs of 10^4
  // to 6.4 * 10^5 centres and a 3-D one of 2.5 * 10^5. The same for both kernel sets, so that the
  // engine's counters (kept nodes, events finished on the planes) do not depend on the processor.
  // (A margin of 16 more steps in favour of walking, as this test had before, made a 10^4-centre
  // case 5-7 % slower and did not change a 9 * 10^4-centre one.)
  constexpr std::size_t kCentresPerStep = 512;
  auto walking_is_dearer = [&]() {
    return sc.frontier.size() * (last + 1 - depth) > static_cast<std::size_t>(ans.replicates) / kCentresPerStep;
  };
  for (int k = 0; k < m; ++k) {
    const std::size_t t = static_cast<std::size_t>(index[k]);
    // Marginalise the template nodes before the next informed one: follow every branch.
    while (depth < t) {
      if (depth == L.tree_depth || walking_is_dearer()) return check_centres(L, index, value, m, k, min_replicates, stop_when_pure, depth, ans, sc);
      sc.next.clear();
      for (std::uint32_t j : sc.frontier)
        for (std::uint32_t c = fc[j]; c < fc[j + 1]; ++c) sc.next.push_back(c);
      ans.visited += static_cast<std::int64_t>(sc.next.size());
      sc.frontier.swap(sc.next);
      ++depth;
    }
    if (depth == L.tree_depth || walking_is_dearer())
      return check_centres(L, index, value, m, k, min_replicates, stop_when_pure, depth, ans, sc);
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
  const std::uint64_t* category = L.category.data();
  const planes::Kernels& kern = planes::best();
  ans.scanned = true;
  if (k >= m) return ans;  // no informed node left: the answer stands
  fit_runs(sc, words);
  const planes::EventPlanes plane_of{planes, index, value, K, words};
  // The set to narrow: all centres when no informed node has been taken yet (the walk only
  // marginalised; then the first informed node's plane is the set after it, its extent and count
  // known), or the frontier's centres as a dense bit set over the words [lo, hi) they span.
  const std::uint64_t* start = nullptr;
  std::size_t lo = words, hi = 0;
  std::size_t n = static_cast<std::size_t>(k);
  if (k == 0) {
    const std::size_t p = static_cast<std::size_t>(index[k]) * K + value[k];
    if (L.plane_count[p] < std::max<std::int64_t>(min_replicates, 1)) return ans;
    start = plane_of[n];
    lo = L.plane_first[p];
    hi = L.plane_end[p];
    ans.visited += static_cast<std::int64_t>(N);
    ans.kept = k + 1;
    ++n;
  } else {
    for (std::uint32_t j : sc.frontier) {
      const std::uint32_t b = L.first_centre[j];
      const std::uint32_t e = j + 1 < depth_end ? L.first_centre[j + 1] : N;
      if (b >= e) continue;
      if (lo == words) lo = b / 64;
      hi = (e - 1) / 64 + 1;
    }
    if (lo >= hi) return ans;
    std::uint64_t* run = sc.third_run.data();
    std::fill(run + lo, run + hi, 0);
    for (std::uint32_t j : sc.frontier) {
      const std::uint32_t b = L.first_centre[j];
      const std::uint32_t e = j + 1 < depth_end ? L.first_centre[j + 1] : N;
      if (b >= e) continue;
      ans.visited += e - b;
      const std::uint32_t wb = b / 64, we = (e - 1) / 64;
      const std::uint64_t head = ~std::uint64_t{0} << (b % 64);
      const std::uint64_t tail = ~std::uint64_t{0} >> (63 - (e - 1) % 64);
      if (wb == we) {
        run[wb] |= head & tail;
      } else {
        run[wb] |= head;
        std::fill(run + wb + 1, run + we, ~std::uint64_t{0});
        run[we] |= tail;
      }
    }
    start = run;
  }
  // Add the informed nodes one at a time, narrowing [lo, hi) to the words still holding a match,
  // and stop when too few replicates remain (node dropping), or with stop_when_pure once one
  // category holds every match. Only totals are needed for that, so the categories are counted
  // once, for the set kept. Sets that keep few words over a wide span continue as a list of their
  // non-empty words.
  const planes::CategoryPlanes codes{category, words, K};
  const planes::Narrowed nw = kern.narrow(start, sc.run.data(), sc.next_run.data(), plane_of.from(n),
                                          static_cast<std::size_t>(m) - n, lo, hi, min_replicates, 16,
                                          stop_when_pure ? &codes : nullptr);
  ans.visited += 64 * static_cast<std::int64_t>(nw.words);  // centres, 64 at a time
  n += nw.kept;
  ans.kept = static_cast<int>(n);
  const std::uint64_t* run = nw.set;
  bool counted = n == static_cast<std::size_t>(k);  // sc.best holds the counts of the set kept
  const bool sparse = nw.sparse;
  if (sparse) {
    sc.word_index.clear();
    sc.word_alive.clear();
    for (std::size_t w = lo; w < hi; ++w)
      if (run[w] != 0) {
        sc.word_index.push_back(static_cast<std::uint32_t>(w));
        sc.word_alive.push_back(run[w]);
      }
    sc.next_index.resize(sc.word_index.size());
    sc.next_alive.resize(sc.word_alive.size());
    int passes = 0;
    for (; n < static_cast<std::size_t>(m); ++n) {
      const std::uint64_t* plane = plane_of[n];
      std::int64_t total = 0;
      const std::size_t out = planes::keep_matching(sc.word_index.data(), sc.word_alive.data(), sc.word_index.size(),
                                                    plane, sc.next_index.data(), sc.next_alive.data(), total);
      ans.visited += 64 * static_cast<std::int64_t>(sc.word_index.size());  // centres, 64 at a time
      if (total < min_replicates || total == 0) break;
      sc.word_index.swap(sc.next_index);
      sc.word_alive.swap(sc.next_alive);
      sc.word_index.resize(out);
      sc.word_alive.resize(out);
      ans.kept = static_cast<int>(n + 1);
      counted = false;
      if (stop_when_pure && (++passes % 4 == 0 || out <= 8)) {
        planes::count_categories(sc.word_index.data(), sc.word_alive.data(), out, category, words, K, sc.best.data());
        counted = true;
        int present = 0;
        for (std::size_t q = 0; q < K; ++q) present += sc.best[q] > 0;
        if (present <= 1) break;
      }
    }
    if (!counted)
      planes::count_categories(sc.word_index.data(), sc.word_alive.data(), sc.word_index.size(), category, words, K,
                               sc.best.data());
  } else if (!counted && nw.category >= 0) {
    std::fill(sc.best.begin(), sc.best.end(), 0);
    sc.best[static_cast<std::size_t>(nw.category)] = nw.count;
  } else if (!counted) {
    for (std::size_t q = 0; q < K; ++q) sc.best[q] = kern.count_and(run + lo, category + q * words + lo, hi - lo);
  }
  if (ans.kept > k) {
    ans.replicates = 0;
    for (std::size_t q = 0; q < K; ++q) ans.replicates += sc.best[q];
  }
  return ans;
}

void PatternTree::fill_pair(const Level& L, const std::int32_t* index, const std::uint8_t* value,
                            std::size_t entry) const {
  const std::size_t K = static_cast<std::size_t>(ti_.categories);
  const std::size_t words = L.words;
  const std::size_t a = static_cast<std::size_t>(index[0]) * K + value[0];
  const std::size_t b = static_cast<std::size_t>(index[1]) * K + value[1];
  const std::size_t lo = std::max(L.plane_first[a], L.plane_first[b]), hi = std::min(L.plane_end[a], L.plane_end[b]);
  const std::uint64_t* pa = L.planes.data() + a * words;
  const std::uint64_t* pb = L.planes.data() + b * words;
  for (std::size_t q = 0; q < K; ++q) {
    const std::uint64_t* c = L.category.data() + q * words;
    std::uint32_t n = 0;
    for (std::size_t w = lo; w < hi; ++w) n += static_cast<std::uint32_t>(std::popcount(pa[w] & pb[w] & c[w]));
    L.pair_counts[entry * K + q].store(n, std::memory_order_relaxed);
  }
  L.pair_ready[entry].store(1, std::memory_order_release);
}

std::uint64_t PatternTree::lead_answer(const Level& L, const std::int32_t* index, const std::uint8_t* value, int lead,
                                       QueryScratch& sc) const {
  const std::size_t K = static_cast<std::size_t>(ti_.categories);
  const std::size_t words = L.words;
  const std::size_t p = static_cast<std::size_t>(index[0]) * K + value[0];
  if (L.plane_count[p] == 0) return kLeadUnresolved;
  fit_runs(sc, words);
  const planes::Kernels& kern = planes::best();
  const planes::EventPlanes plane_of{L.planes.data(), index, value, K, words};
  const planes::CategoryPlanes codes{L.category.data(), words, K};
  std::size_t lo = L.plane_first[p], hi = L.plane_end[p];
  // The same narrowing as a query of the prefix alone (min_replicates 1, no switch to word lists),
  // so the answer is the one such a query gives.
  const planes::Narrowed nw = kern.narrow(plane_of[0], sc.run.data(), sc.next_run.data(), plane_of.from(1),
                                          static_cast<std::size_t>(lead) - 1, lo, hi, 1, words + 1, &codes);
  if (nw.category >= 0) return pack_lead_answer(nw.category, 1 + nw.kept, nw.count);
  if (1 + nw.kept < static_cast<std::size_t>(lead)) return kLeadUnresolved;  // a node emptied the set
  // Every node kept: the narrowing checks for one category only before and within groups of
  // planes, so check the set it ends with.
  int category = -1;
  std::int64_t count = 0;
  for (std::size_t q = 0; q < K; ++q) {
    const std::int64_t c = kern.count_and(nw.set + lo, L.category.data() + q * words + lo, hi - lo);
    if (c == 0) continue;
    if (category >= 0) return kLeadUnresolved;
    category = static_cast<int>(q);
    count = c;
  }
  return pack_lead_answer(category, static_cast<std::size_t>(lead), count);
}

EventAnswer PatternTree::scan(int level, const std::int32_t* index, const std::uint8_t* value, int m,
                              std::int64_t min_replicates, QueryScratch& sc, bool stop_when_pure) const {
  const Level& L = levels_[static_cast<std::size_t>(level)];
  EventAnswer ans;
  sc.best.assign(root_counts_.begin(), root_counts_.end());
  ans.replicates = static_cast<std::int64_t>(centres_.size());
  sc.frontier.assign(1, 0);
  return check_centres(L, index, value, m, 0, min_replicates, stop_when_pure, 0, ans, sc);
}

}  // namespace sl
