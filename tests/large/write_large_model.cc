// Writes the large seeded model of large_model.h as a model document (mdpserve/model@1) to
// standard output: write_large_model STATES ACTIONS OUTCOMES SEED. For the end-to-end size
// check in scripts/large_model_check.sh.
#include <cstdio>
#include <cstdlib>
#include <string>

#include "tests/large/large_model.h"

int main(int argc, char** argv) {
  if (argc != 5) {
    std::fprintf(stderr, "usage: write_large_model STATES ACTIONS OUTCOMES SEED\n");
    return 2;
  }
  const long long states = std::atoll(argv[1]);
  const int actions = std::atoi(argv[2]);
  const int outcomes = std::atoi(argv[3]);
  const unsigned long long seed = std::strtoull(argv[4], nullptr, 10);
  std::FILE* out = stdout;
  static char buffer[1 << 20];
  std::setvbuf(out, buffer, _IOFBF, sizeof buffer);
  std::fprintf(out, "{\"format\":\"mdpserve/model@1\",\"name\":\"large-ring\",\"objective\":"
                    "\"maximize\",\"criterion\":{\"kind\":\"discounted\",\"discount\":0.95},"
                    "\"actions\":[");
  for (int a = 0; a < actions; ++a) std::fprintf(out, "%s\"a%d\"", a ? "," : "", a);
  std::fprintf(out, "],\"states\":[");
  bool first_action = true, first_outcome = true;
  mdp::testing::GenerateLarge(
      states, actions, outcomes, seed,
      [&](long long s) {
        std::fprintf(out, "%s{\"name\":\"b%lld\",\"actions\":[", s ? "]}]}," : "", s);
        first_action = true;
      },
      [&](int a, double r) {
        std::fprintf(out, "%s{\"action\":\"a%d\",\"reward\":%.17g,\"outcomes\":[",
                     first_action ? "" : "]},", a, r);
        first_action = false;
        first_outcome = true;
      },
      [&](long long next, double p, double r) {
        std::fprintf(out, "%s{\"next\":\"b%lld\",\"probability\":%.17g,\"reward\":%.17g}",
                     first_outcome ? "" : ",", next, p, r);
        first_outcome = false;
      });
  std::fprintf(out, "%s]}\n", states > 0 ? "]}]}" : "");
  return std::fclose(out) == 0 ? 0 : 1;
}
