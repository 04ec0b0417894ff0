// Threads for the engines: a supervised run on worker threads while the calling thread polls for
// cancellation and reports progress, and a batch runner for conflict-free batches of path nodes.
//
// In a supervised run the calling thread does not compute: it wakes every `interval` to call
// `poll(done, total)`, which the bindings use to check Ctrl-C and to call a Python progress
// callback with the GIL held. When poll returns false the workers stop at their next check and
// Cancelled is thrown once all have joined, so no thread outlives the call. (A batch run with one
// worker computes on the calling thread and polls between batches.)
#pragma once

#include <algorithm>
#include <atomic>
#include <chrono>
#include <condition_variable>
#include <cstdint>
#include <exception>
#include <functional>
#include <limits>
#include <mutex>
#include <thread>
#include <vector>

#include "core/error.hpp"

namespace sl {

// Called on the calling thread with the work done so far; return false to cancel.
using Poll = std::function<bool(std::int64_t done, std::int64_t total)>;

// Shared state between the supervisor and the workers of one run.
struct WorkControl {
  std::atomic<bool> cancel{false};
  std::atomic<std::int64_t> done{0};
  std::int64_t total = 0;

  bool cancelled() const noexcept { return cancel.load(std::memory_order_relaxed); }
};

// Number of worker threads for a request: <= 0 means all hardware threads.
inline int resolve_threads(int requested) {
  if (requested > 0) return std::min(requested, 1024);
  const unsigned hw = std::thread::hardware_concurrency();
  return hw ? static_cast<int>(hw) : 1;
}

// Runs body(worker, workers) on `threads` worker threads while this thread polls. The first
// exception of any worker is rethrown after all have joined; a false poll throws Cancelled.
inline void run_supervised(int threads, const std::function<void(int, int)>& body, WorkControl& ctl,
                           const Poll& poll, std::chrono::milliseconds interval = std::chrono::milliseconds(100)) {
  threads = resolve_threads(threads);
  std::mutex m;
  std::condition_variable cv;
  int running = threads;
  std::exception_ptr error;
  std::vector<std::thread> pool;
  pool.reserve(static_cast<std::size_t>(threads));
  for (int w = 0; w < threads; ++w) {
    pool.emplace_back([&, w] {
      try {
        body(w, threads);
      } catch (...) {
        std::lock_guard<std::mutex> lk(m);
        if (!error) error = std::current_exception();
        ctl.cancel.store(true);
      }
      std::lock_guard<std::mutex> lk(m);
      --running;
      cv.notify_all();
    });
  }
  bool stopped_by_poll = false;
  {
    std::unique_lock<std::mutex> lk(m);
    while (running > 0) {
      cv.wait_for(lk, interval, [&] { return running == 0; });
      if (running == 0) break;
      lk.unlock();
      bool keep = true;
      if (poll) {
        try {
          keep = poll(ctl.done.load(), ctl.total);
        } catch (...) {
          std::lock_guard<std::mutex> g(m);
          if (!error) error = std::current_exception();
          keep = false;
        }
      }
      if (!keep && !ctl.cancelled()) {
        stopped_by_poll = true;
        ctl.cancel.store(true);
      }
      lk.lock();
    }
  }
  for (auto& t : pool) t.join();
  if (error) std::rethrow_exception(error);
  if (stopped_by_poll) throw Cancelled();
  if (poll) poll(ctl.done.load(), ctl.total);
}

// A barrier for the workers of run_batches. Batches last a few hundred microseconds, and waking a
// sleeping thread can take tens of microseconds (more on a virtual machine), so a worker that
// arrives early first spins for up to `spin` (zero when there are more workers than hardware
// threads: the worker it waits for may need this core), then sleeps. The last worker to arrive
// runs `completion` before any worker leaves.
template <class Completion>
class SpinBarrier {
 public:
  SpinBarrier(int count, Completion completion, std::chrono::microseconds spin)
      : count_(count), spin_(spin), completion_(std::move(completion)) {}

  void arrive_and_wait() {
    const std::uint32_t phase = phase_.load(std::memory_order_acquire);
    if (arrived_.fetch_add(1, std::memory_order_acq_rel) == count_ - 1) {
      completion_();
      arrived_.store(0, std::memory_order_relaxed);
      phase_.store(phase + 1, std::memory_order_release);
      phase_.notify_all();
      return;
    }
    if (spin_.count() > 0) {
      const auto until = std::chrono::steady_clock::now() + spin_;
      for (int round = 0;; ++round) {
        if (phase_.load(std::memory_order_acquire) != phase) return;
#if defined(__x86_64__) || defined(__i386__)
        __builtin_ia32_pause();
#endif
        if (round % 64 == 63 && std::chrono::steady_clock::now() > until) break;
      }
    }
    while (phase_.load(std::memory_order_acquire) == phase) phase_.wait(phase, std::memory_order_acquire);
  }

 private:
  const int count_;
  const std::chrono::microseconds spin_;
  Completion completion_;
  std::atomic<int> arrived_{0};
  std::atomic<std::uint32_t> phase_{0};
};

// Runs node_fn(worker, position) for every position of every batch, batch after batch: positions
// [starts[b], starts[b + 1]) of one batch run concurrently (they must not read each other's
// results), then after_batch(b) runs on one thread before the next batch starts. `starts` ends
// with the total count. Results are the same for any number of threads as long as node_fn only
// reads state fixed before the batch and writes its own output. With one worker the batches run
// on the calling thread, which polls between batches (at most every `interval`): starting and
// joining a thread would cost as much as simulating a small grid.
template <class NodeFn, class AfterBatch>
void run_batches(int threads, const std::vector<std::int64_t>& starts, NodeFn&& node_fn, AfterBatch&& after_batch,
                 WorkControl& ctl, const Poll& poll,
                 std::chrono::milliseconds interval = std::chrono::milliseconds(100)) {
  threads = resolve_threads(threads);
  const std::size_t batches = starts.empty() ? 0 : starts.size() - 1;
  if (batches == 0) return;
  // Cap the workers by the largest batch: more threads than nodes would only wait.
  std::int64_t widest = 1;
  for (std::size_t b = 0; b < batches; ++b) widest = std::max(widest, starts[b + 1] - starts[b]);
  threads = static_cast<int>(std::min<std::int64_t>(threads, widest));
  if (threads == 1) {
    auto polled = std::chrono::steady_clock::now();
    for (std::size_t b = 0; b < batches && !ctl.cancelled(); ++b) {
      try {
        for (std::int64_t p = starts[b]; p < starts[b + 1]; ++p) node_fn(0, p);
      } catch (...) {
        ctl.cancel.store(true);  // as on the workers' path
        throw;
      }
      after_batch(b);
      ctl.done.fetch_add(starts[b + 1] - starts[b]);
      if (!poll) continue;
      const auto now = std::chrono::steady_clock::now();
      if (now - polled < interval) continue;
      polled = now;
      if (!poll(ctl.done.load(), ctl.total)) {
        ctl.cancel.store(true);
        throw Cancelled();
      }
    }
    if (poll) poll(ctl.done.load(), ctl.total);
    return;
  }
  std::atomic<std::int64_t> next{starts[0]};
  std::size_t batch = 0;
  bool stop = false;  // written only in the barrier completion, read by all after it
  std::exception_ptr after_error;
  std::exception_ptr node_error;
  std::mutex error_mutex;
  auto on_batch_end = [&]() noexcept {
    try {
      after_batch(batch);
    } catch (...) {
      after_error = std::current_exception();
      ctl.cancel.store(true);
    }
    ctl.done.fetch_add(starts[batch + 1] - starts[batch]);
    ++batch;
    stop = ctl.cancelled() || batch >= batches;
    if (!stop) next.store(starts[batch]);
  };
  const unsigned hardware = std::thread::hardware_concurrency();
  const bool may_spin = hardware == 0 || static_cast<unsigned>(threads) <= hardware;
  SpinBarrier sync(threads, on_batch_end, std::chrono::microseconds(may_spin ? 200 : 0));
  run_supervised(
      threads,
      [&](int worker, int) {
        while (true) {
          const std::int64_t end = starts[batch + 1];
          if (!ctl.cancelled()) {
            try {
              for (std::int64_t p = next.fetch_add(1); p < end; p = next.fetch_add(1)) {
                node_fn(worker, p);
                if (ctl.cancelled()) break;
              }
            } catch (...) {
              // Keep arriving at the barrier so the other workers are not left waiting.
              std::lock_guard<std::mutex> lk(error_mutex);
              if (!node_error) node_error = std::current_exception();
              ctl.cancel.store(true);
            }
          }
          sync.arrive_and_wait();
          if (stop) break;
        }
      },
      ctl, poll, interval);
  if (node_error) std::rethrow_exception(node_error);
  if (after_error) std::rethrow_exception(after_error);
}

namespace detail {
// The position a worker of run_in_order runs (kIdle: none), on its own cache line.
struct alignas(64) OrderSlot {
  static constexpr std::int64_t kIdle = std::numeric_limits<std::int64_t>::max();
  std::atomic<std::int64_t> position{kIdle};
};
}  // namespace detail

// Runs node_fn(worker, position) for positions 0..count-1, handed out in increasing order to
// `threads` workers under run_supervised, without barriers: a position starts once every earlier
// position q with conflicts(position, q) is done, so the result is that of one worker visiting
// the positions in order (conflicts must hold for every pair of which one reads the other's
// result). Each worker shows the position it runs in a slot; positions are handed out and shown
// under one lock, so every earlier position is either done or in a slot, and a position checks
// only the other workers' slots. Progress (ctl.done) is added every 64 nodes.
template <class Conflicts, class NodeFn>
void run_in_order(int threads, std::int64_t count, Conflicts&& conflicts, NodeFn&& node_fn, WorkControl& ctl,
                  const Poll& poll, std::chrono::milliseconds interval = std::chrono::milliseconds(100)) {
  threads = static_cast<int>(std::clamp<std::int64_t>(count, 1, resolve_threads(threads)));
  using Slot = detail::OrderSlot;
  constexpr std::int64_t kIdle = Slot::kIdle;
  std::vector<Slot> slots(static_cast<std::size_t>(threads));
  std::mutex hand_out;
  std::int64_t next = 0;  // guarded by hand_out
  const unsigned hardware = std::thread::hardware_concurrency();
  const bool may_spin = hardware == 0 || static_cast<unsigned>(threads) <= hardware;
  run_supervised(
      threads,
      [&](int worker, int) {
        Slot& mine = slots[static_cast<std::size_t>(worker)];
        std::int64_t unreported = 0;
        while (!ctl.cancelled()) {
          std::int64_t p = 0;
          {
            std::lock_guard<std::mutex> lock(hand_out);
            p = next++;
            if (p < count) mine.position.store(p, std::memory_order_release);
          }
          if (p >= count) break;
          for (int other = 0; other < threads; ++other) {
            if (other == worker) continue;
            const Slot& theirs = slots[static_cast<std::size_t>(other)];
            const std::int64_t q = theirs.position.load(std::memory_order_acquire);
            if (q >= p || !conflicts(p, q)) continue;  // idle, later, or out of reach
            for (int spin = 0; theirs.position.load(std::memory_order_acquire) == q && !ctl.cancelled(); ++spin) {
#if defined(__x86_64__) || defined(__i386__)
              __builtin_ia32_pause();
#endif
              if (!may_spin || spin >= 4096) std::this_thread::yield();
            }
          }
          if (ctl.cancelled()) break;
          node_fn(worker, p);
          mine.position.store(kIdle, std::memory_order_release);  // p done, its results visible
          if (++unreported == 64) {
            ctl.done.fetch_add(unreported, std::memory_order_relaxed);
            unreported = 0;
          }
        }
        mine.position.store(kIdle, std::memory_order_release);
        ctl.done.fetch_add(unreported, std::memory_order_relaxed);
      },
      ctl, poll, interval);
}

}  // namespace sl
