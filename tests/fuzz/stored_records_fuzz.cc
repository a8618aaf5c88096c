// Fuzz target: what the service reads back from its store (server/model_store_codec.h,
// solution_blob.h). The store is written by the service itself, but a damaged file must give
// an error, never a crash or a read outside the record. The first byte picks the decoder.
//  - Model records: the input's header gets its payload length and both CRC-32s set to match
//    (otherwise nearly every input would stop at the checksum), then DecodeStoredModel runs.
//    A record that decodes is encoded again, and that record must decode to the same bytes;
//    its canonical document is written and the spec compiled, as loading does.
//  - Solution blobs: decoded against sizes taken from the next two bytes; one that decodes is
//    encoded again to the same bytes.
#include <zlib.h>

#include <cstddef>
#include <cstdint>
#include <cstring>
#include <string>
#include <string_view>

#include "server/canonical.h"
#include "server/model_store_codec.h"
#include "server/solution_blob.h"
#include "solver/model.h"
#include "tests/fuzz/fuzz_checks.h"

namespace {

using mdp::fuzz::Fail;

void PutU32(std::string& s, size_t at, uint32_t v) {
  for (int i = 0; i < 4; ++i) s[at + i] = static_cast<char>((v >> (8 * i)) & 0xff);
}

uint32_t Crc(const char* p, size_t n) {
  return static_cast<uint32_t>(
      crc32(crc32(0L, Z_NULL, 0), reinterpret_cast<const Bytef*>(p), static_cast<uInt>(n)));
}

void ModelRecord(std::string record) {
  if (record.size() >= mdp::server::kStoredModelHeaderBytes) {
    const uint64_t payload = record.size() - mdp::server::kStoredModelHeaderBytes;
    for (int i = 0; i < 8; ++i) record[16 + i] = static_cast<char>((payload >> (8 * i)) & 0xff);
    PutU32(record, 24, Crc(record.data() + mdp::server::kStoredModelHeaderBytes, payload));
    PutU32(record, 28, Crc(record.data(), 28));
  }
  const mdp::Result<mdp::ModelSpec> spec = mdp::server::DecodeStoredModel(record);
  if (!spec.ok()) return;
  const mdp::Result<std::string> again = mdp::server::EncodeStoredModel(*spec);
  if (!again.ok()) Fail("a decoded record does not encode: " + again.status().ToString());
  const mdp::Result<mdp::ModelSpec> back = mdp::server::DecodeStoredModel(*again);
  if (!back.ok()) Fail("a re-encoded record does not decode: " + back.status().ToString());
  const mdp::Result<std::string> third = mdp::server::EncodeStoredModel(*back);
  if (!third.ok() || *third != *again) Fail("a record's round trip changes its bytes");
  (void)mdp::server::EncodeCanonicalModel(*spec);
  (void)mdp::BuildModel(*spec);
}

void SolutionBlob(std::string_view blob, int64_t states, int64_t rows) {
  const mdp::Result<mdp::Solution> solution = mdp::server::DecodeSolutionBlob(blob, states, rows);
  if (!solution.ok()) return;
  if (static_cast<int64_t>(solution->values.size()) != states ||
      static_cast<int64_t>(solution->q.size()) != rows) {
    Fail("a decoded solution does not have the sizes it was decoded for");
  }
  const std::string again = mdp::server::EncodeSolutionBlob(*solution);
  const mdp::Result<mdp::Solution> back = mdp::server::DecodeSolutionBlob(again, states, rows);
  if (!back.ok()) Fail("a re-encoded solution does not decode: " + back.status().ToString());
  if (mdp::server::EncodeSolutionBlob(*back) != again) {
    Fail("a solution's round trip changes its bytes");
  }
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  if (size < 3) return 0;
  const std::string_view rest(reinterpret_cast<const char*>(data) + 3, size - 3);
  if (data[0] % 2 == 0) {
    ModelRecord(std::string(rest));
  } else {
    SolutionBlob(rest, data[1] % 16, data[2] % 32);
  }
  return 0;
}
