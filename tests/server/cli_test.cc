// Tests server/cli.{h,cc}: RunCli's commands, outputs and exit codes, with files in a fresh
// temporary directory and the output streams captured.
#include "server/cli.h"

#include <gtest/gtest.h>
#include <stdlib.h>

#include <cerrno>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <set>
#include <sstream>
#include <string>
#include <string_view>
#include <vector>

#include "server/json_reader.h"
#include "tests/testing/documents.h"

namespace mdp::server {
namespace {

using test_documents::kGreenhouse;
using test_documents::HasIssue;
using test_documents::Describe;



// Waiting when dry (kGreenhouse): V(dry) = 0.5 (0.5 V(dry) + 0.5 V(seedling)) and
// V(seedling) = 2 + 0.5 V(dry), so V(dry) = 0.8 and V(seedling) = 2.4.
constexpr std::string_view kWaitWhenDry = R"({"format": "mdpserve/policy@1",
  "policy": {"dry": "wait", "wet": "harvest", "seedling": "grow"}})";

// Replaces the only occurrence of `from` in `text`; false (and no change) unless it occurs
// exactly once.
bool ReplaceOnce(std::string& text, std::string_view from, std::string_view to) {
  const size_t at = text.find(from);
  if (at == std::string::npos || text.find(from, at + 1) != std::string::npos) return false;
  text.replace(at, from.size(), to);
  return true;
}

struct CliRun {
  int code = -1;
  std::string out;
  std::string err;
};

class CliTest : public ::testing::Test {
 protected:
  void SetUp() override {
    std::string pattern =
        (std::filesystem::temp_directory_path() / "mdpserve-cli-test-XXXXXX").string();
    ASSERT_NE(::mkdtemp(pattern.data()), nullptr) << std::strerror(errno);
    dir_ = pattern;
    model_ = Write("greenhouse.json", kGreenhouse);
  }

  void TearDown() override {
    std::error_code ignored;
    if (!dir_.empty()) std::filesystem::remove_all(dir_, ignored);
  }

  // Writes `text` to a file named `name` in the test directory; returns its path.
  std::string Write(const std::string& name, std::string_view text) {
    const std::string path = dir_ + "/" + name;
    std::ofstream(path) << text;
    return path;
  }

  std::string Read(const std::string& path) {
    std::ifstream in(path);
    std::ostringstream text;
    text << in.rdbuf();
    return text.str();
  }

  std::set<std::string> Entries() {
    std::set<std::string> names;
    for (const auto& entry : std::filesystem::directory_iterator(dir_)) {
      names.insert(entry.path().filename().string());
    }
    return names;
  }

  // Runs `mdpserve args...` in-process.
  CliRun Run(std::vector<std::string> args) {
    args.insert(args.begin(), "mdpserve");
    std::vector<char*> argv;
    for (std::string& a : args) argv.push_back(a.data());
    argv.push_back(nullptr);
    std::ostringstream out, err;
    CliRun run;
    run.code = RunCli(static_cast<int>(args.size()), argv.data(), out, err);
    run.out = out.str();
    run.err = err.str();
    return run;
  }

  // Solves the model into a solution file; returns its path.
  std::string SolveToFile() {
    const std::string path = dir_ + "/solution.json";
    const CliRun run = Run({"solve", model_, "--out", path});
    EXPECT_EQ(run.code, kExitOk) << run.err;
    return path;
  }

  static Json Parse(const std::string& text) { return Json::parse(text, nullptr, false); }

  std::string dir_;
  std::string model_;
};

TEST_F(CliTest, ValidateAcceptsAGoodModel) {
  const CliRun run = Run({"validate", model_});
  EXPECT_EQ(run.code, kExitOk);
  EXPECT_EQ(run.err, "");
  const Json doc = Parse(run.out);
  EXPECT_EQ(doc["format"], "mdpserve/errors@1");
  EXPECT_EQ(doc["errors"], Json::array());
  EXPECT_EQ(doc["truncated"], 0);
}

TEST_F(CliTest, ValidateRejectsABadModelWithPointersOnStderr) {
  std::string text(kGreenhouse);
  ASSERT_TRUE(ReplaceOnce(text, R"("maximize")", R"("maximise")"));
  ASSERT_TRUE(ReplaceOnce(text, R"({"next": "wet", "probability": 1})",
                          R"({"next": "wet", "probability": 1.5})"));
  const std::string path = Write("bad.json", text);
  const CliRun run = Run({"validate", path});
  EXPECT_EQ(run.code, kExitBadInput);
  EXPECT_NE(run.err.find(path + ": /objective: must be \"maximize\" or \"minimize\"\n"),
            std::string::npos)
      << run.err;
  EXPECT_NE(run.err.find(path + ": /states/0/actions/0/outcomes/0/probability: "
                                "probability exceeds 1"),
            std::string::npos)
      << run.err;
  const Json doc = Parse(run.out);
  ASSERT_TRUE(doc["errors"].is_array()) << run.out;
  EXPECT_GE(doc["errors"].size(), 2u);
  EXPECT_EQ(doc["errors"][0]["pointer"], "/objective");
}

TEST_F(CliTest, ValidateNamesTheWholeDocumentForUnreadableText) {
  const std::string path = Write("empty.json", "");
  const CliRun run = Run({"validate", path});
  EXPECT_EQ(run.code, kExitBadInput);
  EXPECT_EQ(run.err.rfind(path + ": (document): the document is empty", 0), 0u) << run.err;
}

// A byte that is not UTF-8 in a string: the parser's message quotes it, and writing that
// message as JSON threw, so the command aborted (found by tests/fuzz/service_api_fuzz, where
// the same text made the service answer 500).
TEST_F(CliTest, ValidateReportsAByteThatIsNotUtf8InsteadOfAborting) {
  std::string text(kGreenhouse);
  ASSERT_TRUE(ReplaceOnce(text, R"("name": "Greenhouse")", "\"name\": \"Green\xF8house\""));
  const std::string path = Write("not-utf8.json", text);
  const CliRun run = Run({"validate", path});
  EXPECT_EQ(run.code, kExitBadInput);
  EXPECT_NE(run.err.find(path + ": /name: malformed JSON: "), std::string::npos) << run.err;
  EXPECT_NE(run.err.find("Green\\xF8"), std::string::npos) << run.err;
  const Json doc = Parse(run.out);
  ASSERT_TRUE(doc["errors"].is_array()) << run.out;
  EXPECT_EQ(doc["errors"][0]["pointer"], "/name");
}

TEST_F(CliTest, SolvePrintsTheSolutionDocument) {
  const CliRun run = Run({"solve", model_});
  EXPECT_EQ(run.code, kExitOk);
  EXPECT_EQ(run.err, "");
  const Json doc = Parse(run.out);
  EXPECT_EQ(doc["format"], "mdpserve/solution@1");
  EXPECT_EQ(doc["outcome"], "converged");
  EXPECT_NEAR(doc["values"]["dry"].get<double>(), 4.0, 1e-8);
  EXPECT_NEAR(doc["values"]["wet"].get<double>(), 10.0, 1e-8);
  EXPECT_EQ(doc["policy"]["dry"], "water");
  EXPECT_EQ(doc["states"].size(), 4u);
}

TEST_F(CliTest, SolveSummaryLeavesOutTheStateTable) {
  const CliRun run = Run({"solve", model_, "--detail", "summary", "--method", "value_iteration"});
  EXPECT_EQ(run.code, kExitOk) << run.err;
  const Json doc = Parse(run.out);
  EXPECT_EQ(doc["method"], "value_iteration");
  EXPECT_FALSE(doc.contains("states"));
  EXPECT_TRUE(doc.contains("values"));
}

TEST_F(CliTest, SolveOutReplacesTheFileAndLeavesNoTemporaryBehind) {
  const std::string path = Write("solution.json", "stale");
  const CliRun run = Run({"solve", model_, "--out", path});
  EXPECT_EQ(run.code, kExitOk) << run.err;
  EXPECT_EQ(run.out, "");
  const Json doc = Parse(Read(path));
  EXPECT_EQ(doc["format"], "mdpserve/solution@1");
  EXPECT_EQ(Entries(), (std::set<std::string>{"greenhouse.json", "solution.json"}));
}

TEST_F(CliTest, SolveOutIntoAMissingDirectoryIsBadInput) {
  const CliRun run = Run({"solve", model_, "--out", dir_ + "/no/such/dir/solution.json"});
  EXPECT_EQ(run.code, kExitBadInput);
  EXPECT_NE(run.err.find("cannot write"), std::string::npos) << run.err;
}

TEST_F(CliTest, SolveTablePrintsOneLinePerState) {
  const CliRun run = Run({"solve", model_, "--table"});
  EXPECT_EQ(run.code, kExitOk) << run.err;
  EXPECT_EQ(run.out.rfind("state", 0), 0u) << run.out;
  EXPECT_NE(run.out.find("water"), std::string::npos) << run.out;
  EXPECT_NE(run.out.find("(terminal)"), std::string::npos) << run.out;
  EXPECT_NE(run.out.find("outcome converged"), std::string::npos) << run.out;
}

TEST_F(CliTest, SolveRejectsAnUnknownMethod) {
  const CliRun run = Run({"solve", model_, "--method", "guessing"});
  EXPECT_EQ(run.code, kExitBadInput);
  EXPECT_NE(run.err, "");
}

TEST_F(CliTest, VerifyValuesPassesForTheSolution) {
  const std::string solution = SolveToFile();
  const CliRun run = Run({"verify", model_, "--values", solution});
  EXPECT_EQ(run.code, kExitOk) << run.err;
  const Json doc = Parse(run.out);
  EXPECT_EQ(doc["kind"], "values");
  EXPECT_EQ(doc["verdict"], "pass");
}

TEST_F(CliTest, VerifyValuesFailsForPerturbedValues) {
  const std::string values = Write("values.json", R"({"format": "mdpserve/values@1",
      "values": {"dry": 4.5, "wet": 10, "seedling": 4}})");
  const CliRun run = Run({"verify", model_, "--values", values});
  EXPECT_EQ(run.code, kExitVerdictFailed) << run.err;
  const Json doc = Parse(run.out);
  EXPECT_EQ(doc["verdict"], "fail");
  EXPECT_EQ(doc["worst_states"][0]["state"], "dry");
}

TEST_F(CliTest, VerifyPolicyPassesForTheOptimalPolicy) {
  const std::string solution = SolveToFile();
  const CliRun from_solution = Run({"verify", model_, "--policy", solution});
  EXPECT_EQ(from_solution.code, kExitOk) << from_solution.err;
  EXPECT_EQ(Parse(from_solution.out)["verdict"], "pass");
  const std::string policy = Write("policy.json", R"({"format": "mdpserve/policy@1",
      "policy": {"dry": "water", "wet": "harvest", "seedling": "grow"}})");
  const CliRun by_hand = Run({"verify", model_, "--policy", policy});
  EXPECT_EQ(by_hand.code, kExitOk) << by_hand.err;
}

TEST_F(CliTest, VerifyPolicyFailsForABadPolicy) {
  const std::string policy = Write("policy.json", kWaitWhenDry);
  const CliRun run = Run({"verify", model_, "--policy", policy});
  EXPECT_EQ(run.code, kExitVerdictFailed) << run.err;
  const Json doc = Parse(run.out);
  EXPECT_EQ(doc["kind"], "policy");
  EXPECT_EQ(doc["verdict"], "fail");
  EXPECT_EQ(doc["suboptimal_states"][0]["state"], "dry");
}

TEST_F(CliTest, VerifyRejectsAnUnreadableCandidate) {
  const std::string values = Write("values.json", R"({"values": {"dry": 4, "wet": 10,
      "seedling": 4, "attic": 1}})");
  const CliRun run = Run({"verify", model_, "--values", values});
  EXPECT_EQ(run.code, kExitBadInput);
  EXPECT_NE(run.err.find(values + ": /values/attic: the model has no state 'attic'"),
            std::string::npos)
      << run.err;
  EXPECT_EQ(run.out, "");
}

TEST_F(CliTest, VerifyNeedsExactlyOneCandidate) {
  const std::string solution = SolveToFile();
  const CliRun both = Run({"verify", model_, "--values", solution, "--policy", solution});
  EXPECT_EQ(both.code, kExitBadInput);
  EXPECT_NE(both.err.find("exactly one of --values FILE or --policy FILE"), std::string::npos)
      << both.err;
  const CliRun neither = Run({"verify", model_});
  EXPECT_EQ(neither.code, kExitBadInput);
}

TEST_F(CliTest, EvaluateGivesThePolicyValues) {
  const std::string policy = Write("policy.json", kWaitWhenDry);
  const CliRun run = Run({"evaluate", model_, "--policy", policy});
  EXPECT_EQ(run.code, kExitOk) << run.err;
  const Json doc = Parse(run.out);
  EXPECT_EQ(doc["format"], "mdpserve/evaluation@1");
  EXPECT_NEAR(doc["values"]["dry"].get<double>(), 0.8, 1e-9);
  EXPECT_NEAR(doc["values"]["seedling"].get<double>(), 2.4, 1e-9);
}

// Greenhouse from `dry` under the optimal policy: water (-1), then harvest (+10 at step 1),
// so every episode returns -1 + 0.5 * 10 = 4 in two steps.
TEST_F(CliTest, SimulateSolvesAndRollsOutTheOptimalPolicy) {
  const CliRun run = Run({"simulate", model_, "--episodes", "100"});
  EXPECT_EQ(run.code, kExitOk) << run.err;
  EXPECT_EQ(run.err, "");
  const Json doc = Parse(run.out);
  EXPECT_EQ(doc["format"], "mdpserve/simulation@1");
  EXPECT_EQ(doc["outcome"], "completed");
  EXPECT_EQ(doc["episodes"], 100);
  EXPECT_EQ(doc["options"]["start"], Json({{"dry", 1.0}}));
  EXPECT_EQ(doc["return"]["mean"], 4.0);
  EXPECT_EQ(doc["return"]["std_dev"], 0.0);
  EXPECT_EQ(doc["episode_length"]["mean"], 2.0);
  EXPECT_EQ(doc["episode_length"]["truncated_episodes"], 0);
  EXPECT_EQ(doc["visits"]["total_steps"], 200);
  EXPECT_EQ(doc["visits"]["most_visited"],
            Json::parse(R"([{"state": "dry", "visits": 100, "frequency": 0.5},
                            {"state": "wet", "visits": 100, "frequency": 0.5}])"));
}

// Waiting when dry: V(dry) = 0.8 (see kWaitWhenDry), inside the 99.9% interval; the seed alone
// decides the numbers. Episodes never end (dry and seedling alternate), so each is cut, at a
// cost below 0.5^60 * 2 / 0.5.
TEST_F(CliTest, SimulateIsReproducibleWithASeed) {
  const std::string policy = Write("policy.json", kWaitWhenDry);
  auto simulate = [&](const std::string& seed) {
    const CliRun run = Run({"simulate", model_, "--policy", policy, "--episodes", "4000",
                            "--max-steps", "60", "--confidence", "0.999", "--seed", seed});
    EXPECT_EQ(run.err, "");  // No truncation warning: the cut is negligible.
    EXPECT_EQ(run.code, kExitOk) << run.err;
    Json doc = Parse(run.out);
    doc.erase("simulate_seconds");
    return doc;
  };
  const Json first = simulate("5");
  EXPECT_EQ(first["options"]["seed"], 5);
  EXPECT_LE(first["return"]["confidence_interval"]["low"].get<double>(), 0.8);
  EXPECT_GE(first["return"]["confidence_interval"]["high"].get<double>(), 0.8);
  EXPECT_EQ(simulate("5"), first);
  EXPECT_NE(simulate("6")["return"]["mean"], first["return"]["mean"]);
}

TEST_F(CliTest, SimulateReadsStartStatesAndDistributions) {
  const CliRun named = Run({"simulate", model_, "--start", "seedling", "wet", "--episodes", "10"});
  EXPECT_EQ(named.code, kExitOk) << named.err;
  EXPECT_EQ(Parse(named.out)["options"]["start"], Json({{"seedling", 0.5}, {"wet", 0.5}}));
  const std::string start = Write("start.json", R"({"format": "mdpserve/start@1",
      "start": {"dry": 0.25, "done": 0.75}})");
  const CliRun file = Run({"simulate", model_, "--start-distribution", start, "--episodes", "10"});
  EXPECT_EQ(file.code, kExitOk) << file.err;
  EXPECT_EQ(Parse(file.out)["options"]["start"], Json({{"dry", 0.25}, {"done", 0.75}}));

  const CliRun unknown = Run({"simulate", model_, "--start", "attic"});
  EXPECT_EQ(unknown.code, kExitBadInput);
  EXPECT_NE(unknown.err.find("--start: the model has no state 'attic'"), std::string::npos)
      << unknown.err;
  const std::string bad = Write("bad-start.json", R"({"format": "mdpserve/start@1",
      "start": {"dry": 0.5, "wet": 0.4}})");
  const CliRun bad_sum = Run({"simulate", model_, "--start-distribution", bad});
  EXPECT_EQ(bad_sum.code, kExitBadInput);
  EXPECT_NE(bad_sum.err.find(bad + ": /start: probabilities sum to 0.9"), std::string::npos)
      << bad_sum.err;
  EXPECT_EQ(bad_sum.out, "");
}

TEST_F(CliTest, SimulateRefusesBadOptions) {
  const std::string solution = SolveToFile();
  for (const std::vector<std::string>& args :
       {std::vector<std::string>{"--confidence", "1"}, {"--episodes", "0"},
        {"--quantiles", "0.5,1.5"}, {"--policy", solution, "--solution", solution}}) {
    std::vector<std::string> argv = {"simulate", model_};
    argv.insert(argv.end(), args.begin(), args.end());
    const CliRun run = Run(argv);
    EXPECT_EQ(run.code, kExitBadInput) << args[0];
    EXPECT_NE(run.err, "") << args[0];
    EXPECT_EQ(run.out, "") << args[0];
  }
}

TEST_F(CliTest, SimulateProgressGoesToStderr) {
  const CliRun run = Run({"simulate", model_, "--episodes", "200", "--progress"});
  EXPECT_EQ(run.code, kExitOk) << run.err;
  EXPECT_EQ(run.err.rfind("simulate: 5% (10/200 episodes, ", 0), 0u) << run.err;
  EXPECT_NE(run.err.find("simulate: 100% (200/200 episodes, "), std::string::npos) << run.err;
  EXPECT_EQ(Parse(run.out)["episodes"], 200);
}

// Cut after one step, the wait policy may miss up to g * max|r| / (1 - g) = 0.5 * 10 / 0.5 = 10
// per episode (10 for harvesting, the largest reward the policy may earn): far more than the
// interval's width, so the command warns (and still succeeds).
TEST_F(CliTest, SimulateWarnsWhenCutEpisodesMayBiasTheMean) {
  const std::string policy = Write("policy.json", kWaitWhenDry);
  const CliRun run = Run({"simulate", model_, "--policy", policy, "--max-steps", "1"});
  EXPECT_EQ(run.code, kExitOk) << run.err;
  EXPECT_NE(run.err.find("warning: 10000 of 10000 episodes were cut at --max-steps 1; the mean "
                         "may be off by up to 10 "),
            std::string::npos)
      << run.err;
  EXPECT_EQ(Parse(run.out)["truncation_bias_bound"], 10.0);
}

TEST_F(CliTest, UnknownOptionIsBadInput) {
  const CliRun run = Run({"solve", model_, "--frobnicate"});
  EXPECT_EQ(run.code, kExitBadInput);
  EXPECT_NE(run.err.find("frobnicate"), std::string::npos) << run.err;
  EXPECT_EQ(run.out, "");
}

TEST_F(CliTest, MissingFileIsBadInput) {
  const std::string missing = dir_ + "/absent.json";
  const CliRun run = Run({"validate", missing});
  EXPECT_EQ(run.code, kExitBadInput);
  EXPECT_NE(run.err.find("cannot open " + missing), std::string::npos) << run.err;
  const CliRun policy = Run({"evaluate", model_, "--policy", missing});
  EXPECT_EQ(policy.code, kExitBadInput);
}

TEST_F(CliTest, MissingCommandIsBadInput) {
  const CliRun run = Run({});
  EXPECT_EQ(run.code, kExitBadInput);
  EXPECT_NE(run.err, "");
}

TEST_F(CliTest, HelpExitsZeroAndListsTheCommands) {
  const CliRun run = Run({"--help"});
  EXPECT_EQ(run.code, kExitOk);
  for (const char* command : {"validate", "solve", "verify", "evaluate"}) {
    EXPECT_NE(run.out.find(command), std::string::npos) << command << " missing from\n" << run.out;
  }
  const CliRun solve_help = Run({"solve", "--help"});
  EXPECT_EQ(solve_help.code, kExitOk);
  EXPECT_NE(solve_help.out.find("--tolerance"), std::string::npos) << solve_help.out;
}

}  // namespace
}  // namespace mdp::server
