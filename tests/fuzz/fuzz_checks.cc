#include "tests/fuzz/fuzz_checks.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <optional>
#include <string>
#include <vector>

#include "server/canonical.h"
#include "server/model_codec.h"
#include "solver/solver.h"
#include "solver/verify.h"

namespace mdp::fuzz {

void Fail(std::string_view what) {
  std::fprintf(stderr, "fuzz check failed: %.*s\n", static_cast<int>(what.size()), what.data());
  std::abort();
}

void CheckCanonicalRoundTrip(const ModelSpec& spec) {
  const std::string canonical = server::EncodeCanonicalModel(spec);
  const server::ModelDecodeResult again = server::DecodeModel(canonical);
  if (!again.ok()) {
    Fail("the canonical document of a decoded model does not decode: " +
         (again.errors.empty()
              ? std::string("(no error listed)")
              : again.errors.front().pointer + ": " + again.errors.front().message));
  }
  if (server::EncodeCanonicalModel(again.spec) != canonical) {
    Fail("decoding the canonical document changes it");
  }
}

namespace {

std::vector<Method> MethodsToTry(CriterionKind kind) {
  std::vector<Method> out = {Method::kAuto};
  for (Method m : {Method::kValueIteration, Method::kGaussSeidel, Method::kPolicyIteration,
                   Method::kModifiedPolicyIteration, Method::kRelativeValueIteration,
                   Method::kBackwardInduction}) {
    if (CheckMethod(kind, m).ok()) out.push_back(m);
  }
  return out;
}

void CheckShape(const Model& m, const Solution& s, const std::string& label) {
  const auto states = static_cast<size_t>(m.num_states());
  const auto rows = static_cast<size_t>(m.num_rows());
  if (s.values.size() != states) Fail(label + ": values are not one per state");
  if (s.best_row.size() != states) Fail(label + ": best_row is not one per state");
  if (s.q.size() != rows || s.optimal_row.size() != rows) Fail(label + ": q is not one per row");
  const bool converged = s.outcome == SolveOutcome::kConverged;
  for (StateId st = 0; st < m.num_states(); ++st) {
    const RowId b = m.row_begin(st), e = m.row_end(st);
    const RowId pick = s.best_row[static_cast<size_t>(st)];
    if (b == e) {
      if (pick != -1) Fail(label + ": a state without actions has a pick");
      continue;
    }
    // Total reward: a state that cannot reach a goal has no value and no pick (solution.h).
    if (s.criterion == CriterionKind::kTotal && pick == -1 &&
        std::isnan(s.values[static_cast<size_t>(st)])) {
      continue;
    }
    if (pick < b || pick >= e) {
      Fail(label + ": state " + std::to_string(st) + "'s pick " + std::to_string(pick) +
           " lies outside its rows [" + std::to_string(b) + ", " + std::to_string(e) + ")");
    }
    int64_t in_set = 0;
    for (RowId r = b; r < e; ++r) in_set += s.optimal_row[static_cast<size_t>(r)] != 0;
    if (in_set == 0) Fail(label + ": a state's optimal set is empty");
    if (!s.optimal_row[static_cast<size_t>(pick)]) Fail(label + ": the pick is not optimal");
    // Total reward: NaN marks states that cannot reach a goal (solution.h).
    const double v = s.values[static_cast<size_t>(st)];
    if (converged && s.criterion != CriterionKind::kTotal && !std::isfinite(v)) {
      Fail(label + ": a converged solution has a value that is not finite");
    }
  }
}

}  // namespace

void CheckSolves(const Model& m) {
  if (m.num_states() > kMaxSolvedStates) return;
  SolveOptions options;
  options.tolerance = 1e-6;
  options.max_iterations = 20000;
  options.time_limit_seconds = 2.0;
  options.threads = 1;
  std::vector<Solution> converged;
  for (Method method : MethodsToTry(m.criterion().kind)) {
    options.method = method;
    const std::string label = "method " + std::string(MethodName(method));
    const Result<Solution> solved = Solve(m, options);
    if (!solved.ok()) {
      // Criterion solvers may reject a model (kFailedPrecondition, e.g. a total-reward model
      // with no proper policy); the method itself was checked to apply.
      if (solved.status().code() != StatusCode::kFailedPrecondition) {
        Fail(label + ": " + solved.status().ToString());
      }
      continue;
    }
    CheckShape(m, *solved, label);
    if (solved->outcome == SolveOutcome::kConverged) converged.push_back(*solved);
  }
  // Converged solutions of one model agree within their own bounds.
  for (size_t i = 1; i < converged.size(); ++i) {
    const Solution& a = converged.front();
    const Solution& b = converged[i];
    if (m.criterion().kind == CriterionKind::kAverage) {
      const double slack = 1e-9 * (1.0 + std::fabs(a.average.gain));
      if (a.average.gain_lower > b.average.gain_upper + slack ||
          b.average.gain_lower > a.average.gain_upper + slack) {
        Fail("two converged average-reward solutions have disjoint gain brackets");
      }
      continue;
    }
    if (!std::isfinite(a.value_error_bound) || !std::isfinite(b.value_error_bound)) continue;
    for (size_t st = 0; st < a.values.size(); ++st) {
      const double va = a.values[st], vb = b.values[st];
      if (std::isnan(va) || std::isnan(vb)) {
        if (std::isnan(va) != std::isnan(vb)) Fail("converged solutions disagree on a NaN value");
        continue;
      }
      const double slack = 1e-9 * (1.0 + std::max(std::fabs(va), std::fabs(vb)));
      if (std::fabs(va - vb) > a.value_error_bound + b.value_error_bound + slack) {
        Fail("two converged solutions differ by more than their bounds (" +
             std::string(MethodName(a.method)) + " and " + std::string(MethodName(b.method)) + ")");
      }
    }
  }
  // Discounted: VerifyValues' bound on each converged solution's values is consistent with
  // the others' (|V_a - V_b| <= bound_a + bound_b).
  if (m.criterion().kind != CriterionKind::kDiscounted) return;
  VerifyOptions verify;
  verify.tolerance = 1e-6;
  std::vector<double> verified;
  for (const Solution& s : converged) {
    const ValuesReport report = VerifyValues(m, s.values, verify);
    if (!std::isfinite(report.value_error_bound)) {
      Fail("verifying a converged discounted solution gives no finite bound");
    }
    verified.push_back(report.value_error_bound);
  }
  for (size_t i = 0; i < converged.size(); ++i) {
    for (size_t j = i + 1; j < converged.size(); ++j) {
      for (size_t st = 0; st < converged[i].values.size(); ++st) {
        const double va = converged[i].values[st], vb = converged[j].values[st];
        const double slack = 1e-9 * (1.0 + std::max(std::fabs(va), std::fabs(vb)));
        if (std::fabs(va - vb) > verified[i] + verified[j] + slack) {
          Fail("two converged solutions differ by more than the bounds verification gives");
        }
      }
    }
  }
}

}  // namespace mdp::fuzz
