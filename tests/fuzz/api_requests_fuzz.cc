// Fuzz target: the small JSON bodies of the API (server/api_codec.h, json_codec.h), against a
// fixed small model (tests/testing/documents.h). The first byte picks the decoder, the rest
// is the body. What decodes is then used as the service would use it: options solve the
// model, values are verified, a policy is evaluated and simulated, a start distribution
// starts a simulation. Nothing may crash; a request that decodes must be accepted by the
// solver call it feeds (any refusal is a decoder that let a bad request through).
#include <algorithm>
#include <cstddef>
#include <cstdint>
#include <optional>
#include <string>
#include <string_view>

#include "server/api_codec.h"
#include "server/json_codec.h"
#include "server/model_codec.h"
#include "solver/evaluate.h"
#include "solver/simulate.h"
#include "solver/solver.h"
#include "solver/verify.h"
#include "tests/fuzz/fuzz_checks.h"
#include "tests/testing/documents.h"

namespace {

using mdp::fuzz::Fail;

const mdp::Model& TheModel() {
  static const mdp::Model* model = [] {
    mdp::server::ModelDecodeResult r =
        mdp::server::DecodeModel(mdp::server::test_documents::kGreenhouse);
    if (!r.ok()) Fail("the fixed model does not decode");
    return new mdp::Model(std::move(*r.model));
  }();
  return *model;
}

const mdp::Solution& TheSolution() {
  static const mdp::Solution* solution = [] {
    mdp::Result<mdp::Solution> s = mdp::Solve(TheModel(), mdp::SolveOptions{});
    if (!s.ok()) Fail("the fixed model does not solve");
    return new mdp::Solution(std::move(*s));
  }();
  return *solution;
}

// Options as decoded, with the run held short (a fuzzer's input may ask for 10^7 seconds).
mdp::SolveOptions Bounded(mdp::SolveOptions options) {
  options.max_iterations = std::min<int64_t>(options.max_iterations, 20000);
  options.time_limit_seconds = 1.0;
  options.threads = 1;
  return options;
}

void SolveWith(const mdp::SolveOptions& options) {
  const mdp::Result<mdp::Solution> s = mdp::Solve(TheModel(), Bounded(options));
  // The model's criterion is discounted: a method that does not apply is refused with
  // kInvalidArgument, which the service reports as a problem; anything else must solve.
  if (!s.ok() && s.status().code() != mdp::StatusCode::kInvalidArgument) {
    Fail("decoded solve options fail the solve: " + s.status().ToString());
  }
}

void Simulate(const mdp::server::SimulateRequest& request) {
  mdp::SimulateOptions options = request.options;
  // Short runs: the decoder allows 10^8 episodes of 10^9 steps.
  options.episodes = std::min<int64_t>(options.episodes, 200);
  options.max_steps = std::min<int64_t>(options.max_steps, 200);
  const mdp::Result<mdp::SimulationReport> report =
      request.policy ? mdp::Simulate(TheModel(), *request.policy, options)
                     : mdp::Simulate(TheModel(), TheSolution(), options);
  if (!report.ok()) Fail("a decoded simulation request fails: " + report.status().ToString());
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
  if (size == 0) return 0;
  const std::string_view body(reinterpret_cast<const char*>(data) + 1, size - 1);
  const mdp::Model& m = TheModel();
  switch (data[0] % 7) {
    case 0: {
      const auto r = mdp::server::DecodeSolveRequest(body);
      if (r.ok()) SolveWith(r->options);
      break;
    }
    case 1: {
      const auto r = mdp::server::DecodeSolveOptionsText(body);
      if (r.ok()) SolveWith(*r);
      break;
    }
    case 2: {
      const auto r = mdp::server::DecodeVerifyRequest(body);
      if (r.ok() && !(r->tolerance >= 0.0)) Fail("a verify request decodes with a bad tolerance");
      break;
    }
    case 3: {
      const auto r = mdp::server::DecodeValues(m, body);
      if (r.ok()) {
        if (static_cast<int64_t>(r.value.size()) != m.num_states()) {
          Fail("decoded values are not one per state");
        }
        (void)mdp::VerifyValues(m, r.value, mdp::VerifyOptions{});
        if (!mdp::VerifyValues(m, r.value, TheSolution(), mdp::VerifyOptions{}).ok()) {
          Fail("decoded values are refused by VerifyValues");
        }
      }
      break;
    }
    case 4: {
      const auto r = mdp::server::DecodePolicy(m, body);
      if (r.ok()) {
        if (!mdp::EvaluatePolicy(m, r.value, mdp::EvaluateOptions{}).ok()) {
          Fail("a decoded policy is refused by EvaluatePolicy");
        }
        if (!mdp::VerifyPolicy(m, r.value, TheSolution(), mdp::VerifyOptions{}).ok()) {
          Fail("a decoded policy is refused by VerifyPolicy");
        }
      }
      break;
    }
    case 5: {
      const auto r = mdp::server::DecodeSimulateRequest(m, body);
      if (r.ok()) Simulate(r.value);
      break;
    }
    case 6: {
      const auto r = mdp::server::DecodeStartDistribution(m, body);
      if (r.ok()) {
        mdp::server::SimulateRequest request;
        request.options.start = r.value;
        Simulate(request);
      }
      break;
    }
  }
  return 0;
}
