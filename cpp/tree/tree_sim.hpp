// Sequential simulation with a pattern tree over multiple grids, conditioned to hard data and
// soft probabilities, run in conflict-free batches on worker threads.
#pragma once

#include <cstdint>
#include <vector>

#include "core/grid.hpp"
#include "core/pool.hpp"
#include "tree/pattern_tree.hpp"

namespace sl {

struct TreeSimOptions {
  std::uint64_t seed = 0;
  int threads = 0;                 // <= 0: all cores
  int max_conditioning = 0;        // informed nodes used per event, nearest first; <= 0: all
  std::int64_t min_replicates = 1;
  // Soft data: `soft_sources` arrays of N * K probabilities (cell-major, K per cell), NaN = none.
  std::vector<const double*> soft;
  // tau[0] weighs the TI-derived probability, tau[1 + s] soft source s.
  std::vector<double> tau;
  // Target proportions (K) and steering strength in [0, 1]; empty target = none.
  std::vector<double> target;
  double steering = 0;
  std::int64_t max_batch = 256;
};

struct TreeSimStats {
  std::vector<std::int64_t> simulated;       // nodes simulated per level
  std::vector<double> mean_informed;         // informed template nodes per event, per level
  std::vector<double> mean_kept;             // used after node dropping (or one category left), per level
  std::vector<std::int64_t> scans;           // events answered by a TI scan, per level
  std::vector<std::int64_t> remembered;      // events answered from the lead answers, per level
  std::vector<std::int64_t> relocated;       // hard data moved to a coarse node, per level
  std::vector<double> mean_visited;          // tree nodes or TI centres looked at per event, per level
  std::vector<double> seconds;               // wall time per level
};

// Simulates a realization on `grid` with one pattern tree per zone: `zone` holds grid.size()
// indices into `trees` (empty: every cell uses trees[0]). All trees share K and the number of
// levels; a node reads its neighbours whatever their zone, so zones see each other's values.
// (Rotation and affinity are zones too: the Python layer builds one tree per class from the TI
// turned and stretched accordingly.)
// `hard` holds grid.size() codes, -1 = unknown (may be empty). Returns grid.size() codes.
// Throws Cancelled when poll returns false.
std::vector<std::int16_t> simulate_trees(const std::vector<const PatternTree*>& trees, const std::vector<std::uint8_t>& zone,
                                         const Grid& grid, const std::vector<std::int16_t>& hard,
                                         const TreeSimOptions& options, const Poll& poll, TreeSimStats* stats);

// One tree for the whole grid, no geometry.
std::vector<std::int16_t> simulate_tree(const PatternTree& tree, const Grid& grid, const std::vector<std::int16_t>& hard,
                                        const TreeSimOptions& options, const Poll& poll, TreeSimStats* stats);

}  // namespace sl
