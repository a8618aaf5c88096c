// Canonical form and content id of a model. The canonical document is the model re-encoded
// in one fixed way — compact JSON, keys in sorted order, every optional field written out
// (rewards 0, terminal false), numbers in shortest round-trip form — so two documents that
// say the same thing (whitespace, key order, "0.50" vs "0.5", omitted defaults) get the same
// text and the same id. Written without building a DOM, so it scales to millions of states.
// Stateless; thread-safe.
#ifndef MDP_SERVER_CANONICAL_H_
#define MDP_SERVER_CANONICAL_H_

#include <functional>
#include <string>
#include <string_view>

#include "solver/model_spec.h"

namespace mdp::server {

// REQUIRES: `spec` passed Validate().
std::string EncodeCanonicalModel(const ModelSpec& spec);
// Hands out the canonical text of a model a piece at a time, resuming where the previous
// piece ended, so that the text never exists whole and the caller can stop between pieces
// (a slow reader) and go on later. Not thread-safe; `spec` must outlive the cursor.
class CanonicalModelCursor {
 public:
  // REQUIRES: `spec` passed Validate().
  explicit CanonicalModelCursor(const ModelSpec& spec) : spec_(spec) {}
  // Appends the next piece to `out`: whole states until `out` holds at least `piece_bytes`
  // bytes (one state may take it past that), or the rest of the text. True iff text is left.
  bool Next(std::string& out, size_t piece_bytes);

 private:
  const ModelSpec& spec_;
  StateId next_state_ = -1;  // -1: the head is not written yet.
  bool finished_ = false;
};

// The same text handed to `sink` in pieces of about `piece_bytes`, in order, so that it never
// exists whole. Stops as soon as `sink` returns false (a client that went away) and returns
// false then; true once the whole text was handed over. REQUIRES: `spec` passed Validate().
bool WriteCanonicalModelPieces(const ModelSpec& spec, size_t piece_bytes,
                               const std::function<bool(std::string_view)>& sink);

// Lower-case hex SHA-256 of `bytes`.
std::string Sha256Hex(std::string_view bytes);

// A model's id: the first 32 hex digits (128 bits) of the SHA-256 of its canonical text.
std::string ModelId(std::string_view canonical_document);
// ModelId(EncodeCanonicalModel(spec)), without holding the whole text: it is hashed in
// pieces of 1 MiB. REQUIRES: `spec` passed Validate().
std::string CanonicalModelId(const ModelSpec& spec);

// Appends `text` as a JSON string literal (quotes and escapes included).
void AppendJsonString(std::string& out, std::string_view text);
// Appends a double in shortest round-trip form; null if it is not finite.
void AppendJsonNumber(std::string& out, double value);

}  // namespace mdp::server

#endif  // MDP_SERVER_CANONICAL_H_
