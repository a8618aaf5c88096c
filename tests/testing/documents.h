// Shared pieces of the server tests: a small invented model document with values worked
// out by hand, and helpers to look for a (pointer, message) among decoder findings.
#ifndef MDP_TESTS_TESTING_DOCUMENTS_H_
#define MDP_TESTS_TESTING_DOCUMENTS_H_

#include <string>
#include <string_view>
#include <vector>

#include "server/json_reader.h"

namespace mdp::server::test_documents {

// An invented greenhouse bed (discount 0.5). By hand: V(wet) = 10 (harvest), V(dry) = 4
// (water: -1 + 0.5 * 10), V(seedling) = 2 + 0.5 * 4 = 4; Q(dry, wait) = 0.5 * (0.5 * 4 +
// 0.5 * 4) = 2 and Q(wet, wait) = 0.5 * (0.5 * 4 + 0.5 * 10) = 3.5. Rows in order: dry/water,
// dry/wait, wet/harvest, wet/wait, seedling/grow.
constexpr std::string_view kGreenhouse = R"({
  "format": "mdpserve/model@1", "name": "Greenhouse", "reward_unit": "baskets",
  "objective": "maximize", "criterion": {"kind": "discounted", "discount": 0.5},
  "actions": ["water", "wait", "harvest", "grow"],
  "states": [
    {"name": "dry", "actions": [
      {"action": "water", "reward": -1, "outcomes": [{"next": "wet", "probability": 1}]},
      {"action": "wait", "outcomes": [{"next": "dry", "probability": 0.5},
                                      {"next": "seedling", "probability": 0.5}]}]},
    {"name": "wet", "actions": [
      {"action": "harvest", "outcomes": [{"next": "done", "probability": 1, "reward": 10}]},
      {"action": "wait", "outcomes": [{"next": "dry", "probability": 0.5},
                                      {"next": "wet", "probability": 0.5}]}]},
    {"name": "seedling", "actions": [
      {"action": "grow", "reward": 2, "outcomes": [{"next": "dry", "probability": 1}]}]},
    {"name": "done", "terminal": true}]})";

// True iff some issue has exactly `pointer` and a message containing `message_part`.
inline bool HasIssue(const std::vector<DocumentIssue>& issues, std::string_view pointer,
              std::string_view message_part) {
  for (const DocumentIssue& i : issues) {
    if (i.pointer == pointer && i.message.find(message_part) != std::string::npos) return true;
  }
  return false;
}

inline std::string Describe(const std::vector<DocumentIssue>& issues) {
  std::string out;
  for (const DocumentIssue& i : issues) out += "\n  '" + i.pointer + "': " + i.message;
  return out.empty() ? "\n  (none)" : out;
}

}  // namespace mdp::server::test_documents

#endif  // MDP_TESTS_TESTING_DOCUMENTS_H_
