// The stored form of a model: a versioned little-endian binary record of a ModelSpec, so the
// store keeps a model of millions of state actions in 12 to 21 bytes per outcome instead of
// its canonical JSON text (about 75 bytes per outcome, over SQLite's 1e9-byte value limit at
// 1M states x 4 actions x 8 outcomes). The round trip is lossless: every double keeps its
// bit pattern, every string its bytes. The model id is still the hash of the canonical text
// (canonical.h); this form is only how the bytes are kept. Layout, version 1:
//
//   header, 32 bytes:
//     0  u8[8]  magic 89 4D 44 50 4D 4F 44 0A ("\x89MDPMOD\n"; never the first byte of JSON)
//     8  u32    version (1)
//     12 u32    flags (0; a reader refuses any bit it does not know)
//     16 u64    payload bytes P; the record is exactly 32 + P bytes
//     24 u32    CRC-32 of the payload (zlib's crc32: the polynomial of gzip and PNG)
//     28 u32    CRC-32 of header bytes 0..27
//   payload:
//     i64 S states, i64 A catalogue actions, i64 R state actions, i64 O outcomes,
//     i64 T terminal values (0 or S)
//     u8 objective (0 maximize, 1 minimize), u8 criterion (0 discounted, 1 average,
//     2 finite_horizon, 3 total), f64 discount, i64 horizon
//     text name, text description, text reward_unit, text[A] action names, text[S] state names
//     u8[S] terminal (0 or 1), packed[S] state actions of each state,
//     packed[R] catalogue action of each state action, column[R] reward of each state action,
//     packed[R] outcomes of each state action,
//     packed[O] next state of each outcome, column[O] probability, column[O] reward,
//     column[T] terminal values
//   text = u32 n, then n bytes. packed[n] = u8 width w (1 to 4), then n unsigned integers of
//   w bytes each (the writer picks the fewest bytes that hold the largest). column[n] = u8
//   form, then form 0: f64[n] as written; form 1: one f64 that every entry holds, bit for bit
//   (e.g. probabilities all 1/8, or outcome rewards all 0).
//
// Records written before this form hold the canonical JSON text; IsStoredModelText() tells
// the two apart. Stateless; thread-safe. Results are owned by the caller.
#ifndef MDP_SERVER_MODEL_STORE_CODEC_H_
#define MDP_SERVER_MODEL_STORE_CODEC_H_

#include <cstddef>
#include <string>
#include <string_view>

#include "solver/model_spec.h"
#include "solver/status.h"

namespace mdp::server {

inline constexpr size_t kStoredModelHeaderBytes = 32;

// The record of `spec`. REQUIRES: the arrays of `spec` agree in size (as after Validate()).
// kInvalidArgument if a name or the description is 4 GiB or longer;
// kResourceExhausted if the record cannot be allocated.
Result<std::string> EncodeStoredModel(const ModelSpec& spec);

// True iff `record` is the JSON text of a record written before the binary form (it starts
// with '{', as every canonical document does).
bool IsStoredModelText(std::string_view record);

// The spec in a binary record. Treats `record` as untrusted: kInternal, naming what is wrong,
// if it is truncated, of an unknown version, fails its checksums or describes an impossible
// spec (offsets out of order, indices out of range). Never reads outside `record`, and sizes
// are checked against the record's length before anything is allocated.
Result<ModelSpec> DecodeStoredModel(std::string_view record);

}  // namespace mdp::server

#endif  // MDP_SERVER_MODEL_STORE_CODEC_H_
