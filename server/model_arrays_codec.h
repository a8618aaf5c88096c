// The compact (arrays) encoding of the model document, format "mdpserve/model-arrays@1"
// (api-schema/model-arrays.schema.json; api-schema/README.md, "Compact (arrays) encoding").
// The header members are those of the object encoding; states, state actions and outcomes are
// parallel arrays of names, indices and numbers. It decodes into the same ModelSpec as the
// object encoding, so one model has one canonical document and one id in either encoding, and
// Validate() checks it with each finding's pointer mapped into the arrays ("/probability/123").
// Parsed with simdjson's On-Demand API. Stateless; thread-safe.
#ifndef MDP_SERVER_MODEL_ARRAYS_CODEC_H_
#define MDP_SERVER_MODEL_ARRAYS_CODEC_H_

#include <string_view>

#include "server/model_codec.h"

namespace mdp::server {

inline constexpr std::string_view kModelArraysFormat = "mdpserve/model-arrays@1";

// True iff `text` is a JSON object whose top-level `format` member is a string naming the
// arrays encoding, of any version ("mdpserve/model-arrays@..."). Reads the text only up to that
// member, skipping the values before it; false for anything else, malformed text included.
bool IsArraysModelDocument(std::string_view text);

// DecodeModel for the arrays encoding: decodes, validates and compiles, reporting every problem
// (up to limits.max_errors) with an RFC 6901 pointer into the arrays document.
// `released` as for DecodeModel.
ModelDecodeResult DecodeArraysModel(std::string_view text, const DecodeLimits& limits = {},
                                    const TextReleased& released = nullptr);

// DecodeModelSpec for the arrays encoding: the spec as written plus the decoder's own findings
// (types, names, lengths, indices, caps); Validate()'s findings are not included. The spec is
// only complete when no error concerns the shape of the arrays.
SpecDecodeResult DecodeArraysModelSpec(std::string_view text, const DecodeLimits& limits = {});

}  // namespace mdp::server

#endif  // MDP_SERVER_MODEL_ARRAYS_CODEC_H_
