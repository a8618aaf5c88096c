#include "server/model_store_codec.h"

#include <zlib.h>

#include <algorithm>
#include <bit>
#include <cassert>
#include <cstdint>
#include <cstring>
#include <limits>
#include <new>
#include <type_traits>
#include <utility>
#include <vector>

#include "server/byte_io.h"

namespace mdp::server {
namespace {

// The layout is little-endian and the codec copies arrays as they lie in memory; a
// big-endian port would swap bytes in Put/Get.
static_assert(std::endian::native == std::endian::little, "the stored model is little-endian");

constexpr unsigned char kMagic[8] = {0x89, 'M', 'D', 'P', 'M', 'O', 'D', '\n'};
constexpr uint32_t kVersion = 1;
constexpr size_t kCountsBytes = 5 * 8 + 2 + 8 + 8;  // S A R O T, objective, criterion, f64, i64.
// A payload over 2^48 bytes (256 TiB) is not a model anyone stored; refusing it first keeps
// the size arithmetic below far from overflow.
constexpr uint64_t kMaxPayloadBytes = uint64_t{1} << 48;

enum ColumnForm : uint8_t { kColumnAsWritten = 0, kColumnConstant = 1 };

// Stable codes (the enums' order is not a storage format).
constexpr CriterionKind kCriterionCodes[] = {CriterionKind::kDiscounted, CriterionKind::kAverage,
                                             CriterionKind::kFiniteHorizon,
                                             CriterionKind::kTotal};

uint8_t CriterionCode(CriterionKind kind) {
  for (uint8_t i = 0; i < 4; ++i) {
    if (kCriterionCodes[i] == kind) return i;
  }
  return 0;
}

// zlib's crc32 takes a uInt length: feed it in pieces so any size works.
uint32_t Crc32(std::string_view bytes) {
  uLong crc = crc32(0L, Z_NULL, 0);
  constexpr size_t kPiece = size_t{1} << 30;
  while (!bytes.empty()) {
    const size_t n = std::min(bytes.size(), kPiece);
    crc = crc32(crc, reinterpret_cast<const Bytef*>(bytes.data()), static_cast<uInt>(n));
    bytes.remove_prefix(n);
  }
  return static_cast<uint32_t>(crc);
}

bool SameBits(double a, double b) { return std::memcmp(&a, &b, sizeof a) == 0; }

bool IsConstant(const std::vector<double>& column) {
  if (column.size() < 2) return false;
  for (double x : column) {
    if (!SameBits(x, column.front())) return false;
  }
  return true;
}

class Writer : public ByteWriter {
 public:
  explicit Writer(size_t capacity) { Reserve(capacity); }
  void PutText(const std::string& text) {
    Put(static_cast<uint32_t>(text.size()));
    out_ += text;
  }
  void PutColumn(const std::vector<double>& column) {
    if (IsConstant(column)) {
      Put(static_cast<uint8_t>(kColumnConstant));
      Put(column.front());
    } else {
      Put(static_cast<uint8_t>(kColumnAsWritten));
      PutArray(column);
    }
  }
  // n unsigned values get(0), ..., get(n - 1), each in `width` bytes.
  template <typename Get>
  void PutPacked(size_t n, int width, Get&& get) {
    Put(static_cast<uint8_t>(width));
    const size_t start = out_.size();
    out_.resize(start + n * static_cast<size_t>(width));
    char* p = out_.data() + start;
    for (size_t i = 0; i < n; ++i, p += width) {
      const uint32_t value = get(i);
      std::memcpy(p, &value, static_cast<size_t>(width));  // The low bytes: little-endian.
    }
  }
  std::string& out() { return out_; }
};

// The fewest bytes (1 to 4) that hold `largest`.
int WidthFor(uint64_t largest) {
  return largest < (1u << 8) ? 1 : largest < (1u << 16) ? 2 : largest < (1u << 24) ? 3 : 4;
}

template <typename T>
int IndexWidth(const std::vector<T>& values) {
  uint64_t largest = 0;
  for (T v : values) largest = std::max<uint64_t>(largest, static_cast<uint64_t>(v));
  return WidthFor(largest);
}

// Counts of a CSR offsets array (its entries' differences); REQUIRES non-decreasing offsets
// whose differences fit 32 bits (the caps on actions per state and outcomes per state action
// are far below).
int CountWidth(const std::vector<int64_t>& offsets) {
  uint64_t largest = 0;
  for (size_t i = 1; i < offsets.size(); ++i) {
    largest = std::max<uint64_t>(largest, static_cast<uint64_t>(offsets[i] - offsets[i - 1]));
  }
  return WidthFor(largest);
}

void PutIndices(const std::vector<int32_t>& values, Writer& w) {
  w.PutPacked(values.size(), IndexWidth(values),
              [&](size_t i) { return static_cast<uint32_t>(values[i]); });
}

void PutCounts(const std::vector<int64_t>& offsets, Writer& w) {
  w.PutPacked(offsets.empty() ? 0 : offsets.size() - 1, CountWidth(offsets),
              [&](size_t i) { return static_cast<uint32_t>(offsets[i + 1] - offsets[i]); });
}

size_t TextBytes(const std::string& text) { return 4 + text.size(); }
size_t ColumnBytes(const std::vector<double>& column) {
  return 1 + (IsConstant(column) ? sizeof(double) : column.size() * sizeof(double));
}

size_t PayloadBytes(const ModelSpec& spec) {
  size_t n = kCountsBytes + TextBytes(spec.name) + TextBytes(spec.description) +
             TextBytes(spec.reward_unit);
  for (const std::string& a : spec.action_names) n += TextBytes(a);
  for (const std::string& s : spec.state_names) n += TextBytes(s);
  const size_t states = spec.state_names.size(), slots = spec.slot_action.size();
  n += spec.terminal.size() + 1 + states * CountWidth(spec.state_first_slot) + 1 +
       slots * IndexWidth(spec.slot_action) + ColumnBytes(spec.slot_reward) + 1 +
       slots * CountWidth(spec.slot_first_outcome) + 1 +
       spec.outcome_next.size() * IndexWidth(spec.outcome_next) +
       ColumnBytes(spec.outcome_probability) + ColumnBytes(spec.outcome_reward) +
       ColumnBytes(spec.criterion.terminal_values);
  return n;
}

Status CheckTextLengths(const ModelSpec& spec) {
  constexpr size_t kMax = std::numeric_limits<uint32_t>::max();
  auto too_long = [&](const std::string& t) { return t.size() > kMax; };
  bool bad = too_long(spec.name) || too_long(spec.description) || too_long(spec.reward_unit);
  for (const std::string& a : spec.action_names) bad = bad || too_long(a);
  for (const std::string& s : spec.state_names) bad = bad || too_long(s);
  if (!bad) return Status::Ok();
  return InvalidArgumentError("a name or the description is 4 GiB or longer");
}

void PutPayload(const ModelSpec& spec, Writer& w) {
  const Criterion& c = spec.criterion;
  w.Put(static_cast<int64_t>(spec.state_names.size()));
  w.Put(static_cast<int64_t>(spec.action_names.size()));
  w.Put(static_cast<int64_t>(spec.slot_action.size()));
  w.Put(static_cast<int64_t>(spec.outcome_next.size()));
  w.Put(static_cast<int64_t>(c.terminal_values.size()));
  w.Put(static_cast<uint8_t>(spec.objective == Objective::kMaximize ? 0 : 1));
  w.Put(CriterionCode(c.kind));
  w.Put(c.discount);
  w.Put(c.horizon);
  w.PutText(spec.name);
  w.PutText(spec.description);
  w.PutText(spec.reward_unit);
  for (const std::string& a : spec.action_names) w.PutText(a);
  for (const std::string& s : spec.state_names) w.PutText(s);
  w.PutArray(spec.terminal);
  PutCounts(spec.state_first_slot, w);
  PutIndices(spec.slot_action, w);
  w.PutColumn(spec.slot_reward);
  PutCounts(spec.slot_first_outcome, w);
  PutIndices(spec.outcome_next, w);
  w.PutColumn(spec.outcome_probability);
  w.PutColumn(spec.outcome_reward);
  w.PutColumn(c.terminal_values);
}

// Reads the payload's own forms (texts, columns, packed indices) on top of ByteReader's
// bounds-checked values and arrays.
class Reader : public ByteReader {
 public:
  using ByteReader::ByteReader;
  bool GetText(std::string* text) {
    uint32_t n = 0;
    if (!Get(&n) || n > in_.size()) return false;
    text->assign(in_.data(), n);
    in_.remove_prefix(n);
    return true;
  }
  // REQUIRES: `count` was checked against the record's size (a constant column allocates
  // `count` doubles from 9 bytes).
  bool GetColumn(std::vector<double>* column, int64_t count) {
    uint8_t form = 0;
    if (!Get(&form)) return false;
    if (form == kColumnAsWritten) return GetArray(column, count);
    double value = 0;
    if (form != kColumnConstant || !Get(&value)) return false;
    column->assign(static_cast<size_t>(count), value);
    return true;
  }
  // Packed unsigned values (width byte, then `count` values), each below `limit`.
  template <typename T>
  bool GetIndices(std::vector<T>* values, int64_t count, int64_t limit) {
    return GetPacked(count, [&](size_t n) { values->resize(n); },
                     [&](size_t i, uint32_t v) {
                       (*values)[i] = static_cast<T>(v);
                       return static_cast<int64_t>(v) < limit;
                     });
  }
  // Packed counts, turned into offsets: `count` + 1 entries from 0 up to exactly `total`.
  bool GetOffsets(std::vector<int64_t>* offsets, int64_t count, int64_t total) {
    int64_t sum = 0;
    const bool ok = GetPacked(count,
                              [&](size_t n) {
                                offsets->resize(n + 1);
                                (*offsets)[0] = 0;
                              },
                              [&](size_t i, uint32_t v) {
                                sum += v;  // At most count x 2^32: no overflow.
                                (*offsets)[i + 1] = sum;
                                return sum <= total;
                              });
    return ok && sum == total;
  }

 private:
  // Reads the width, checks the bytes left, calls size(count) once, then put(i, value) for
  // each value until one returns false.
  template <typename Size, typename Put>
  bool GetPacked(int64_t count, Size&& size, Put&& put) {
    uint8_t width = 0;
    if (!Get(&width) || width < 1 || width > 4 || count < 0 ||
        static_cast<uint64_t>(count) > in_.size() / width) {
      return false;
    }
    size(static_cast<size_t>(count));
    const char* p = in_.data();
    for (size_t i = 0; i < static_cast<size_t>(count); ++i, p += width) {
      uint32_t value = 0;
      std::memcpy(&value, p, width);
      if (!put(i, value)) return false;
    }
    in_.remove_prefix(static_cast<size_t>(count) * width);
    return true;
  }
};

Status Corrupt(const std::string& what) {
  return InternalError("stored model is corrupt: " + what);
}

struct Counts {
  int64_t states = 0, actions = 0, slots = 0, outcomes = 0, terminal_values = 0;
};

// The counts must fit the payload: every state takes at least 6 bytes (name length,
// terminal flag, count), every catalogue action 4, every state action 2 (index, count),
// every outcome 1 (index). Checked before any array is sized from them, so a record of B
// bytes never makes the decoder allocate more than about 20 x B (a constant column costs 9
// bytes for any length).
Status CheckCounts(const Counts& n, uint64_t payload_bytes) {
  const int64_t all[] = {n.states, n.actions, n.slots, n.outcomes, n.terminal_values};
  for (int64_t x : all) {
    if (x < 0 || static_cast<uint64_t>(x) > payload_bytes) {
      return Corrupt("a count is negative or larger than the record");
    }
  }
  if (n.states > std::numeric_limits<StateId>::max() ||
      n.actions > std::numeric_limits<ActionId>::max()) {
    return Corrupt("more states or actions than indices can name");
  }
  if (n.terminal_values != 0 && n.terminal_values != n.states) {
    return Corrupt("terminal values are neither absent nor one per state");
  }
  const uint64_t least = kCountsBytes + 12 + 4 * static_cast<uint64_t>(n.actions) +
                         6 * static_cast<uint64_t>(n.states) +
                         2 * static_cast<uint64_t>(n.slots) +
                         static_cast<uint64_t>(n.outcomes) + 4 + 4;  // 4 widths, 4 forms.
  if (least > payload_bytes) return Corrupt("the counts need more bytes than the record has");
  return Status::Ok();
}

// Reads the payload after the counts. An index array read short or holding a value out of
// range is one error: both mean the record is not what was written.
Status GetBody(Reader& r, const Counts& n, ModelSpec& spec) {
  const Status truncated = Corrupt("the payload does not match its counts");
  if (!(r.GetText(&spec.name) && r.GetText(&spec.description) && r.GetText(&spec.reward_unit))) {
    return truncated;
  }
  spec.action_names.resize(static_cast<size_t>(n.actions));
  for (std::string& a : spec.action_names) {
    if (!r.GetText(&a)) return truncated;
  }
  spec.state_names.resize(static_cast<size_t>(n.states));
  for (std::string& s : spec.state_names) {
    if (!r.GetText(&s)) return truncated;
  }
  if (!r.GetArray(&spec.terminal, n.states)) return truncated;
  for (uint8_t t : spec.terminal) {
    if (t > 1) return Corrupt("a terminal flag is neither 0 nor 1");
  }
  if (!r.GetOffsets(&spec.state_first_slot, n.states, n.slots)) {
    return Corrupt("the state action counts do not add up to the state actions");
  }
  if (!r.GetIndices(&spec.slot_action, n.slots, n.actions)) {
    return Corrupt("an action index is out of range or cut short");
  }
  if (!r.GetColumn(&spec.slot_reward, n.slots)) return truncated;
  if (!r.GetOffsets(&spec.slot_first_outcome, n.slots, n.outcomes)) {
    return Corrupt("the outcome counts do not add up to the outcomes");
  }
  if (!r.GetIndices(&spec.outcome_next, n.outcomes, n.states)) {
    return Corrupt("a next state is out of range or cut short");
  }
  if (!(r.GetColumn(&spec.outcome_probability, n.outcomes) &&
        r.GetColumn(&spec.outcome_reward, n.outcomes) &&
        r.GetColumn(&spec.criterion.terminal_values, n.terminal_values) && r.AtEnd())) {
    return truncated;
  }
  return Status::Ok();
}

// The header's checks, in the order that names the first thing wrong; on success *payload
// is the checksummed payload.
Status CheckHeader(std::string_view record, std::string_view* payload) {
  if (record.size() < kStoredModelHeaderBytes) {
    return Corrupt("it has " + std::to_string(record.size()) + " bytes, fewer than a header");
  }
  if (std::memcmp(record.data(), kMagic, sizeof kMagic) != 0) {
    return Corrupt("it does not start with the stored model's magic bytes");
  }
  uint32_t version = 0, flags = 0, payload_crc = 0, header_crc = 0;
  uint64_t payload_bytes = 0;
  std::memcpy(&version, record.data() + 8, 4);
  std::memcpy(&flags, record.data() + 12, 4);
  std::memcpy(&payload_bytes, record.data() + 16, 8);
  std::memcpy(&payload_crc, record.data() + 24, 4);
  std::memcpy(&header_crc, record.data() + 28, 4);
  if (Crc32(record.substr(0, 28)) != header_crc) return Corrupt("the header checksum differs");
  if (version != kVersion) {
    return Corrupt("version " + std::to_string(version) + " is not one this build reads (" +
                   std::to_string(kVersion) + ")");
  }
  if (flags != 0) return Corrupt("unknown flags " + std::to_string(flags));
  if (payload_bytes != record.size() - kStoredModelHeaderBytes ||
      payload_bytes > kMaxPayloadBytes) {
    return Corrupt("the header says " + std::to_string(payload_bytes) + " payload bytes, the " +
                   "record holds " + std::to_string(record.size() - kStoredModelHeaderBytes));
  }
  *payload = record.substr(kStoredModelHeaderBytes);
  if (Crc32(*payload) != payload_crc) return Corrupt("the payload checksum differs");
  return Status::Ok();
}

Result<ModelSpec> DecodePayload(std::string_view payload) {
  Reader r(payload);
  Counts n;
  uint8_t objective = 0, criterion = 0;
  ModelSpec spec;
  if (!(r.Get(&n.states) && r.Get(&n.actions) && r.Get(&n.slots) && r.Get(&n.outcomes) &&
        r.Get(&n.terminal_values) && r.Get(&objective) && r.Get(&criterion) &&
        r.Get(&spec.criterion.discount) && r.Get(&spec.criterion.horizon))) {
    return Corrupt("the payload is shorter than its counts");
  }
  if (objective > 1) return Corrupt("unknown objective code " + std::to_string(objective));
  if (criterion > 3) return Corrupt("unknown criterion code " + std::to_string(criterion));
  spec.objective = objective == 0 ? Objective::kMaximize : Objective::kMinimize;
  spec.criterion.kind = kCriterionCodes[criterion];
  MDP_RETURN_IF_ERROR(CheckCounts(n, payload.size()));
  MDP_RETURN_IF_ERROR(GetBody(r, n, spec));
  return spec;
}

}  // namespace

Result<std::string> EncodeStoredModel(const ModelSpec& spec) {
  MDP_RETURN_IF_ERROR(CheckTextLengths(spec));
  try {
    const size_t payload_bytes = PayloadBytes(spec);
    Writer w(kStoredModelHeaderBytes + payload_bytes);
    for (unsigned char c : kMagic) w.Put(c);
    w.Put(kVersion);
    w.Put(uint32_t{0});  // Flags.
    w.Put(static_cast<uint64_t>(payload_bytes));
    w.Put(uint32_t{0});  // Payload CRC, filled in below.
    w.Put(uint32_t{0});  // Header CRC, likewise.
    PutPayload(spec, w);
    std::string& out = w.out();
    assert(out.size() == kStoredModelHeaderBytes + payload_bytes);  // PayloadBytes agrees.
    const uint32_t payload_crc = Crc32(std::string_view(out).substr(kStoredModelHeaderBytes));
    std::memcpy(out.data() + 24, &payload_crc, 4);
    const uint32_t header_crc = Crc32(std::string_view(out).substr(0, 28));
    std::memcpy(out.data() + 28, &header_crc, 4);
    return std::move(out);
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("cannot allocate the stored form of model " + spec.name);
  }
}

bool IsStoredModelText(std::string_view record) {
  return !record.empty() && record.front() == '{';
}

Result<ModelSpec> DecodeStoredModel(std::string_view record) {
  std::string_view payload;
  MDP_RETURN_IF_ERROR(CheckHeader(record, &payload));
  try {
    return DecodePayload(payload);
  } catch (const std::bad_alloc&) {
    return ResourceExhaustedError("cannot allocate the stored model of " +
                                  std::to_string(record.size()) + " bytes");
  }
}

}  // namespace mdp::server
