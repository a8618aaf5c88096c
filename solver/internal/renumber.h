// Internal state renumbering for memory locality. A sweep reads V[next] for every entry; when
// the next states of a state have ids near its own, those reads come from cache lines the
// sweep has just used, otherwise most of them miss. Models arrive in their authors' order,
// so Solve() may solve a renumbered copy of the model and map the answer back: users never
// see the new numbering. Stateless functions on immutable models (thread-safe); the caller
// owns what they return.
#ifndef MDP_SOLVER_INTERNAL_RENUMBER_H_
#define MDP_SOLVER_INTERNAL_RENUMBER_H_

#include <cstdint>
#include <optional>
#include <span>
#include <vector>

#include "solver/model.h"
#include "solver/options.h"
#include "solver/solution.h"

namespace mdp::internal {

// Two states are near iff their ids differ by at most this much: the values of a window of
// 2 * kLocalityWindow states take 1 MiB, about half of one core's L2 cache on the machines we
// measure, leaving the rest to the streamed model arrays.
inline constexpr StateId kLocalityWindow = StateId{1} << 16;

// The automatic rule (Renumber::kAuto) renumbers iff the model has at least this many
// entries (smaller models keep V in cache whatever the order)...
inline constexpr int64_t kRenumberMinEntries = kAutoThreadsMinEntries;
// ... at least this fraction of its entries are far (FarEntryFraction) ...
inline constexpr double kRenumberMinFarFraction = 0.2;
// ... and the new order leaves at most this share of them far.
inline constexpr double kRenumberMaxFarRatio = 0.5;

// The cheap first look of the automatic rule. The order below is breadth-first (Cuthill-
// McKee): each layer of the search takes consecutive new ids, and an edge from a state to a
// state it reached spans about one layer's width of ids. A search that finds a layer of more
// than kLocalityWindow states within kProbeMaxLayers layers grew on average more than 2.7-
// fold per layer (2.74^11 = 2^16): next states spread over the whole model (random next states reach every
// state in a handful of layers), the order's layers are wide wherever most states lie, most
// entries stay far, and computing the order (seconds at 32M entries) cannot pay. Local
// structure (rings, grids, stock levels) grows by a few states per layer.
// ProbeLayers searches along entries (state -> next state only: the reverse edges would
// need a transpose of the whole model) from kProbeStarts states spread over the ids. Every
// entry is an edge of the symmetrised graph too, so a forward search from a state never
// reaches fewer states within k layers than the order's search from it.
// Measured on 1M-state rings with a share p of their entries sent to random states and the
// states shuffled: the first wide layer came at layer 19-22 (p = 0.001; the order took the
// far share from 0.85 to 0.39, and pays), 9-10 (p = 0.01; to 0.48: does not pay), 7
// (p = 0.03; 0.55), 5 (p = 0.3; 0.77); random next states: 5. Slow growth is left to the
// order itself to judge.
inline constexpr int kProbeStarts = 4;
// A search stops, narrow, after this many layers (layer 0 is its start) ...
inline constexpr int kProbeMaxLayers = 12;
// ... or once it has reached this many states: it then read at most their entries.
inline constexpr StateId kProbeMaxReached = 4 * kLocalityWindow;

// What one search of ProbeLayers saw.
struct LayerProbe {
  StateId start = 0;    // The state it started from (one with entries).
  int layers = 0;       // Layers it found, layer 0 (the start) included.
  StateId widest = 0;   // States in its widest layer (the last one may be cut short).
  StateId reached = 0;  // States it reached, the start included.
  bool wide = false;    // widest > kLocalityWindow: it stopped on finding a wide layer.
};

// One search per start: start i is the first state with entries at or after id
// (2i + 1) * states / (2 * kProbeStarts), wrapping. Empty for a model without entries.
// Reads at most kProbeMaxReached states' entries per start; temporary memory of one byte
// per state plus the searched states. Deterministic.
std::vector<LayerProbe> ProbeLayers(const Model& m);

// False iff every search of ProbeLayers(m) found a wide layer: then no breadth-first order
// keeps most entries near, and the automatic rule skips LocalityOrder. True when any search
// stayed narrow (its part of the model may be local; the searches after it are not run) or
// the model has no entries.
bool OrderCanPay(const Model& m);

// The fraction of entries whose next state is not near its state under the numbering
// `new_of_old` (empty: the model's own). The locality score; 0 for a model without entries.
double FarEntryFraction(const Model& m, std::span<const StateId> new_of_old, int threads);

// A renumbering of states: new_of_old[s] is the new id of state s, old_of_new its inverse.
struct StateOrder {
  std::vector<StateId> new_of_old;
  std::vector<StateId> old_of_new;
};

// Reverse Cuthill-McKee order of the symmetrised transition graph (s ~ s' iff some row of s
// or of s' has an entry leading to the other). Each connected component is searched
// breadth-first from its unvisited state of least degree, newly reached states in order of
// increasing degree; the whole order is then reversed. O(states + entries) time, and
// temporary memory of 8 bytes per entry plus about 40 per state (freed on return); no
// recursion. Deterministic.
StateOrder LocalityOrder(const Model& m);

// The same MDP as `m` with state s renamed new_of_old[s]: each state keeps its rows in their
// action order, entries are re-sorted by new next-state id, terminal flags, names and
// criterion data follow their states. The copy has no name index (FindState finds nothing):
// it is for solving only. REQUIRES: new_of_old is a permutation of 0..states-1.
Model PermuteStates(const Model& m, std::span<const StateId> new_of_old, int threads);

// A renumbered copy of a model and what it took.
struct RenumberedModel {
  Model model;            // The same MDP, states in `order`.
  StateOrder order;       // Relative to the original model.
  double far_before = 0;  // FarEntryFraction of the original numbering.
  double far_after = 0;   // ... and of the new one.
};

// The step at which RenumberForLocality decided, in the order it takes them.
enum class RenumberStep {
  kNotAsked,         // kOff, or a model without states.
  kTooSmall,         // kAuto: fewer than kRenumberMinEntries entries.
  kAlreadyLocal,     // kAuto: less than kRenumberMinFarFraction of the entries are far.
  kExpands,          // kAuto: OrderCanPay said no; the order was not computed.
  kOrderDidNotHelp,  // kAuto: the order was computed and left too many entries far.
  kRenumbered,       // The copy was made (kOn, or kAuto past every step).
};

// The renumbered copy Solve() should solve, or nullopt to solve `m` as it is: kOff never
// renumbers, kOn always, kAuto iff m has kRenumberMinEntries entries or more, at least
// kRenumberMinFarFraction of them are far, OrderCanPay(m), and the new order keeps at most
// kRenumberMaxFarRatio of that fraction. Sets *step (when given) to the deciding step. May
// throw std::bad_alloc.
std::optional<RenumberedModel> RenumberForLocality(const Model& m, Renumber mode, int threads,
                                                   RenumberStep* step = nullptr);

// Rewrites the per-state fields (values, best_row, action_gap) and per-row fields (q,
// optimal_row) of `s`, a solution of r.model, into the numbering of `m`, the model r was made
// from; row ids are mapped too. Scalars and bounds are numbering-free and stay.
// REQUIRES: s answers the discounted criterion (no per-state fields of other criteria).
void MapSolutionBack(const Model& m, const RenumberedModel& r, Solution& s);

}  // namespace mdp::internal

#endif  // MDP_SOLVER_INTERNAL_RENUMBER_H_
