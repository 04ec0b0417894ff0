// Simulation paths: the nodes of each multiple-grid level in a random order that depends only on
// (seed, level, cell), and their split into conflict-free batches for parallel simulation.
#pragma once

#include <cstdint>
#include <vector>

#include "core/grid.hpp"
#include "core/template.hpp"

namespace sl {

// Cells simulated at `level` when `coarsest` is the coarsest level: the nodes of that level that
// are not nodes of level + 1 (all nodes of the level when level == coarsest), as flat indices in
// increasing order.
std::vector<Index> level_cells(const Grid& grid, int level, int coarsest);

// Sorts cells into a random order keyed by random_bits(seed, level, cell, Stream::path); ties (of
// probability 2**-64) fall back to the cell index. The order is a pure function of its inputs.
void shuffle_path(std::vector<Index>& cells, std::uint64_t seed, int level);

// Reorders `path` into batches of nodes that cannot read each other, and returns the batch starts
// followed by path.size(). Nodes closer than `reach` + 1 level cells along every axis may read each
// other (level cells of level g are cells / 2**g; the test is by buckets of reach + 1 level cells,
// nodes of neighbouring buckets counting as close). A node goes to the batch after the last one
// holding an earlier path node close to it, so running the batches in turn, the nodes of one batch
// in any order, gives what visiting the path in order gives. Within a batch nodes keep their path
// order; batches larger than max_batch are cut into pieces. A pure function of the inputs.
std::vector<std::int64_t> conflict_free_batches(const Grid& grid, int level, const Offset& reach,
                                                std::vector<Index>& path, std::int64_t max_batch = 512);

// The starts of consecutive pieces of at most max_batch nodes of a path of `count` nodes, followed
// by count: batches for one worker, which visits the path in order.
std::vector<std::int64_t> path_pieces(std::size_t count, std::int64_t max_batch);

}  // namespace sl
