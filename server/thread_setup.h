// Thread setup: names, so that `top -H` and /proc show which thread does what, and priority.
// Long work (solve jobs, parsing a large upload) runs at a higher nice value than the threads
// that answer queries, so that a running solve takes the CPU only when the queries leave it
// idle. On the 2-core host, queries paced at about 6,000 per second beside a 2-thread solve
// had a p99 of 5.0-5.3 ms with the solve at their priority and 1.0-1.2 ms with it at nice 10
// (scripts/bench/solve_load_bench.py runs both side by side).
#ifndef MDP_SERVER_THREAD_SETUP_H_
#define MDP_SERVER_THREAD_SETUP_H_

#include "solver/status.h"

namespace mdp::server {

// Names the calling thread (at most 15 characters are kept): "mdp-http" answers requests,
// "mdp-upload" parses large ones, "mdp-solve" runs jobs; a solve's OpenMP threads inherit
// the name of the worker that started them; "mdp-warm" fills the cache after a start.
void NameThisThread(const char* name);

// Raises the calling thread's nice value by `increment` (0 to 19; the result is capped at 19).
// Linux keeps a nice value per thread, and the threads this thread starts afterwards (the
// OpenMP team of a solve included) start with it. Raising needs no privilege; kUnavailable if
// the kernel refuses all the same (a seccomp filter), and the thread keeps its priority.
Status RaiseThisThreadNiceness(int increment);

// The nice value of the calling thread.
int ThisThreadNiceness();

// A background thread's start: NameThisThread(name), then RaiseThisThreadNiceness(increment).
// If the kernel refuses the raise, the thread keeps its creator's priority (slower queries
// while it works, nothing worse); serve.cc checks that once at start (CheckThreadNiceness)
// and says so in the log.
void BecomeBackgroundThread(const char* name, int increment);

// Whether RaiseThisThreadNiceness(increment) works here: tries it on a short-lived thread of
// its own, so the caller's priority is unchanged.
Status CheckThreadNiceness(int increment);

// Time slices. Linux 6.12 and later let a thread ask its scheduler (EEVDF) for a shorter time
// slice than the default (1.4 ms on the 2-core host, as `se.slice` in
// /proc/PID/task/TID/sched shows), without privilege. A thread with a shorter
// slice has an earlier deadline, so when it wakes it can preempt the thread running on its
// CPU instead of waiting for that one's slice to end. The threads that answer queries ask for
// the shortest, so that a query that arrives while another busy thread holds the CPU waits
// less. On the 2-core host, wrk with 2 threads and 64 connections sharing both cores with the
// server: p99 1.36-1.81 ms with 0.1 ms slices against 1.89-2.28 ms with the default, at the
// same requests per second (5 rounds of 8 s, one server whose HTTP threads' slice was switched
// between runs); scripts/bench_queries.sh with BENCH_HTTP_SLICES="100 0" (a server per value,
// 3 rounds of 10 s after a warm-up) 1.71-1.88 against 2.27-3.20 ms. Beside a CPU-bound solve
// at the same priority it did little (DEVELOPERS.md): the nice value handles that case.
inline constexpr int kMinSliceMicroseconds = 100;  // The kernel's bounds on a custom slice.
inline constexpr int kMaxSliceMicroseconds = 100000;

// Asks for time slices of `microseconds` (kMinSliceMicroseconds to kMaxSliceMicroseconds)
// for the calling thread; its policy and nice value are kept. kInvalidArgument out of range;
// kUnavailable if the kernel refuses (a seccomp filter) or has no per-thread slices (before
// 6.12: it accepts the request and ignores it, which the slice it then reports shows).
Status SetThisThreadSlice(int microseconds);

// The calling thread's time slice as the kernel reports it, in microseconds (rounded down);
// 0 when the kernel reports none (before 6.12) or refuses to say.
int64_t ThisThreadSliceMicroseconds();

// Whether SetThisThreadSlice(microseconds) works here: tries it on a short-lived thread of its
// own, so the caller's slice is unchanged.
Status CheckThreadSlice(int microseconds);

// The OpenMP threads of a solve wait for each other at the end of every parallel loop, by
// spinning first and then sleeping. The runtime's default spin (300,000 rounds when neither
// variable below is set) burns the CPU a busy host's other threads need: beside 2 busy loops
// on the 2-core host, a 2-thread value iteration of a 40,000-state model took 7.3-7.7 s with
// it and 3.2-4.3 s with 5,000 rounds (1 thread: 4.2-5.2 s). Idle, the medians of 8
// alternating rounds were 1.07 s and 1.09 s (a full benchmark run's, 0.76x; noise is large
// here), and a 1,000,000-state policy iteration took 1.6-2.0 s either way.
inline constexpr char kOpenMpSpinCount[] = "5000";

// Run first in main, before any thread starts. If neither OMP_WAIT_POLICY nor GOMP_SPINCOUNT
// is set, sets GOMP_SPINCOUNT=kOpenMpSpinCount and executes this program again with the same
// arguments (same process id), because the OpenMP runtime reads them once, when it loads.
// Returns when either was set already (the operator's choice is kept) or the exec failed
// (then the runtime keeps its default).
void ExecAgainWithOpenMpSpinCount(char** argv);

}  // namespace mdp::server

#endif  // MDP_SERVER_THREAD_SETUP_H_
