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

// Reorders `path` into batches in which no two nodes lie within `reach` (level cells, per axis) of
// each other, and returns the batch starts followed by path.size(). Nodes that conflict with the
// batch being formed are deferred to the next batch in their order, so the result is a pure
// function of the inputs (not of the thread count). Level cells of level g are cells / 2**g.
std::vector<std::int64_t> conflict_free_batches(const Grid& grid, int level, const Offset& reach,
                                                std::vector<Index>& path, std::int64_t max_batch = 512);

// About the most nodes a conflict-free batch of `level` can hold: a node blocks its bucket and the
// neighbouring ones, and random picks pack about one node per four buckets. A max_batch above it
// hardly makes batches larger but widens the window of candidates each batch looks at
// (4 * max_batch), which costs time; the window also decides which nodes share a batch, so the
// path order (and so a realization) depends on max_batch.
std::int64_t batch_capacity(const Grid& grid, int level, const Offset& reach);

}  // namespace sl
