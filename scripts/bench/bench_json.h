// A minimal JSON object writer for the benchmark driver's one-line reports (the report
// script reads them). Keys and string values must not need escaping beyond quotes and
// backslashes. A plain value; not synchronised.
#ifndef MDP_SCRIPTS_BENCH_BENCH_JSON_H_
#define MDP_SCRIPTS_BENCH_BENCH_JSON_H_

#include <cmath>
#include <cstdint>
#include <cstdio>
#include <string>
#include <string_view>
#include <vector>

namespace mdp::bench {

class JsonObject {
 public:
  JsonObject& Add(std::string_view key, double value) { return AddRaw(key, Number(value)); }
  JsonObject& Add(std::string_view key, int64_t value) {
    return AddRaw(key, std::to_string(value));
  }
  JsonObject& Add(std::string_view key, int value) { return Add(key, int64_t{value}); }
  JsonObject& Add(std::string_view key, std::string_view value) {
    return AddRaw(key, Quote(value));
  }
  JsonObject& Add(std::string_view key, const char* value) {
    return Add(key, std::string_view(value));
  }
  JsonObject& Add(std::string_view key, const JsonObject& value) {
    return AddRaw(key, value.str());
  }
  JsonObject& Add(std::string_view key, const std::vector<JsonObject>& values) {
    std::string list = "[";
    for (size_t i = 0; i < values.size(); ++i) list += (i ? ", " : "") + values[i].str();
    return AddRaw(key, list + "]");
  }
  JsonObject& Add(std::string_view key, const std::vector<double>& values) {
    std::string list = "[";
    for (size_t i = 0; i < values.size(); ++i) list += (i ? ", " : "") + Number(values[i]);
    return AddRaw(key, list + "]");
  }
  // `json` must already be valid JSON.
  JsonObject& AddRaw(std::string_view key, std::string_view json) {
    if (!body_.empty()) body_ += ", ";
    body_ += Quote(key) + ": " + std::string(json);
    return *this;
  }
  std::string str() const { return "{" + body_ + "}"; }

 private:
  static std::string Number(double value) {
    if (!std::isfinite(value)) return "null";
    char text[32];
    std::snprintf(text, sizeof text, "%.9g", value);
    return text;
  }
  static std::string Quote(std::string_view s) {
    std::string out = "\"";
    for (char c : s) {
      if (c == '"' || c == '\\') out += '\\';
      out += c;
    }
    return out + "\"";
  }
  std::string body_;
};

}  // namespace mdp::bench

#endif  // MDP_SCRIPTS_BENCH_BENCH_JSON_H_
