// JSON <-> solver types for every document except the model (see model_codec.h): solutions,
// verification and evaluation reports, error lists (encode); candidate values and policies
// (decode). Implements api-schema/{solution,verification,evaluation,errors,values,policy}
// .schema.json; api-schema/README.md describes each field. Stateless; thread-safe.
#ifndef MDP_SERVER_JSON_CODEC_H_
#define MDP_SERVER_JSON_CODEC_H_

#include <string_view>
#include <vector>

#include "server/json_reader.h"
#include "solver/solver.h"

namespace mdp::server {

enum class SolutionDetail {
  kSummary,  // Report fields, values and policy; no per-state Q-table.
  kFull,     // Also `states`: Q of every action, optimal sets, gaps.
};

Json EncodeCriterion(const Model& m);
Json EncodeSolveOptions(const SolveOptions& options);
Json EncodeSolution(const Model& m, const Solution& solution, SolutionDetail detail);
Json EncodeValuesReport(const Model& m, const ValuesReport& report);
Json EncodePolicyReport(const Model& m, const PolicyReport& report);
Json EncodeEvaluation(const Model& m, const PolicyValues& values);
// The evaluation document under the model's criterion (criterion_eval.h).
Json EncodeCriterionEvaluation(const Model& m, const CriterionValues& values);
Json EncodeComparison(const ComparisonReport& report);
// The simulation document (api-schema/simulation.schema.json). Lists the `listed_states` most
// visited states (most visits first, ties in model order) and the frequency of the rest.
Json EncodeSimulation(const Model& m, const SimulateOptions& options,
                      const SimulationReport& report, int listed_states = 20);
Json EncodeIssues(const std::vector<DocumentIssue>& errors,
                  const std::vector<DocumentIssue>& warnings, int64_t errors_not_listed);

// A decoded candidate: the value or the errors that say why not.
template <typename T>
struct Decoded {
  T value{};
  std::vector<DocumentIssue> errors;
  bool ok() const { return errors.empty(); }
};

// Reads a values document (or a solution document's `values`) for model `m`.
Decoded<std::vector<double>> DecodeValues(const Model& m, std::string_view text);
// Reads a policy document (or a solution document's `policy`) for model `m`.
Decoded<Policy> DecodePolicy(const Model& m, std::string_view text);
// Reads a start distribution document (api-schema/start.schema.json) for model `m`:
// `{"start": {"<state>": <probability>, ...}}`, probabilities summing to 1 within 1e-6.
Decoded<std::vector<StartWeight>> DecodeStartDistribution(const Model& m, std::string_view text);

}  // namespace mdp::server

#endif  // MDP_SERVER_JSON_CODEC_H_
