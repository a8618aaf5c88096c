// Tests server/model_store_codec.{h,cc}: the binary stored form of a model. Every example in
// api-schema/examples and seeded random specs must come back field for field (doubles bit for
// bit) with the same canonical text and id; every truncation and single-byte change of a
// record must be refused with kInternal, and records re-sealed with valid checksums around a
// lie (counts, offsets, indices) must be refused by the structure checks. The checksum is
// recomputed here with a CRC-32 written from its definition, not with the codec's zlib call.
#include "server/model_store_codec.h"

#include <gtest/gtest.h>

#include <algorithm>
#include <cmath>
#include <cstring>
#include <limits>
#include <filesystem>
#include <fstream>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "server/canonical.h"
#include "server/model_codec.h"
#include "solver/validate.h"
#include "tests/testing/status_matchers.h"
#include "tests/testing/test_models.h"

namespace mdp::server {
namespace {

std::filesystem::path RepositoryRoot() {
  return std::filesystem::path(__FILE__).parent_path().parent_path().parent_path();
}

std::string ReadFile(const std::filesystem::path& path) {
  std::ifstream in(path, std::ios::binary);
  std::ostringstream text;
  text << in.rdbuf();
  return text.str();
}

std::vector<std::filesystem::path> Examples() {
  std::vector<std::filesystem::path> paths;
  for (const auto& entry :
       std::filesystem::directory_iterator(RepositoryRoot() / "api-schema" / "examples")) {
    if (entry.path().extension() == ".json") paths.push_back(entry.path());
  }
  std::sort(paths.begin(), paths.end());
  return paths;
}

// CRC-32 as gzip and PNG define it: reflected polynomial 0xEDB88320, initial and final
// value all ones; one bit at a time.
uint32_t ReferenceCrc32(std::string_view bytes) {
  uint32_t crc = 0xFFFFFFFFu;
  for (unsigned char byte : bytes) {
    crc ^= byte;
    for (int bit = 0; bit < 8; ++bit) crc = (crc >> 1) ^ (0xEDB88320u & (0u - (crc & 1u)));
  }
  return ~crc;
}

// Rewrites the header's payload length and both checksums so they fit `record` again, as a
// writer with a bug (rather than a flipped bit on disk) would leave it.
void Reseal(std::string& record) {
  ASSERT_GE(record.size(), kStoredModelHeaderBytes);
  const uint64_t payload_bytes = record.size() - kStoredModelHeaderBytes;
  std::memcpy(record.data() + 16, &payload_bytes, 8);
  const uint32_t payload_crc =
      ReferenceCrc32(std::string_view(record).substr(kStoredModelHeaderBytes));
  std::memcpy(record.data() + 24, &payload_crc, 4);
  const uint32_t header_crc = ReferenceCrc32(std::string_view(record).substr(0, 28));
  std::memcpy(record.data() + 28, &header_crc, 4);
}

template <typename T>
void Overwrite(std::string& record, size_t offset, T value) {
  ASSERT_LE(offset + sizeof value, record.size());
  std::memcpy(record.data() + offset, &value, sizeof value);
  Reseal(record);
}

uint64_t Bits(double x) {
  uint64_t bits;
  std::memcpy(&bits, &x, sizeof bits);
  return bits;
}

std::vector<uint64_t> Bits(const std::vector<double>& xs) {
  std::vector<uint64_t> out;
  for (double x : xs) out.push_back(Bits(x));
  return out;
}

void ExpectSameSpec(const ModelSpec& a, const ModelSpec& b) {
  EXPECT_EQ(a.name, b.name);
  EXPECT_EQ(a.description, b.description);
  EXPECT_EQ(a.reward_unit, b.reward_unit);
  EXPECT_EQ(a.objective, b.objective);
  EXPECT_EQ(a.criterion.kind, b.criterion.kind);
  EXPECT_EQ(Bits(a.criterion.discount), Bits(b.criterion.discount));
  EXPECT_EQ(a.criterion.horizon, b.criterion.horizon);
  EXPECT_EQ(Bits(a.criterion.terminal_values), Bits(b.criterion.terminal_values));
  EXPECT_EQ(a.action_names, b.action_names);
  EXPECT_EQ(a.state_names, b.state_names);
  EXPECT_EQ(a.terminal, b.terminal);
  EXPECT_EQ(a.state_first_slot, b.state_first_slot);
  EXPECT_EQ(a.slot_action, b.slot_action);
  EXPECT_EQ(Bits(a.slot_reward), Bits(b.slot_reward));
  EXPECT_EQ(a.slot_first_outcome, b.slot_first_outcome);
  EXPECT_EQ(a.outcome_next, b.outcome_next);
  EXPECT_EQ(Bits(a.outcome_probability), Bits(b.outcome_probability));
  EXPECT_EQ(Bits(a.outcome_reward), Bits(b.outcome_reward));
}

std::string MustEncode(const ModelSpec& spec) {
  Result<std::string> record = EncodeStoredModel(spec);
  EXPECT_OK(record);
  return record.ok() ? *record : std::string();
}

// Encodes, decodes and compares; for a valid spec also the canonical text and id.
void ExpectRoundTrip(const ModelSpec& spec, bool valid) {
  const std::string record = MustEncode(spec);
  EXPECT_FALSE(IsStoredModelText(record));
  Result<ModelSpec> back = DecodeStoredModel(record);
  ASSERT_OK(back);
  ExpectSameSpec(spec, *back);
  EXPECT_EQ(MustEncode(*back), record) << "encoding is not a function of the spec";
  if (!valid) return;
  const std::string canonical = EncodeCanonicalModel(spec);
  EXPECT_EQ(EncodeCanonicalModel(*back), canonical);
  EXPECT_EQ(CanonicalModelId(*back), ModelId(canonical));
}

TEST(ModelStoreCodecTest, EveryExampleComesBackWithItsCanonicalId) {
  const std::vector<std::filesystem::path> examples = Examples();
  ASSERT_GE(examples.size(), 6u) << "no api-schema/examples under " << RepositoryRoot();
  for (const auto& path : examples) {
    SCOPED_TRACE(path.filename().string());
    ModelDecodeResult decoded = DecodeModel(ReadFile(path));
    ASSERT_TRUE(decoded.ok());
    ExpectRoundTrip(decoded.spec, /*valid=*/true);
  }
}

TEST(ModelStoreCodecTest, SeededRandomSpecsComeBackBitForBit) {
  for (uint64_t seed = 1; seed <= 30; ++seed) {
    SCOPED_TRACE("seed " + std::to_string(seed));
    testing::RandomModelOptions options;
    options.states = 1 + static_cast<StateId>(seed * 7 % 60);
    options.max_actions = 1 + static_cast<int>(seed % 5);
    options.objective = seed % 2 ? Objective::kMaximize : Objective::kMinimize;
    ModelSpec spec = testing::RandomSpec(seed, options);
    std::mt19937_64 rng(seed);
    switch (seed % 4) {
      case 0: spec.criterion = testing::CriterionOf(CriterionKind::kAverage); break;
      case 1: spec.criterion = testing::CriterionOf(CriterionKind::kTotal); break;
      case 2:
        spec.criterion = testing::CriterionOf(CriterionKind::kFiniteHorizon, 0.95, 12);
        spec.criterion.terminal_values.assign(spec.state_names.size(), 0.0);
        for (StateId s = 0; s < spec.num_states(); ++s) {
          if (!spec.terminal[s]) spec.criterion.terminal_values[s] = static_cast<double>(rng() % 9);
        }
        break;
      default: break;  // Discounted, as RandomSpec makes it.
    }
    if (seed % 3 == 0) spec.description = "seed " + std::to_string(seed) + ", \xC3\xA9t\xC3\xA9";
    if (seed % 5 == 0) spec.reward_unit = "EUR";
    ExpectRoundTrip(spec, /*valid=*/Validate(spec).ok());
  }
}

// The codec checks structure, not meaning: whatever doubles and bytes a spec holds come back.
TEST(ModelStoreCodecTest, OddDoublesAndBytesComeBackExactly) {
  ModelSpec spec;
  spec.name = std::string("nul\0inside", 10);
  spec.description = "\x01\x7F\xFF\xFE not UTF-8";
  const ActionId go = spec.InternAction("");
  spec.AddState("\xF0\x9F\x9A\x80");
  spec.AddStateAction(go, -0.0);
  spec.AddOutcome(0, std::numeric_limits<double>::denorm_min(), std::nan("0x5"));
  spec.AddOutcome(0, 1.0 - 1e-16, -std::numeric_limits<double>::infinity());
  spec.criterion.discount = std::nextafter(1.0, 0.0);
  spec.criterion.terminal_values = {-0.0};
  ExpectRoundTrip(spec, /*valid=*/false);
}

TEST(ModelStoreCodecTest, ConstantColumnsAreStoredOnceAndLargeModelsFitTheTarget) {
  testing::RandomModelOptions options;
  options.states = 2000;
  options.max_actions = 4;
  options.max_outcomes = 8;
  ModelSpec spec = testing::RandomSpec(99, options);
  const std::string record = MustEncode(spec);
  const double per_outcome = static_cast<double>(record.size()) / spec.num_outcomes();
  EXPECT_LE(per_outcome, 22.0) << record.size() << " bytes for " << spec.num_outcomes();
  std::fill(spec.outcome_reward.begin(), spec.outcome_reward.end(), 0.0);
  const std::string constant = MustEncode(spec);
  EXPECT_EQ(record.size() - constant.size(), spec.outcome_reward.size() * sizeof(double) - 8);
  ExpectRoundTrip(spec, /*valid=*/true);
}

ModelSpec RandomSpecOf(int states, int max_outcomes, uint64_t seed) {
  testing::RandomModelOptions options;
  options.states = states;
  options.max_outcomes = max_outcomes;
  return testing::RandomSpec(seed, options);
}

// Over 1 MiB of canonical text, so CanonicalModelId hashes several pieces.
TEST(ModelStoreCodecTest, PiecewiseIdEqualsTheIdOfTheWholeText) {
  const ModelSpec spec = RandomSpecOf(6000, 8, 7);
  const std::string canonical = EncodeCanonicalModel(spec);
  ASSERT_GT(canonical.size(), size_t{3} << 20);
  EXPECT_EQ(CanonicalModelId(spec), ModelId(canonical));
}

// WriteCanonicalModelPieces hands the text over in order, byte for byte the whole text, and
// no further once the receiver says stop.
TEST(ModelStoreCodecTest, CanonicalPiecesMakeTheWholeTextAndStopWhenAsked) {
  const ModelSpec spec = RandomSpecOf(3000, 8, 11);
  const std::string canonical = EncodeCanonicalModel(spec);
  std::string joined;
  int pieces = 0;
  EXPECT_TRUE(WriteCanonicalModelPieces(spec, size_t{64} << 10, [&](std::string_view piece) {
    joined += piece;
    ++pieces;
    return true;
  }));
  EXPECT_EQ(joined, canonical);
  EXPECT_GE(pieces, static_cast<int>(canonical.size() / (size_t{80} << 10)));

  int calls = 0;
  std::string partial;
  EXPECT_FALSE(WriteCanonicalModelPieces(spec, size_t{64} << 10, [&](std::string_view piece) {
    partial += piece;
    return ++calls < 2;
  }));
  EXPECT_EQ(calls, 2);
  EXPECT_EQ(canonical.compare(0, partial.size(), partial), 0);
  EXPECT_LT(partial.size(), canonical.size());
}

// The document route asks the cursor for one piece per turn: each call resumes where the
// last ended; with a piece size of 1 byte, the head comes alone and then one state per call.
TEST(ModelStoreCodecTest, CursorResumesWherePreviousPieceEnded) {
  const ModelSpec spec = RandomSpecOf(200, 4, 5);
  const std::string canonical = EncodeCanonicalModel(spec);
  CanonicalModelCursor cursor(spec);
  std::string joined;
  int calls = 0;
  bool more = true;
  while (more) {
    std::string piece;
    more = cursor.Next(piece, 1);
    ++calls;
    ASSERT_FALSE(piece.empty());
    if (calls == 1) {
      const std::string_view head_end = "\"states\":[";
      ASSERT_GE(piece.size(), head_end.size());
      EXPECT_EQ(piece.substr(piece.size() - head_end.size()), head_end) << "the head alone";
    }
    joined += piece;
  }
  EXPECT_EQ(calls, spec.num_states() + 1);
  EXPECT_EQ(joined, canonical);
  std::string after;
  EXPECT_FALSE(cursor.Next(after, 1));
  EXPECT_TRUE(after.empty()) << after;
}

ModelSpec SmallSpec() {
  ModelDecodeResult decoded = DecodeModel(ReadFile(Examples().front()));
  EXPECT_TRUE(decoded.ok());
  return decoded.spec;
}

TEST(ModelStoreCodecTest, EveryTruncationIsRefused) {
  const std::string record = MustEncode(SmallSpec());
  ASSERT_GT(record.size(), kStoredModelHeaderBytes);
  for (size_t n = 0; n < record.size(); ++n) {
    const std::string cut = record.substr(0, n);
    Result<ModelSpec> as_is = DecodeStoredModel(cut);
    ASSERT_FALSE(as_is.ok()) << n;
    EXPECT_EQ(as_is.status().code(), StatusCode::kInternal);
    if (n < kStoredModelHeaderBytes) continue;
    std::string resealed = cut;
    Reseal(resealed);
    Result<ModelSpec> sealed = DecodeStoredModel(resealed);
    ASSERT_FALSE(sealed.ok()) << "resealed at " << n;
    EXPECT_EQ(sealed.status().code(), StatusCode::kInternal);
  }
}

TEST(ModelStoreCodecTest, SingleByteChangesAreRefusedAndNeverCrash) {
  const std::string record = MustEncode(SmallSpec());
  std::mt19937_64 rng(20240601);
  int resealed_refused = 0;
  for (size_t i = 0; i < record.size(); ++i) {
    for (int trial = 0; trial < 3; ++trial) {
      std::string changed = record;
      const auto delta = static_cast<unsigned char>(trial == 0 ? 0x01 : trial == 1 ? 0x80
                                                                                   : 1 + rng() % 255);
      changed[i] = static_cast<char>(static_cast<unsigned char>(changed[i]) ^ delta);
      Result<ModelSpec> as_is = DecodeStoredModel(changed);
      ASSERT_FALSE(as_is.ok()) << "byte " << i << " ^ " << int{delta};
      EXPECT_EQ(as_is.status().code(), StatusCode::kInternal);
      if (i < kStoredModelHeaderBytes) continue;
      // With the checksums made to fit, a change may describe another valid spec (a double's
      // bits), but anything decoded must be structurally sound enough to validate.
      Reseal(changed);
      Result<ModelSpec> sealed = DecodeStoredModel(changed);
      if (sealed.ok()) {
        (void)Validate(*sealed);
      } else {
        ++resealed_refused;
      }
    }
  }
  EXPECT_GT(resealed_refused, 0);
}

// The payload begins with the counts S, A, R, O, T (i64 each) at offset 32.
constexpr size_t kStates = 32, kActions = 40, kSlots = 48, kOutcomes = 56, kTerminalValues = 64;

Status DecodeStatus(const std::string& record) {
  Result<ModelSpec> spec = DecodeStoredModel(record);
  return spec.ok() ? Status::Ok() : spec.status();
}

void ExpectRefused(const std::string& record, const std::string& words) {
  const Status status = DecodeStatus(record);
  EXPECT_EQ(status.code(), StatusCode::kInternal) << status.ToString();
  EXPECT_NE(status.message().find(words), std::string::npos) << status.message();
}

TEST(ModelStoreCodecTest, LyingCountsAreRefusedBeforeAllocating) {
  const std::string record = MustEncode(SmallSpec());
  for (size_t offset : {kStates, kActions, kSlots, kOutcomes}) {
    for (int64_t count : {int64_t{-1}, int64_t{1} << 40, std::numeric_limits<int64_t>::max()}) {
      std::string lie = record;
      Overwrite(lie, offset, count);
      ExpectRefused(lie, "count");
    }
    std::string bigger = record;
    int64_t count = 0;
    std::memcpy(&count, record.data() + offset, 8);
    Overwrite(bigger, offset, count + static_cast<int64_t>(record.size()) / 4);
    ExpectRefused(bigger, "stored model is corrupt");
  }
  std::string terminal_values = record;
  int64_t states = 0;
  std::memcpy(&states, record.data() + kStates, 8);
  Overwrite(terminal_values, kTerminalValues, states + 1);
  ExpectRefused(terminal_values, "terminal values");
}

TEST(ModelStoreCodecTest, ImpossibleStructureIsRefused) {
  ModelSpec spec = SmallSpec();
  const std::string good = MustEncode(spec);
  spec.outcome_next.back() = spec.num_states();  // Out of range.
  ExpectRefused(MustEncode(spec), "next state");
  spec = SmallSpec();
  spec.slot_action.front() = static_cast<ActionId>(spec.action_names.size());
  ExpectRefused(MustEncode(spec), "action index");
  spec = SmallSpec();
  spec.slot_first_outcome.back() += 1;  // One outcome more than the outcome arrays hold.
  ExpectRefused(MustEncode(spec), "outcome counts");
  spec = SmallSpec();
  spec.state_first_slot.back() -= 1;
  ExpectRefused(MustEncode(spec), "state action counts");
  spec = SmallSpec();
  spec.terminal.front() = 2;
  ExpectRefused(MustEncode(spec), "terminal flag");
  std::string version = good;
  Overwrite(version, 8, uint32_t{2});
  ExpectRefused(version, "version 2");
  std::string flags = good;
  Overwrite(flags, 12, uint32_t{4});
  ExpectRefused(flags, "flags");
  std::string trailing = good + "x";
  Reseal(trailing);
  ExpectRefused(trailing, "does not match its counts");
}

// Records written before the binary form hold the canonical JSON text: told apart by the
// first byte, and the text itself is never taken for a binary record.
TEST(ModelStoreCodecTest, OldTextRecordsAreToldApart) {
  const std::string canonical = EncodeCanonicalModel(SmallSpec());
  EXPECT_TRUE(IsStoredModelText(canonical));
  EXPECT_FALSE(IsStoredModelText(MustEncode(SmallSpec())));
  EXPECT_FALSE(IsStoredModelText(""));
  ExpectRefused(canonical, "magic");
}

}  // namespace
}  // namespace mdp::server
