// Tests of server/json_reader.h's output helpers: text that quotes raw input must stay valid
// UTF-8, and serialization must never throw on it.
#include "server/json_reader.h"

#include <gtest/gtest.h>

#include <string>

namespace mdp::server {
namespace {

// The well-formed sequences are those of the table in RFC 3629 (F. Yergeau, "UTF-8, a
// transformation format of ISO 10646", 2003), section 4: one to four bytes, no overlong
// forms, no surrogates (U+D800..U+DFFF), nothing above U+10FFFF.
TEST(EscapeInvalidUtf8Test, KeepsWellFormedSequences) {
  const std::string text =
      "plain ASCII, \xC3\xA9 (U+00E9), \xE2\x82\xAC (U+20AC), "
      "\xED\x9F\xBF (U+D7FF), \xEE\x80\x80 (U+E000), "
      "\xF0\x9D\x84\x9E (U+1D11E), \xF4\x8F\xBF\xBF (U+10FFFF)";
  EXPECT_EQ(EscapeInvalidUtf8(text), text);
}

TEST(EscapeInvalidUtf8Test, EscapesEachByteOutsideAWellFormedSequence) {
  EXPECT_EQ(EscapeInvalidUtf8("a\xF8z"), "a\\xF8z");                         // Never a UTF-8 byte.
  EXPECT_EQ(EscapeInvalidUtf8("\x80"), "\\x80");                             // A lone continuation.
  EXPECT_EQ(EscapeInvalidUtf8("\xE2\x82'"), "\\xE2\\x82'");                  // Cut short.
  EXPECT_EQ(EscapeInvalidUtf8("\xC0\xAF"), "\\xC0\\xAF");                    // Overlong '/'.
  EXPECT_EQ(EscapeInvalidUtf8("\xE0\x9F\xBF"), "\\xE0\\x9F\\xBF");           // Overlong U+07FF.
  EXPECT_EQ(EscapeInvalidUtf8("\xED\xA0\x80"), "\\xED\\xA0\\x80");           // Surrogate U+D800.
  EXPECT_EQ(EscapeInvalidUtf8("\xF4\x90\x80\x80"), "\\xF4\\x90\\x80\\x80");  // U+110000.
  EXPECT_EQ(EscapeInvalidUtf8("\xC3\xA9\xC3"), "\xC3\xA9\\xC3");  // Good, then cut short.
}

TEST(DumpJsonTest, WritesBytesThatAreNotUtf8AsReplacementCharacters) {
  const Json doc = {{"message", std::string("last read: '\"a\xF8'")}};
  EXPECT_THROW((void)doc.dump(), Json::type_error);  // Why DumpJson exists.
  EXPECT_EQ(DumpJson(doc), "{\"message\":\"last read: '\\\"a\xEF\xBF\xBD'\"}");
}

TEST(DumpJsonTest, IndentsLikeDump) {
  const Json doc = {{"a", 1}, {"b", {true, "\xC3\xA9"}}};
  EXPECT_EQ(DumpJson(doc), doc.dump());
  EXPECT_EQ(DumpJson(doc, 2), doc.dump(2));
}

TEST(ReadJsonTest, AMessageQuotingABadByteIsValidUtf8) {
  const JsonReadResult r = ReadJson("{\"name\": \"Green\xF8house\"}", JsonReadOptions{});
  ASSERT_TRUE(r.malformed);
  ASSERT_EQ(r.errors.size(), 1u);
  EXPECT_EQ(r.errors[0].pointer, "/name");
  EXPECT_NE(r.errors[0].message.find("Green\\xF8"), std::string::npos) << r.errors[0].message;
  EXPECT_EQ(EscapeInvalidUtf8(r.errors[0].message), r.errors[0].message);
}

}  // namespace
}  // namespace mdp::server
