// Direct sampling (Mariethoz, Renard & Straubhaar 2010, "The Direct Sampling method to perform
// multiple-point geostatistical simulations", Water Resources Research 46, W11536): each node copies
// the value of a training-image (TI) location whose neighbourhood is close enough to the node's own,
// with no probability model in between.
//
// Distances (all in [0, 1]):
//  * continuous variable: root mean square of the lag differences, each difference divided by the
//    TI's range of that variable (values arrive normalised to [0, 1] by that range) and clamped to 1;
//    the mean is weighted by the lag weights. L2 rather than L1: a single badly matching neighbour
//    counts more than several slightly off ones, which keeps sharp features (edges, extremes) in place,
//    and the squared sum needs no branch or abs in the kernel;
//  * categorical variable: weighted fraction of neighbours whose category differs;
//  * several variables: the mean of the per-variable distances weighted by the variable weights,
//    over the variables that have at least one neighbour at the node.
// A lag that falls on a masked or outside-the-TI location counts as a full mismatch (1).
//
// Scan: candidates are the TI cells in a fixed strided order (see TrainingImage) starting at a random
// cell (a pure function of (seed, node)), wrapping around. The first candidate with distance
// <= accept_distance is taken;
// after scan_fraction of the TI the best one seen is taken (the first of equals). A candidate must be
// informed in every variable the node needs; when none of the scanned fraction is, the first one
// after it that is gets taken. Kernels evaluate 16 consecutive candidates at once: the TI is stored so
// that the values one lag reads for consecutive candidates are contiguous, so the inner loop is a
// plain vector loop over candidates (not over neighbours), and a block stops early, every 12 lags,
// once none of its candidates can beat the best seen. Categorical variables whose codes fit a byte
// are also stored as bytes: nodes with only such variables are scanned 64 candidates at a time,
// by exact mismatch counts when every lag weighs 1 (evaluate_wide) and otherwise by a lower bound
// that decides which blocks evaluate_block must compute (screen_wide); the choices are the same.
#pragma once

#include <array>
#include <cstdint>
#include <vector>

#include "core/grid.hpp"
#include "core/pool.hpp"
#include "core/template.hpp"

namespace sl::direct {

enum class Kind : std::uint8_t { continuous = 0, categorical = 1 };

// Candidates evaluated together by the kernels.
inline constexpr int kLanes = 16;
// Candidates evaluated together by the byte kernel of categorical-only nodes (one AVX-512 register
// of byte codes, two AVX2 or four SSE registers).
inline constexpr int kWideLanes = 64;
// Largest category code stored as a byte; a TI variable whose codes all fit gets a byte copy.
inline constexpr int kMaxByteCode = 253;
// Byte of a masked TI cell, and the byte a node value no byte code can equal is turned into.
inline constexpr std::uint8_t kMaskedByte = 255;
inline constexpr std::uint8_t kForeignByte = 254;
// Most lags of one variable the byte kernel takes (mismatches are counted in int8 lanes).
inline constexpr int kMaxByteLags = 127;
// Largest number of variables (one bit each in the per-cell informed mask).
inline constexpr int kMaxVariables = 32;
// Value stored for a masked continuous TI cell: far outside [0, 1], so the clamped difference is 1.
inline constexpr float kMaskedContinuous = 1.0e4f;
// Value stored for a masked categorical TI cell: never equal to a category code (codes are >= 0).
inline constexpr float kMaskedCategory = -1.0f;

// A multivariate TI in the layout the scan reads.
//
// Padding: the TI is padded by `reach` masked cells on each side, so every lag from a real cell lands
// on stored memory and the kernels never test bounds. Positions p index the padded array in C order.
//
// Strided scan order: candidates are visited at a stride s = (2 r + 1) * (axis stride) along the
// fastest axis whose reach r > 0 (s = 2 rx + 1 for a TI that varies along x), so consecutive
// candidates share no lag cell. Taking the first acceptable candidate of a scan in plain flat order
// favours candidates that follow a non-matching one, and neighbourhoods of adjacent candidates
// overlap, which biases the copied values (measured on a 3-state Markov chain, random path, 4
// neighbours: transition error 0.05 with flat order, 0.008 with a random order, 0.012-0.039 with
// this strided order). To keep the 16 candidates of a block in contiguous memory,
// the padded array is stored transposed by phase: position p = phase + k * s lives at slot
// phase * K + k, with K = ceil(T / s). The scan runs through the slots in order.
class TrainingImage {
 public:
  // `values[v]` holds shape[0]*shape[1]*shape[2] floats in C order: continuous values normalised by the
  // TI range (NaN = masked), category codes as floats (negative or NaN = masked). `reach` is the
  // largest |lag| per axis the scan will read.
  TrainingImage(const Ijk& shape, const std::vector<const float*>& values, const std::vector<Kind>& kinds,
                const Offset& reach);

  const Ijk& shape() const noexcept { return shape_; }
  Index size() const noexcept { return shape_[0] * shape_[1] * shape_[2]; }
  int variables() const noexcept { return static_cast<int>(kinds_.size()); }
  Kind kind(int v) const noexcept { return kinds_[static_cast<std::size_t>(v)]; }
  const Offset& reach() const noexcept { return reach_; }
  // Scan stride s (in padded positions) and slots per phase K.
  std::int64_t stride() const noexcept { return stride_; }
  std::int64_t phase_length() const noexcept { return phase_length_; }
  // Offset between two padded positions `lag` apart.
  std::int64_t padded_delta(const Offset& lag) const noexcept {
    return (std::int64_t{lag[0]} * padded_[1] + lag[1]) * padded_[2] + lag[2];
  }
  // Padded position of the real cell with flat index i.
  std::int64_t padded_index(Index i) const noexcept;
  // Slot of padded position p, and the inverse.
  std::int64_t slot(std::int64_t p) const noexcept { return (p % stride_) * phase_length_ + p / stride_; }
  std::int64_t position(std::int64_t slot) const noexcept {
    return slot / phase_length_ + (slot % phase_length_) * stride_;
  }
  // Flat index of the real cell at a slot, or -1 for a padding slot.
  Index real_index(std::int64_t slot) const noexcept;
  // Slot offset, from any slot of phase `phase`, of the position `delta` = q * s + r (0 <= r < s) away.
  std::int64_t phase_delta(std::int64_t q, std::int64_t r, std::int64_t phase) const noexcept {
    const std::int64_t t = phase + r;
    return t >= stride_ ? (t - stride_ - phase) * phase_length_ + q + 1 : r * phase_length_ + q;
  }
  // Data by slot (slots -margin .. s*K + margin are readable); masked cells hold the sentinels.
  const float* data(int v) const noexcept { return values_[static_cast<std::size_t>(v)].data() + margin_; }
  // Category codes as bytes by slot (same slots as `data`; kMaskedByte where masked), or null when the
  // variable is continuous or holds a code above kMaxByteCode.
  const std::uint8_t* codes(int v) const noexcept {
    const auto& c = codes_[static_cast<std::size_t>(v)];
    return c.empty() ? nullptr : c.data() + margin_;
  }
  const std::uint32_t* informed() const noexcept { return informed_.data() + margin_; }
  // Number of real cells at slots [0, e), for e in [0, s*K].
  const std::uint32_t* real_before() const noexcept { return real_before_.data(); }
  float value_at(int v, std::int64_t p) const noexcept { return data(v)[slot(p)]; }
  // Number of real cells informed in every variable of `need` (bit v = variable v).
  Index count_informed(std::uint32_t need) const noexcept;

 private:
  Ijk shape_{};
  Offset reach_{};
  Ijk padded_{};
  std::int64_t stride_ = 1;
  std::int64_t phase_length_ = 1;
  std::int64_t margin_ = 0;
  std::vector<Kind> kinds_;
  std::vector<std::vector<float>> values_;  // by slot, with `margin_` sentinel slots at both ends
  std::vector<std::vector<std::uint8_t>> codes_;  // byte copies of categorical variables (or empty)
  std::vector<std::uint32_t> informed_;     // by slot, bit v set when variable v is informed
  std::vector<std::uint32_t> real_before_;
};

enum class PathKind : std::uint8_t { random = 0, sweep = 1 };

struct Params {
  std::int32_t neighbors = 30;       // n nearest informed nodes per variable
  double accept_distance = 0.05;     // accept the first candidate at or below this distance
  double scan_fraction = 0.3;        // fraction of the TI scanned before the best seen is taken
  std::vector<Offset> search;        // search window, nearest first (Template::ellipsoid order)
  std::vector<double> weights;       // per variable, positive
  double lag_power = 0.0;            // lag weight (1 + |lag|)**-lag_power, |lag| in cells
  PathKind path = PathKind::random;  // random path (batch-ordered), or one sweep in flat order
  std::uint64_t seed = 0;
  int threads = 0;                   // <= 0: all hardware threads
};

// Engine counters of one run.
struct Stats {
  std::int64_t nodes = 0;        // nodes simulated
  std::int64_t candidates = 0;   // TI candidates looked at (all lanes of all blocks scanned)
  std::int64_t comparisons = 0;  // neighbour comparisons made (lane x lag)
  std::int64_t accepted = 0;     // nodes that stopped at a candidate <= accept_distance
  std::int64_t exact = 0;        // of those, nodes whose accepted distance was exactly 0
  std::int64_t waits = 0;        // times a node had to wait for an earlier node still in progress
  double wait_seconds = 0;       // wall time the workers spent in those waits
  double distance_sum = 0;       // sum over nodes of the distance of the copied candidate
  double seconds = 0;            // wall time of the simulation proper
  double setup_seconds = 0;      // wall time before the workers start (checks, path order, batches): one thread
  double cpu_seconds = 0;        // CPU time of the worker threads (thread CPU clocks; 0 if unavailable)
  int threads = 0;               // worker threads used
};

// Local geometry (rotation and affinity): the lag h from a node to a grid neighbour is compared with
// the TI lag rint(M h) (rounded half to even), M the 3x3 matrix (row-major, axes z, y, x) of the
// node's class. M maps grid lags into the TI's frame: the inverse of the turn-and-stretch that takes
// TI structures to the grid's. Empty: every lag is compared as it is.
struct Geometry {
  std::vector<double> matrices;             // 9 per class
  const std::int32_t* cls = nullptr;        // class of every grid cell (grid.size() entries)
};

// Simulates every grid node at which some non-auxiliary variable is unknown (NaN in `state`).
// Scheduling: the random path is shuffled (counter-based keys) and reordered by
// conflict_free_batches with the search reach, then workers take nodes in that order; a node waits
// only for the earlier nodes it reads (a done flag per cell), so the result equals that of one
// thread walking the path, for any thread count, and no barrier stalls all workers when the system
// pauses one. The sweep path runs on one thread.
// `state[v]` holds grid.size() floats in the TI's normalised units, NaN where unknown; auxiliary
// variables must be fully informed. Writes into `state` the copied values and into `source` (grid.size()
// entries) the flat TI index each node copied from, -1 where nothing was simulated.
Stats simulate(const TrainingImage& ti, const Grid& grid, const std::vector<float*>& state,
               const std::vector<bool>& auxiliary, const Params& params, std::int64_t* source, WorkControl& ctl,
               const Poll& poll);

// Zones: zone z of the grid copies from tis[z] with params[z] (neighbours, thresholds, search window,
// weights, lag power); path, seed and threads come from params[0]. `zone` holds the zone of
// every grid cell (null: all zone 0). Nodes read their neighbours whatever their zone, so borders see
// both sides; `source` holds indices into the node's own zone TI. All TIs hold the same variables
// and kinds, in one set of normalised units.
Stats simulate_zones(const std::vector<const TrainingImage*>& tis, const std::vector<Params>& params,
                     const std::int32_t* zone, const Geometry& geometry, const Grid& grid,
                     const std::vector<float*>& state, const std::vector<bool>& auxiliary, std::int64_t* source,
                     WorkControl& ctl, const Poll& poll);

namespace detail {

// The lags of one node for one variable: slot offsets for the current scan phase, the padded offset
// split as q * stride + r, node values and lag weights.
struct LagSet {
  std::vector<std::int64_t> delta;
  std::vector<std::int64_t> q;
  std::vector<std::int64_t> r;
  std::vector<float> value;
  std::vector<float> weight;
  std::vector<std::uint8_t> code;  // node values as bytes (kForeignByte when no byte code equals them)
  // Weights as integers for screen_wide: floor(weight / unit), unit = weight_sum / 32767, so that
  // unit * (sum of the integers of the mismatched lags) is at most the weighted mismatch sum.
  std::vector<std::int16_t> iweight;
  float unit = 0;
  double weight_sum = 0;
  int size = 0;
};

// What a block evaluation needs about one node: the variables that have neighbours there, in order.
struct NodeView {
  const std::uint32_t* informed = nullptr;  // the TI's informed masks by slot
  std::uint32_t need = 0;                   // variables a candidate must be informed in
  int count = 0;                            // entries used below
  std::array<const float*, kMaxVariables> data{};
  std::array<const LagSet*, kMaxVariables> lags{};
  std::array<float, kMaxVariables> share{};      // variable weight / sum of the weights used
  std::array<float, kMaxVariables> inv_share{};  // 1 / share
  std::array<float, kMaxVariables> sum{};        // sum of the lag weights
  std::array<bool, kMaxVariables> categorical{};
  // Byte codes of a categorical variable (TrainingImage::codes; null otherwise), with the node
  // values in LagSet::code. evaluate_block reads them instead of the floats (same sums).
  std::array<const std::uint8_t*, kMaxVariables> codes{};
  // Every variable used has byte codes, lags weighing 1 and at most kMaxByteLags lags: a mismatch
  // count is then the float kernel's sum exactly, and the scan uses evaluate_wide.
  bool bytes = false;
  // Every variable used has byte codes but some lags weigh other than 1: the scan screens 64
  // candidates at a time with screen_wide and evaluates exactly only blocks that may hold a winner.
  bool screen = false;
};

// Distances of the kLanes candidates at slots p, p + 1, ...: +inf for lanes >= `lanes` and
// for candidates not informed in `need`. Returns false (leaving `out` undefined) when the block was
// abandoned because no candidate can get below `best`. Adds the comparisons made to `comparisons`.
bool evaluate_block(const NodeView& node, std::int64_t p, int lanes, float best, float* out,
                    std::int64_t& comparisons);

// The same for the kWideLanes candidates at slots p, p + 1, ... of a node whose variables all have byte
// codes (node.bytes): category codes compared kWideLanes per vector value, mismatches counted in
// integers. Same distances as evaluate_block for every lane; the early exit needs all kWideLanes
// lanes out of reach.
bool evaluate_wide(const NodeView& node, std::int64_t p, int lanes, float best, float* out,
                   std::int64_t& comparisons);

// Lower bounds of evaluate_block's distances for the kWideLanes candidates at slots p, p + 1, ...
// of a node whose variables all have byte codes (weighted lags allowed): mismatches summed with
// LagSet::iweight in int16 lanes, scaled down by 1e-3 beyond the float kernel's rounding; +inf for
// invalid lanes. Returns false when every lane's bound exceeds `best` (a finite best).
bool screen_wide(const NodeView& node, std::int64_t p, int lanes, float best, float* out,
                 std::int64_t& comparisons);

// First scan candidate of a node: floor(u * n) with u the node's draw on the start stream.
Index scan_start(std::uint64_t seed, Index cell, Index n) noexcept;

}  // namespace detail

}  // namespace sl::direct
