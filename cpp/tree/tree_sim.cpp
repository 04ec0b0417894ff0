#include "tree/tree_sim.hpp"

#include <algorithm>
#include <array>
#include <atomic>
#include <chrono>
#include <cmath>
#include <string>

#include "core/error.hpp"
#include "core/path.hpp"
#include "core/random.hpp"
#include "merge/tau.hpp"
#include "tree/event_gather.hpp"

namespace sl {

namespace {

// Nearest node of level g to cell c (half-way ties go to the lower node), kept inside the grid.
Ijk nearest_level_node(const Grid& grid, const Ijk& c, int level) {
  const Index s = Grid::level_step(level);
  Ijk out{};
  for (int a = 0; a < 3; ++a) {
    const Index q = (c[a] + (s - 1) / 2) / s;
    out[a] = std::min(q, grid.level_extent(level, a) - 1) * s;
  }
  return out;
}

// Staged refinement of a multiple-grid level (in the spirit of the sub-grids of Strebelle &
// Cavelius 2014, Mathematical Geosciences 46(2); recalled from memory). A cell simulated at level g < coarsest has a parity
// class p (bit a set when its level-g coordinate along axis a is odd; p = 0 are nodes of level g + 1).
// The classes are simulated one after the other, in kStageOrder, each on its own random path; the
// level's own nodes released by relocated hard data (class 0) come last. A template node o of a cell
// of class p lands on class (p + o) mod 2, so which nodes are informed when the stage starts is known
// in advance: the coarse nodes and those of earlier stages. Their queries use a tree that takes those
// nodes first, so the walk follows one branch instead of marginalising the uninformed ones.
constexpr std::array<int, 8> kStageOrder{1, 2, 4, 3, 5, 6, 7, 0};

int stage_rank(int parity) {
  for (int r = 0; r < 8; ++r)
    if (kStageOrder[static_cast<std::size_t>(r)] == parity) return r;
  return 8;
}

int parity_of(const Offset& o) { return (o[0] & 1) << 2 | (o[1] & 1) << 1 | (o[2] & 1); }

// Query order for cells of class `parity`: template nodes informed at the stage's start, then the
// class's own nodes (informed as the stage goes), then nodes of later stages; nearest first in each.
std::vector<std::int32_t> stage_order(const Template& tpl, int parity) {
  std::vector<std::int32_t> order;
  const int rank = stage_rank(parity);
  for (int group = 0; group < 3; ++group)
    for (std::size_t i = 0; i < tpl.size(); ++i) {
      const int q = parity_of(tpl.offsets()[i]) ^ parity;
      const int g = (q == 0 || stage_rank(q) < rank) ? 0 : q == parity ? 1 : 2;
      if (g == group) order.push_back(static_cast<std::int32_t>(i));
    }
  return order;
}

struct Worker {
  QueryScratch scratch;
  std::vector<std::int32_t> index;
  std::vector<std::uint8_t> value;
  std::vector<double> probs, sources, merged;
  std::int64_t informed = 0, kept = 0, scans = 0, remembered = 0, visited = 0;
};

}  // namespace

std::vector<std::int16_t> simulate_tree(const PatternTree& tree, const Grid& grid, const std::vector<std::int16_t>& hard,
                                        const TreeSimOptions& opt, const Poll& poll, TreeSimStats* stats) {
  return simulate_trees({&tree}, {}, grid, hard, opt, poll, stats);
}

std::vector<std::int16_t> simulate_trees(const std::vector<const PatternTree*>& trees, const std::vector<std::uint8_t>& zone,
                                         const Grid& grid, const std::vector<std::int16_t>& hard,
                                         const TreeSimOptions& opt, const Poll& poll, TreeSimStats* stats) {
  require(!trees.empty() && trees.size() <= 255, "trees", "must hold between 1 and 255 pattern trees.");
  const PatternTree& tree = *trees[0];
  for (const PatternTree* t : trees) {
    require(t->categories() == tree.categories(), "trees", "must all have the same number of categories.");
    require(t->levels() == tree.levels(), "trees", "must all have the same number of levels.");
  }

  const int K = tree.categories();
  const std::size_t Ks = static_cast<std::size_t>(K);
  const Index N = grid.size();
  const int levels = tree.levels();
  std::size_t D = 0;
  for (const PatternTree* t : trees) D = std::max(D, t->template_size());
  require(zone.empty() || static_cast<Index>(zone.size()) == N, "zones", "must have the grid's shape.");
  for (std::uint8_t z : zone) require(z < trees.size(), "zones", "holds a zone without a training image.");
  auto tree_of = [&](Index cell) -> const PatternTree& {
    return zone.empty() ? tree : *trees[zone[static_cast<std::size_t>(cell)]];
  };
  require(hard.empty() || static_cast<Index>(hard.size()) == N, "hard", "must have the grid's shape.");
  require(opt.min_replicates >= 1, "min_replicates", "must be at least 1.");
  require(opt.tau.size() == opt.soft.size() + 1, "tau", "must hold one weight for the TI and one per soft source.");
  require(opt.target.empty() || static_cast<int>(opt.target.size()) == K, "target_proportions",
          "must hold one proportion per category.");
  require(opt.steering >= 0 && opt.steering <= 1, "steering", "must be in [0, 1].");
  require(opt.soft.size() <= 32, "soft", "must hold at most 32 sources.");

  // One spare entry past the last cell: the vector event gather reads 4 bytes per node.
  std::vector<std::int16_t> sim(static_cast<std::size_t>(N) + 1, -1);
  std::vector<std::int64_t> counts(Ks, 0);  // informed cells per category (hard + simulated)
  if (!hard.empty()) {
    for (Index i = 0; i < N; ++i) {
      const std::int16_t h = hard[static_cast<std::size_t>(i)];
      if (h < 0) continue;
      require(h < K && tree_of(i).category_counts()[static_cast<std::size_t>(h)] > 0, "hard",
              "holds code " + std::to_string(h) + ", which the training image of its zone does not contain.");
      sim[static_cast<std::size_t>(i)] = h;
      counts[static_cast<std::size_t>(h)] += 1;
    }
  }
  // Prior of the tau model, per zone: the target proportions when given, else the zone's TI's.
  std::vector<double> priors(Ks * trees.size());
  for (std::size_t t = 0; t < trees.size(); ++t) {
    const auto& ti_counts = trees[t]->category_counts();
    double total = 0;
    for (std::size_t k = 0; k < Ks; ++k) total += static_cast<double>(ti_counts[k]);
    for (std::size_t k = 0; k < Ks; ++k)
      priors[t * Ks + k] = opt.target.empty() ? static_cast<double>(ti_counts[k]) / total : opt.target[k];
  }
  // Batches must keep apart nodes that can read each other: the widest template, per axis.
  Offset reach{0, 0, 0};
  for (const PatternTree* t : trees) {
    const Offset r = t->base_template().reach();
    for (int a = 0; a < 3; ++a) reach[a] = std::max(reach[a], r[a]);
  }
  // Steering gain: s / (1 - s), capped so that full steering stays finite.
  const double gain = opt.target.empty() ? 0.0 : std::min(50.0, opt.steering / std::max(1e-12, 1.0 - opt.steering));
  const int threads = resolve_threads(opt.threads);
  std::vector<Worker> workers(static_cast<std::size_t>(threads));
  for (auto& w : workers) {
    w.index.resize(D + EventGather::kPad);
    w.value.resize(D + EventGather::kPad);
    w.probs.resize(Ks);
    w.merged.resize(Ks);
    w.sources.resize(Ks * (1 + opt.soft.size()));
  }
  const int cap = opt.max_conditioning > 0 ? opt.max_conditioning : static_cast<int>(D);
  if (stats) *stats = TreeSimStats{std::vector<std::int64_t>(static_cast<std::size_t>(levels), 0),
                                   std::vector<double>(static_cast<std::size_t>(levels), 0.0),
                                   std::vector<double>(static_cast<std::size_t>(levels), 0.0),
                                   std::vector<std::int64_t>(static_cast<std::size_t>(levels), 0),
                                   std::vector<std::int64_t>(static_cast<std::size_t>(levels), 0),
                                   std::vector<std::int64_t>(static_cast<std::size_t>(levels), 0),
                                   std::vector<double>(static_cast<std::size_t>(levels), 0.0),
                                   std::vector<double>(static_cast<std::size_t>(levels), 0.0)};

  // Per (tree, parity class) at the current level: the ordered variant to query and its node order.
  // An empty order: the level's own tree, nodes in template order. An order without a variant
  // (over memory_limit): the same events answered by scanning the bit planes, so results never
  // depend on which variants fit.
  struct StageQuery {
    const PatternTree::Level* variant = nullptr;
    std::vector<std::int32_t> order;     // template index at each query position
    std::vector<std::int32_t> position;  // query position of each template index
  };
  std::vector<StageQuery> stage_query(trees.size() * 8);
  int current_step_shift = 0;
  auto parity_of_cell = [&](Index cell) {
    const Ijk c = grid.cell(cell);
    return static_cast<int>(((c[0] >> current_step_shift) & 1) << 2 | ((c[1] >> current_step_shift) & 1) << 1 |
                            ((c[2] >> current_step_shift) & 1));
  };

  WorkControl ctl;
  ctl.total = N;
  std::vector<Index> released;  // nodes that held relocated hard data at the previous level
  for (int level = levels - 1; level >= 0; --level) {
    const Index step = Grid::level_step(level);
    current_step_shift = level;
    // Hard data off this level's nodes are moved to the nearest free node so that the coarse
    // structure sees them (Strebelle 2002); they are taken back once the level is done.
    std::vector<Index> relocated;
    if (level > 0 && !hard.empty()) {
      for (Index i = 0; i < N; ++i) {
        const std::int16_t h = hard[static_cast<std::size_t>(i)];
        if (h < 0) continue;
        const Ijk c = grid.cell(i);
        if (Grid::on_level(c, level)) continue;
        const Index target = grid.index(nearest_level_node(grid, c, level));
        if (sim[static_cast<std::size_t>(target)] >= 0) continue;
        sim[static_cast<std::size_t>(target)] = h;
        relocated.push_back(target);
      }
    }
    std::vector<Index> cells = level_cells(grid, level, levels - 1);
    cells.insert(cells.end(), released.begin(), released.end());
    cells.erase(std::remove_if(cells.begin(), cells.end(), [&](Index c) { return sim[static_cast<std::size_t>(c)] >= 0; }),
                cells.end());
    // One stage per parity class at levels with a coarser one (see kStageOrder), else one stage.
    const bool staged = level < levels - 1;
    std::array<std::vector<Index>, 8> stage_cells;
    if (staged) {
      for (Index cell : cells) stage_cells[static_cast<std::size_t>(parity_of_cell(cell))].push_back(cell);
    } else {
      stage_cells[0].swap(cells);
    }
    std::vector<Index> path;
    std::fill(stage_query.begin(), stage_query.end(), StageQuery{});
    for (int p : kStageOrder) {
      std::vector<Index>& part = stage_cells[static_cast<std::size_t>(p)];
      if (part.empty()) continue;
      if (!std::is_sorted(part.begin(), part.end())) std::sort(part.begin(), part.end());  // released cells came last
      shuffle_path(part, opt.seed, level);
      if (path.empty()) {
        path.swap(part);
      } else {
        path.insert(path.end(), part.begin(), part.end());
      }
      if (!staged) continue;
      // The class's cells query trees that take the nodes informed at its stage's start first.
      for (std::size_t t = 0; t < trees.size(); ++t) {
        std::vector<std::int32_t> order = stage_order(trees[t]->base_template(), p);
        bool identity = true;
        for (std::size_t i = 0; i < order.size(); ++i) identity = identity && order[i] == static_cast<std::int32_t>(i);
        if (identity) continue;
        StageQuery& q = stage_query[t * 8 + static_cast<std::size_t>(p)];
        q.position.assign(order.size(), 0);
        for (std::size_t i = 0; i < order.size(); ++i) q.position[static_cast<std::size_t>(order[i])] = static_cast<std::int32_t>(i);
        q.order = std::move(order);
      }
    }
    // The realization is that of one worker visiting the path in order. Steering reads the
    // proportions as they stand after each batch of nodes that cannot read each other
    // (conflict_free_batches, which leaves that result), so with steering every thread count runs
    // those batches, with a barrier after each. Without it, one worker takes the path in pieces
    // (only to poll between them), and several take its nodes in order, each node first waiting
    // for the earlier nodes in reach still running (`in_order`, run_in_order): no barriers, so
    // coarse levels, whose batches hold few nodes, run in parallel too.
    const bool in_order = gain == 0 && threads > 1;
    const std::vector<std::int64_t> starts = in_order  ? std::vector<std::int64_t>{}
                                             : gain > 0 ? conflict_free_batches(grid, level, reach, path, opt.max_batch)
                                                        : path_pieces(path.size(), opt.max_batch);
    // Build (or find) the ordered trees of this level, one per worker at a time.
    std::vector<std::size_t> wanted;
    for (std::size_t i = 0; i < stage_query.size(); ++i)
      if (!stage_query[i].order.empty()) wanted.push_back(i);
    if (!wanted.empty()) {
      std::atomic<std::size_t> next{0};
      WorkControl build_ctl;
      const int builders = std::min<int>(threads, static_cast<int>(wanted.size()));
      run_supervised(
          builders,
          [&](int, int) {
            for (std::size_t j; !build_ctl.cancelled() && (j = next.fetch_add(1)) < wanted.size();) {
              StageQuery& q = stage_query[wanted[j]];
              q.variant = trees[wanted[j] / 8]->ordered_variant(level, q.order);
            }
          },
          build_ctl, [&](std::int64_t, std::int64_t) { return !poll || poll(ctl.done.load(), ctl.total); });
    }
    // Preparing a level of a large grid takes a moment: give Ctrl-C a chance before running it.
    if (poll && !poll(ctl.done.load(), ctl.total)) throw Cancelled();
    // Each tree's template at this level, for reading data events.
    std::vector<EventGather> gathers;
    for (const PatternTree* t : trees) gathers.emplace_back(grid, t->base_template().offsets(), step);
    std::vector<std::int64_t> snapshot(counts);  // proportions seen by one batch
    std::int64_t informed_total = 0;
    for (auto c : counts) informed_total += c;

    const CellBits draw_bits(opt.seed, static_cast<std::uint32_t>(level), Stream::draw);
    auto node = [&](int wid, std::int64_t pos) {
      Worker& w = workers[static_cast<std::size_t>(wid)];
      const Index cell = path[static_cast<std::size_t>(pos)];
      const Ijk c = grid.cell(cell);
      const PatternTree& t = tree_of(cell);
      const std::size_t zone_id = zone.empty() ? 0 : zone[static_cast<std::size_t>(cell)];
      const StageQuery& sq = stage_query[zone_id * 8 + static_cast<std::size_t>(staged ? parity_of_cell(cell) : 0)];
      // Data event: the informed template nodes nearest first (template order), up to the cap on
      // conditioning nodes.
      const int m = gathers[zone_id].gather(sim.data(), cell, c, cap, w.index.data(), w.value.data());
      // A staged class queries its nodes in stage order (positions, increasing): insertion sort, as
      // events are short and mostly in order already.
      if (!sq.order.empty()) {
        for (int a = 0; a < m; ++a) {
          const std::int32_t rank = sq.position[static_cast<std::size_t>(w.index[static_cast<std::size_t>(a)])];
          const std::uint8_t val = w.value[static_cast<std::size_t>(a)];
          int b = a;
          for (; b > 0 && w.index[static_cast<std::size_t>(b - 1)] > rank; --b) {
            w.index[static_cast<std::size_t>(b)] = w.index[static_cast<std::size_t>(b - 1)];
            w.value[static_cast<std::size_t>(b)] = w.value[static_cast<std::size_t>(b - 1)];
          }
          w.index[static_cast<std::size_t>(b)] = rank;
          w.value[static_cast<std::size_t>(b)] = val;
        }
        // Without its ordered tree, the same nodes in the same order go to the bit planes.
        if (!sq.variant)
          for (int a = 0; a < m; ++a)
            w.index[static_cast<std::size_t>(a)] = sq.order[static_cast<std::size_t>(w.index[static_cast<std::size_t>(a)])];
      }
      const double* prior = priors.data() + zone_id * Ks;
      const EventAnswer ans =
          sq.variant       ? t.query_variant(*sq.variant, w.index.data(), w.value.data(), m, opt.min_replicates, true, w.scratch)
          : !sq.order.empty() ? t.scan(level, w.index.data(), w.value.data(), m, opt.min_replicates, w.scratch, true)
                              : t.query(level, w.index.data(), w.value.data(), m, opt.min_replicates, true, w.scratch);
      w.informed += m;
      w.kept += ans.kept;
      w.scans += ans.scanned;
      w.remembered += ans.remembered;
      w.visited += ans.visited;
      // One category left and nothing to merge with or steer: the draw could only pick it (its
      // uniform is a function of the cell alone, so skipping it changes no other draw).
      if (opt.soft.empty() && gain == 0) {
        int only = -1;
        for (int k = 0; k < K; ++k)
          if (w.scratch.best[static_cast<std::size_t>(k)] > 0) only = only < 0 ? k : K;
        if (only >= 0 && only < K) {
          std::atomic_ref<std::int16_t>(sim[static_cast<std::size_t>(cell)]).store(static_cast<std::int16_t>(only), std::memory_order_release);
          return;
        }
      }
      double total = 0;
      for (std::size_t k = 0; k < Ks; ++k) total += static_cast<double>(w.scratch.best[k]);
      for (std::size_t k = 0; k < Ks; ++k) w.probs[k] = static_cast<double>(w.scratch.best[k]) / total;
      // Soft data by the tau model.
      std::size_t n_src = 1;
      bool any_soft = false;
      for (std::size_t k = 0; k < Ks; ++k) w.sources[k] = w.probs[k];
      for (const double* s : opt.soft) {
        const double* p = s + static_cast<std::size_t>(cell) * Ks;
        if (std::isnan(p[0])) continue;
        for (std::size_t k = 0; k < Ks; ++k) w.sources[n_src * Ks + k] = p[k];
        any_soft = true;
        ++n_src;
      }
      if (any_soft) {
        // tau of the sources actually present at this cell
        double tau_here[64];
        std::size_t present = 0;
        tau_here[present++] = opt.tau[0];
        for (std::size_t s = 0; s < opt.soft.size(); ++s)
          if (!std::isnan(opt.soft[s][static_cast<std::size_t>(cell) * Ks])) tau_here[present++] = opt.tau[1 + s];
        tau_merge(prior, w.sources.data(), tau_here, n_src, Ks, w.merged.data());
        w.probs.swap(w.merged);
      }
      // Steering toward the target proportions.
      if (gain > 0 && informed_total > 0) {
        double sum = 0;
        for (std::size_t k = 0; k < Ks; ++k) {
          const double current = static_cast<double>(snapshot[k]) / static_cast<double>(informed_total);
          w.probs[k] = std::max(0.0, w.probs[k] + gain * (opt.target[k] - current));
          sum += w.probs[k];
        }
        if (sum > 0) {
          for (std::size_t k = 0; k < Ks; ++k) w.probs[k] /= sum;
        } else {
          for (std::size_t k = 0; k < Ks; ++k) w.probs[k] = opt.target[k];
        }
      }
      // Draw the category.
      const double u = to_unit(draw_bits(static_cast<std::uint64_t>(cell)));
      double acc = 0;
      int pick = -1, last_positive = 0;
      for (int k = 0; k < K; ++k) {
        const double p = w.probs[static_cast<std::size_t>(k)];
        if (p > 0) last_positive = k;
        acc += p;
        if (u < acc && p > 0) {
          pick = k;
          break;
        }
      }
      if (pick < 0) pick = last_positive;  // rounding left u above the running sum
      // Release: a worker waiting for this node (in_order) then sees the code and what led to it.
      std::atomic_ref<std::int16_t>(sim[static_cast<std::size_t>(cell)]).store(static_cast<std::int16_t>(pick), std::memory_order_release);
    };
    auto after_batch = [&](std::size_t b) {
      if (ctl.cancelled()) return;  // the batch may be unfinished; the run is being abandoned
      for (auto p = starts[b]; p < starts[b + 1]; ++p) {
        counts[static_cast<std::size_t>(sim[static_cast<std::size_t>(path[static_cast<std::size_t>(p)])])] += 1;
        ++informed_total;
      }
      snapshot = counts;
    };
    for (auto& w : workers) w.informed = w.kept = w.scans = w.remembered = w.visited = 0;
    const auto t0 = std::chrono::steady_clock::now();
    if (in_order) {
      // Nodes within the template's reach of each other (per axis, in cells of this level) may
      // read each other; the same test as the batches'.
      auto conflicts = [&](std::int64_t p, std::int64_t q) {
        const Ijk a = grid.cell(path[static_cast<std::size_t>(p)]), b = grid.cell(path[static_cast<std::size_t>(q)]);
        bool near = true;
        for (int k = 0; k < 3; ++k) near = near && std::abs(a[k] - b[k]) <= Index{reach[k]} * step;
        return near;
      };
      run_in_order(threads, static_cast<std::int64_t>(path.size()), conflicts, node, ctl, poll);
      if (ctl.cancelled()) throw Cancelled();
      for (Index cell : path) counts[static_cast<std::size_t>(sim[static_cast<std::size_t>(cell)])] += 1;
    } else {
      run_batches(threads, starts, node, after_batch, ctl, poll);
    }
    const double seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    if (stats) {
      const auto L = static_cast<std::size_t>(level);
      std::int64_t inf = 0, kept = 0, scans = 0, remembered = 0, visited = 0;
      for (auto& w : workers) {
        inf += w.informed;
        kept += w.kept;
        scans += w.scans;
        remembered += w.remembered;
        visited += w.visited;
      }
      stats->mean_visited[L] = static_cast<double>(visited) / std::max<double>(1.0, static_cast<double>(path.size()));
      stats->seconds[L] = seconds;
      const double n = std::max<double>(1.0, static_cast<double>(path.size()));
      stats->simulated[L] = static_cast<std::int64_t>(path.size());
      stats->mean_informed[L] = static_cast<double>(inf) / n;
      stats->mean_kept[L] = static_cast<double>(kept) / n;
      stats->scans[L] = scans;
      stats->remembered[L] = remembered;
      stats->relocated[L] = static_cast<std::int64_t>(relocated.size());
    }
    // Take relocated hard data back; those nodes are simulated at the next finer level.
    for (Index r : relocated) sim[static_cast<std::size_t>(r)] = -1;
    released.swap(relocated);
  }
  sim.pop_back();  // the spare entry
  return sim;
}

}  // namespace sl
