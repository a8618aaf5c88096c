// Route matching (http_context.h MatchRoute): the rules the route table relies on, checked
// case by case against what the former std::regex patterns accepted.
#include <gtest/gtest.h>

#include <array>
#include <string>

#include "server/http_context.h"

namespace mdp::server {
namespace {

std::array<std::string, 2> Params(const char* a = "", const char* b = "") { return {a, b}; }

TEST(MatchRouteTest, LiteralRoutesMatchOnlyThemselves) {
  std::array<std::string, 2> params = Params("left", "over");
  EXPECT_TRUE(MatchRoute("/v1/models", "/v1/models", &params));
  EXPECT_EQ(params, Params()) << "parameters of an earlier match are cleared";
  EXPECT_TRUE(MatchRoute("/healthz", "/healthz", &params));
  EXPECT_FALSE(MatchRoute("/v1/models", "/v1/models/", &params));
  EXPECT_FALSE(MatchRoute("/v1/models", "/v1/model", &params));
  EXPECT_FALSE(MatchRoute("/v1/models", "/v1/modelsx", &params));
  EXPECT_FALSE(MatchRoute("/v1/models", "/v1//models", &params));
  EXPECT_FALSE(MatchRoute("/v1/models", "/", &params));
  EXPECT_FALSE(MatchRoute("/v1/openapi.json", "/v1/openapi-json", &params));
}

TEST(MatchRouteTest, ParametersAreCapturedInOrder) {
  std::array<std::string, 2> params;
  ASSERT_TRUE(MatchRoute("/v1/models/{id}/solutions/{sid}/tables",
                         "/v1/models/0123abcdEF_-9/solutions/s-1/tables", &params));
  EXPECT_EQ(params, Params("0123abcdEF_-9", "s-1"));
  ASSERT_TRUE(MatchRoute("/v1/models/{id}", "/v1/models/x", &params));
  EXPECT_EQ(params, Params("x"));
  EXPECT_FALSE(MatchRoute("/v1/models/{id}", "/v1/models/x/policy", &params));
  EXPECT_FALSE(MatchRoute("/v1/models/{id}/policy", "/v1/models/x", &params));
  EXPECT_FALSE(MatchRoute("/v1/models/{id}/policy", "/v1/models/x/policy/", &params));
}

TEST(MatchRouteTest, ParameterSegmentsHoldOneTo64IdCharacters) {
  std::array<std::string, 2> params;
  EXPECT_TRUE(MatchRoute("/v1/jobs/{id}", "/v1/jobs/" + std::string(64, 'a'), &params));
  EXPECT_FALSE(MatchRoute("/v1/jobs/{id}", "/v1/jobs/" + std::string(65, 'a'), &params));
  EXPECT_FALSE(MatchRoute("/v1/jobs/{id}", "/v1/jobs/", &params));
  EXPECT_FALSE(MatchRoute("/v1/jobs/{id}/cancel", "/v1/jobs//cancel", &params));
  for (const char* bad : {"a.b", "a b", "a%2F", "\xc3\xa9", "a:b", "a\\b"}) {
    EXPECT_FALSE(MatchRoute("/v1/jobs/{id}", std::string("/v1/jobs/") + bad, &params)) << bad;
  }
}

}  // namespace
}  // namespace mdp::server
