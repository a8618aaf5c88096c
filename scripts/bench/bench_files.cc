#include "scripts/bench/bench_files.h"

#include <cassert>
#include <cstdint>
#include <cstdio>
#include <filesystem>
#include <memory>
#include <string_view>
#include <system_error>
#include <vector>

namespace mdp::bench {
namespace {

struct FileCloser {
  void operator()(std::FILE* f) const { std::fclose(f); }
};
using File = std::unique_ptr<std::FILE, FileCloser>;

Status OpenForWrite(const std::string& path, File& file) {
  file.reset(std::fopen(path.c_str(), "wb"));
  if (!file) return InvalidArgumentError("cannot write " + path);
  return Status::Ok();
}

Status Close(File& file, const std::string& path) {
  const bool ok = std::ferror(file.get()) == 0 && std::fclose(file.release()) == 0;
  return ok ? Status::Ok() : InternalError("write failed: " + path);
}

template <typename T>
constexpr std::string_view NpyType();
template <>
constexpr std::string_view NpyType<double>() { return "<f8"; }
template <>
constexpr std::string_view NpyType<int64_t>() { return "<i8"; }
template <>
constexpr std::string_view NpyType<int32_t>() { return "<i4"; }

// NPY format version 1.0 (NumPy's doc/neps/nep-0001-npy-format): magic, a little-endian
// uint16 header length, a Python dict literal padded with spaces to a multiple of 64 bytes
// and ended by '\n', then the raw little-endian data. x86-64 is little-endian.
template <typename T>
Status WriteNpy(const std::string& path, const T* data, int64_t count) {
  std::string header = "{'descr': '" + std::string(NpyType<T>()) +
                       "', 'fortran_order': False, 'shape': (" + std::to_string(count) + ",), }";
  const size_t unpadded = 10 + header.size() + 1;
  header.append((64 - unpadded % 64) % 64, ' ');
  header.push_back('\n');
  File f;
  MDP_RETURN_IF_ERROR(OpenForWrite(path, f));
  const uint16_t length = static_cast<uint16_t>(header.size());
  const unsigned char preamble[10] = {0x93, 'N', 'U', 'M', 'P', 'Y', 1, 0,
                                      static_cast<unsigned char>(length & 0xff),
                                      static_cast<unsigned char>(length >> 8)};
  std::fwrite(preamble, 1, sizeof preamble, f.get());
  std::fwrite(header.data(), 1, header.size(), f.get());
  std::fwrite(data, sizeof(T), static_cast<size_t>(count), f.get());
  return Close(f, path);
}

// Writes one state of an mdpserve/model@1 document (without the separating comma).
void WriteStateObjects(const ModelSpec& spec, StateId s, std::FILE* out) {
  std::fprintf(out, "{\"name\":\"%s\",\"actions\":[", spec.state_names[s].c_str());
  for (SlotId slot = spec.state_first_slot[s]; slot < spec.state_first_slot[s + 1]; ++slot) {
    std::fprintf(out, "%s{\"action\":\"%s\",\"reward\":%.17g,\"outcomes\":[",
                 slot == spec.state_first_slot[s] ? "" : ",",
                 spec.action_names[spec.slot_action[slot]].c_str(), spec.slot_reward[slot]);
    const OutcomeId begin = spec.slot_first_outcome[slot];
    for (OutcomeId o = begin; o < spec.slot_first_outcome[slot + 1]; ++o) {
      assert(spec.outcome_reward[o] == 0.0);
      std::fprintf(out, "%s{\"next\":\"%s\",\"probability\":%.17g}", o == begin ? "" : ",",
                   spec.state_names[spec.outcome_next[o]].c_str(),
                   spec.outcome_probability[o]);
    }
    std::fputs("]}", out);
  }
  std::fputs("]}", out);
}

}  // namespace

Status WriteModelArrays(const Model& m, std::span<const double> check_values, int check_sweeps,
                        const std::string& dir) {
  std::error_code ec;
  std::filesystem::create_directories(dir, ec);
  if (ec) return InvalidArgumentError("cannot create " + dir + ": " + ec.message());
  const std::string d = dir + "/";
  MDP_RETURN_IF_ERROR(WriteNpy(d + "state_row_begin.npy", m.state_row_begin_data(),
                               int64_t{m.num_states()} + 1));
  MDP_RETURN_IF_ERROR(WriteNpy(d + "row_reward.npy", m.row_reward_data(), m.num_rows()));
  MDP_RETURN_IF_ERROR(
      WriteNpy(d + "row_entry_begin.npy", m.row_entry_begin_data(), m.num_rows() + 1));
  MDP_RETURN_IF_ERROR(WriteNpy(d + "entry_next.npy", m.entry_next_data(), m.num_entries()));
  MDP_RETURN_IF_ERROR(
      WriteNpy(d + "entry_probability.npy", m.entry_probability_data(), m.num_entries()));
  MDP_RETURN_IF_ERROR(WriteNpy(d + "check_values.npy", check_values.data(),
                               static_cast<int64_t>(check_values.size())));
  File f;
  MDP_RETURN_IF_ERROR(OpenForWrite(d + "meta.json", f));
  std::fprintf(f.get(),
               "{\"discount\": %.17g, \"maximize\": %s, \"states\": %d, \"rows\": %lld, "
               "\"entries\": %lld, \"check_sweeps\": %d}\n",
               m.discount(), m.objective() == Objective::kMaximize ? "true" : "false",
               m.num_states(), static_cast<long long>(m.num_rows()),
               static_cast<long long>(m.num_entries()), check_sweeps);
  return Close(f, d + "meta.json");
}

Status WriteModelDocument(const ModelSpec& spec, DocumentEncoding encoding,
                          const std::string& path) {
  assert(encoding == DocumentEncoding::kObjects);
  (void)encoding;
  std::vector<char> buffer(1 << 20);  // Declared first: outlives the file it buffers.
  File f;
  MDP_RETURN_IF_ERROR(OpenForWrite(path, f));
  std::FILE* out = f.get();
  std::setvbuf(out, buffer.data(), _IOFBF, buffer.size());
  std::fprintf(out,
               "{\"format\":\"mdpserve/model@1\",\"name\":\"%s\",\"objective\":\"%s\","
               "\"criterion\":{\"kind\":\"discounted\",\"discount\":%.17g},\"actions\":[",
               spec.name.c_str(), spec.objective == Objective::kMaximize ? "maximize" : "minimize",
               spec.criterion.discount);
  for (size_t a = 0; a < spec.action_names.size(); ++a) {
    std::fprintf(out, "%s\"%s\"", a ? "," : "", spec.action_names[a].c_str());
  }
  std::fputs("],\"states\":[", out);
  for (StateId s = 0; s < spec.num_states(); ++s) {
    assert(!spec.terminal[s]);
    if (s > 0) std::fputc(',', out);
    WriteStateObjects(spec, s, out);
  }
  std::fputs("]}\n", out);
  return Close(f, path);
}

}  // namespace mdp::bench
