// Pattern tree: the counts of every data event of a template found in a categorical training image
// (the search-tree idea of Strebelle 2002, "Conditional simulation of complex geological structures
// using multiple-point statistics", Mathematical Geology 34(1)), one tree per multiple-grid level,
// stored as flat arrays.
//
// Counting contract. The replicates of a data event {(offset_i, value_i)} are the unmasked TI
// centres c for which every c + offset_i lies inside the TI, is unmasked and equals value_i. A centre
// whose template node falls outside the TI or on a masked cell carries the symbol `missing` there,
// which matches no value, so border centres count exactly as the contract says. Any subset of the
// template may be asked: nodes not in the event are marginalised (every branch is followed).
//
// Layout. The centres are sorted by their pattern (template node by template node, `missing` last)
// into `sorted`; a tree node at depth d stands for a prefix of the first d template nodes, and its
// centres form one contiguous range of `sorted`. Nodes are numbered breadth first, node 0 being the
// root (the empty prefix); the nodes of one depth partition `sorted` in order, and the children of
// node j are the nodes [first_child[j], first_child[j + 1]). Per node: K uint32 counts (centres per
// centre category), a uint32 child start and a uint32 centre start: 4 K + 8 bytes. A node's symbol
// is read from the TI at its first centre, so it needs no storage.
//
// Query orders. The trees of `levels` take the template nodes in template order (nearest first).
// For staged simulation a tree can also be asked for a variant of a level that takes the nodes in
// another order (`ordered_variant`); its centres are sorted by that order. Every tree keeps its
// nodes only down to the depth where they would pass `node_cap()` (`tree_depth`); deeper queries
// finish on the bit planes, which cost bits per centre rather than nodes per pattern.
//
// Queries walk the tree depth by depth, following every child at template nodes outside the event
// (marginalisation) and only the matching child at informed ones. When the frontier grows so wide
// that walking on would cost more than checking its centres, the remaining informed nodes are
// checked on the bit planes for the frontier's centres (tree/bit_planes.hpp); both ways give the
// same exact counts.
#pragma once

#include <atomic>
#include <cstdint>
#include <memory>
#include <mutex>
#include <vector>

#include "core/grid.hpp"
#include "core/template.hpp"

namespace sl {

// A categorical training image: codes 0..K-1, kMasked for no data.
struct CategoricalImage {
  static constexpr std::uint8_t kMasked = 255;
  Ijk shape{1, 1, 1};
  std::vector<std::uint8_t> codes;  // C order, size shape[0] * shape[1] * shape[2]
  int categories = 0;                // K
};

// Conditional probability of the centre category given a data event, after node dropping.
struct EventAnswer {
  std::int64_t replicates = 0;  // centres matching the kept nodes
  int kept = 0;                 // informed nodes kept (a prefix, in template order, of those asked)
  bool scanned = false;         // finished by checking centres on the TI (the cheaper way there)
  bool remembered = false;      // answered from the level's lead answers (see Level::lead_answers)
  std::int64_t visited = 0;     // tree nodes plus TI centres looked at
};

// Per-thread buffers for queries, reused so the hot loop does not allocate.
struct QueryScratch {
  std::vector<std::uint32_t> frontier, next;
  std::vector<std::int64_t> counts, best;            // K each
  std::vector<std::uint32_t> word_index, next_index;  // candidate words of the bit planes
  std::vector<std::uint64_t> word_alive, next_alive;  // their centres still matching
  std::vector<std::uint64_t> run, next_run, third_run;  // dense bit sets, one word per 64 centres
};

// Bytes that one or more trees may hold together (their trees, bit planes and ordered variants).
struct MemoryBudget {
  explicit MemoryBudget(std::int64_t limit_bytes) : limit(limit_bytes) {}
  std::mutex mutex;
  const std::int64_t limit;
  std::int64_t used = 0;  // guarded by mutex
};

class PatternTree {
 public:
  // Builds one tree per level 0..levels-1 by scanning the TI with the template times 2**level.
  // Throws ParameterError for an unusable TI or template and MemoryLimitError when the trees would
  // need more than memory_limit bytes.
  PatternTree(CategoricalImage ti, const Template& tpl, int levels, std::int64_t memory_limit);
  // The same, drawing on a budget shared with other trees (e.g. one training image turned for
  // several rotation classes): all of them together stay within budget->limit.
  PatternTree(CategoricalImage ti, const Template& tpl, int levels, std::shared_ptr<MemoryBudget> budget);
  const std::shared_ptr<MemoryBudget>& budget() const noexcept { return budget_; }

  int levels() const noexcept { return static_cast<int>(levels_.size()); }
  int categories() const noexcept { return ti_.categories; }
  const Template& base_template() const noexcept { return template_; }
  std::size_t template_size() const noexcept { return template_.size(); }
  std::int64_t node_count(int level) const;
  // Bytes of the trees, their bit planes and the ordered variants built so far.
  std::int64_t memory_bytes() const;
  // Bytes of the per-node arrays (counts, child and centre starts) over all levels.
  std::int64_t node_bytes() const noexcept;
  // Centre counts per category over the whole TI (the root's counts).
  const std::vector<std::int64_t>& category_counts() const noexcept { return root_counts_; }
  std::int64_t centre_count() const noexcept { return static_cast<std::int64_t>(centres_.size()); }

  // Counts of the centre category (written to scratch.best, K entries) for the event whose informed
  // template indices `index` (strictly increasing) take the codes `value`, dropping informed nodes
  // from the last while fewer than min_replicates centres match. With stop_when_pure, the search ends
  // once one category holds every match (the probabilities cannot change any more; replicates and
  // kept then describe the node where it stopped, which on the bit planes may be up to three nodes
  // past the first with one category: they are checked once per group of planes). An event whose
  // leading nodes alone leave one category is answered from the level's lead answers.
  EventAnswer query(int level, const std::int32_t* index, const std::uint8_t* value, int m,
                    std::int64_t min_replicates, bool stop_when_pure, QueryScratch& scratch) const;

  // Same answer as query, by checking every centre on the bit planes (the reference path). Here
  // `index` may come in any order: nodes are added, and dropped from the last, in the order given.
  EventAnswer scan(int level, const std::int32_t* index, const std::uint8_t* value, int m,
                   std::int64_t min_replicates, QueryScratch& scratch, bool stop_when_pure = false) const;

  struct Level;
  // The variant of `level` that takes the template nodes in `order` (a permutation of 0..D-1), built
  // on first request and kept while the tree lives; thread-safe (requests from several threads build
  // in parallel). Returns nullptr when building it would pass the memory limit (the caller then
  // answers the same events with `scan`, nodes in the same order: same counts, slower).
  const Level* ordered_variant(int level, const std::vector<std::int32_t>& order) const;
  // query() on a variant: `index` holds strictly increasing positions in the variant's order.
  EventAnswer query_variant(const Level& variant, const std::int32_t* index, const std::uint8_t* value, int m,
                            std::int64_t min_replicates, bool stop_when_pure, QueryScratch& scratch) const;

  // Layout of one level's tree (public so that variants can be handed out; read it through the
  // methods above).
  struct Level {
    std::vector<std::int32_t> order;          // template index at each query position
    std::size_t tree_depth = 0;               // depths stored as tree nodes (all D for a full tree)
    std::vector<std::uint32_t> first_child;   // per node + sentinel
    std::vector<std::uint32_t> first_centre;  // per node: start of its range in `sorted`
    std::vector<std::uint32_t> counts;        // K per node
    std::vector<std::uint32_t> depth_start;   // first node of each depth 0..D, then the node count
    std::vector<std::int64_t> sorted;         // padded index of each centre, in pattern order
    std::vector<std::int64_t> delta;          // padded flat offset of each query position
    // Bit planes over `sorted`, one bit per centre, `words` 64-bit words per plane: plane i * K + v
    // is "the node at query position i holds code v"; category plane q is "the centre holds
    // code q".
    std::vector<std::uint64_t> planes, category;
    std::size_t words = 0;
    // Per plane: its first and past-the-last non-zero word, and its centres.
    std::vector<std::uint32_t> plane_first, plane_end;
    std::vector<std::int64_t> plane_count;
    // Per plane, its centres per category (K each): the answer to an event of one informed node.
    // Empty when D * K * K passes kMaxPlaneCategoryCounts (many categories).
    std::vector<std::uint32_t> plane_category_counts;
    // Pair answers: per pair of positions p0 < p1 and their codes v0, v1 (entry
    // ((p1 (p1 - 1) / 2 + p0) K + v0) K + v1), the centres per category matching both (K counts),
    // filled as events of two informed nodes ask (any thread; pair_ready[entry] is set after the
    // counts, which are a pure function of the entry). Empty when the counts would pass
    // kMaxPairCounts, or without plane_category_counts (a dropped second node falls back on them).
    mutable std::vector<std::atomic<std::uint32_t>> pair_counts;
    mutable std::vector<std::atomic<std::uint8_t>> pair_ready;
    // Lead answers, for queries that stop once one category is left. An event's informed nodes
    // among the first `lead_nodes` query positions are a prefix of it; when that prefix alone
    // already leaves one category, so does the whole event, with the same answer. Filled as
    // events ask (any thread; each entry is a pure function of its key), by key
    // sum (value + 1) * lead_weight[position] over that prefix. Entry: 0 = not known yet, 1 = the
    // prefix leaves several categories (or none), else the category, the nodes kept and their
    // centres, packed (pattern_tree.cpp). lead_nodes = 0: none kept (too many categories).
    std::size_t lead_nodes = 0;
    std::vector<std::uint32_t> lead_weight;
    mutable std::vector<std::atomic<std::uint64_t>> lead_answers;
  };

 private:
  // Builds the tree of `level` for the query order `order`, storing tree nodes while there are at most
  // `node_cap` of them; adds its bytes to `used` and throws MemoryLimitError past memory_limit.
  Level build_level(int level, std::vector<std::int32_t> order, std::size_t node_cap, std::int64_t memory_limit,
                    std::int64_t& used) const;
  // Tree nodes stored per level at most; deeper depths are answered on the bit planes.
  std::size_t node_cap() const;
  EventAnswer query_level(const Level& L, const std::int32_t* index, const std::uint8_t* value, int m,
                          std::int64_t min_replicates, bool stop_when_pure, QueryScratch& scratch) const;
  // Fills the pair answer `entry` of the event index/value[0, 2) (see Level::pair_counts).
  void fill_pair(const Level& L, const std::int32_t* index, const std::uint8_t* value, std::size_t entry) const;
  // The lead answer of the event prefix index/value[0, lead) (its nodes all among the first
  // lead_nodes positions), computed on the bit planes.
  std::uint64_t lead_answer(const Level& L, const std::int32_t* index, const std::uint8_t* value, int lead,
                            QueryScratch& sc) const;
  // Finishes a query by checking informed nodes k.. on the TI for the centres of `frontier`
  // (nodes at one depth); `ans` and scratch.best hold the answer for the first k nodes.
  EventAnswer check_centres(const Level& L, const std::int32_t* index, const std::uint8_t* value, int m, int k,
                            std::int64_t min_replicates, bool stop_when_pure, std::size_t depth, EventAnswer ans,
                            QueryScratch& sc) const;

  CategoricalImage ti_;
  Template template_;
  Ijk pad_{0, 0, 0};
  Ijk padded_shape_{1, 1, 1};
  std::vector<std::uint8_t> padded_;       // TI with a masked border, so lookups need no bounds test
  std::vector<std::int64_t> centres_;      // padded flat index of every unmasked TI cell
  std::vector<std::int64_t> root_counts_;  // per category
  std::vector<Level> levels_;
  std::shared_ptr<MemoryBudget> budget_;
  // Ordered variants, built on request.
  struct Variants;
  std::shared_ptr<Variants> variants_;
};

// Half of the physical memory: the default limit for building trees.
std::int64_t default_memory_limit();

}  // namespace sl
