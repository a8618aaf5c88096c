#include "server/json_reader.h"

#include <utility>

namespace mdp::server {

std::string EscapePointerToken(std::string_view token) {
  std::string out;
  out.reserve(token.size());
  for (char c : token) {
    if (c == '~') {
      out += "~0";
    } else if (c == '/') {
      out += "~1";
    } else {
      out += c;
    }
  }
  return out;
}

namespace {

class DomBuilder : public nlohmann::json_sax<Json> {
 public:
  explicit DomBuilder(const JsonReadOptions& options) : options_(options) {}

  bool null() override { return Scalar(Json(nullptr)); }
  bool boolean(bool b) override { return Scalar(Json(b)); }
  bool number_integer(number_integer_t v) override { return Scalar(Json(v)); }
  bool number_unsigned(number_unsigned_t v) override { return Scalar(Json(v)); }
  bool number_float(number_float_t v, const string_t&) override { return Scalar(Json(v)); }
  bool string(string_t& v) override { return Scalar(Json(std::move(v))); }
  bool binary(binary_t&) override { return Fail(Pointer(), "binary values are not JSON"); }

  bool start_object(std::size_t) override { return Open(Json::object()); }
  bool start_array(std::size_t) override { return Open(Json::array()); }
  bool end_object() override { return Close(); }
  bool end_array() override { return Close(); }

  bool key(string_t& k) override {
    Frame& top = frames_.back();
    if (top.node->contains(k)) {
      return Fail(Pointer(false) + "/" + EscapePointerToken(k), "duplicate key '" + k + "'");
    }
    top.key = std::move(k);
    return true;
  }

  bool parse_error(std::size_t, const std::string&,
                   const nlohmann::detail::exception& ex) override {
    std::string what = ex.what();
    const size_t close = what.find("] ");
    if (close != std::string::npos) what = what.substr(close + 2);
    malformed_ = true;
    return Fail(Pointer(), "malformed JSON: " + EscapeInvalidUtf8(what));
  }

  Json TakeRoot() { return std::move(root_); }
  std::vector<DocumentIssue> TakeErrors() { return std::move(errors_); }
  bool malformed() const { return malformed_; }

 private:
  struct Frame {
    Json* node;
    std::string key;        // Current key (objects).
    bool streamed = false;  // This array's elements go to on_element.
  };

  bool Fail(std::string pointer, std::string message) {
    if (errors_.empty()) errors_.push_back({std::move(pointer), std::move(message)});
    return false;
  }

  // Pointer to the place the next value goes (all frames), or to the innermost open
  // container itself (all but the last). An array that is not innermost already holds its
  // open element, so that element is its last one.
  std::string Pointer(bool include_innermost = true) const {
    std::string out;
    const size_t n = include_innermost ? frames_.size() : frames_.size() - 1;
    for (size_t j = 0; j < n; ++j) {
      const Frame& f = frames_[j];
      out += '/';
      if (f.node->is_array()) {
        const size_t size = f.node->size();
        out += std::to_string(j + 1 == frames_.size() ? size : size - 1);
      } else {
        out += EscapePointerToken(f.key);
      }
    }
    return out;
  }

  bool InStreamedArray() const { return !frames_.empty() && frames_.back().streamed; }

  // Places `v` where the next value goes; returns its address, or null on refusal.
  Json* Insert(Json&& v) {
    if (frames_.empty()) {
      root_ = std::move(v);
      return &root_;
    }
    Frame& top = frames_.back();
    if (top.node->is_array()) {
      const int64_t cap = top.streamed ? options_.max_streamed_items : options_.max_array_items;
      if (static_cast<int64_t>(top.node->size()) >= cap) {
        Fail(Pointer(), "array has more than " + std::to_string(cap) + " items");
        return nullptr;
      }
      top.node->push_back(std::move(v));
      return &top.node->back();
    }
    Json& slot = (*top.node)[top.key];
    slot = std::move(v);
    return &slot;
  }

  bool Scalar(Json&& v) {
    const bool streamed = InStreamedArray();
    Json* placed = Insert(std::move(v));
    if (placed == nullptr) return false;
    if (streamed) return Hand(*placed);
    return true;
  }

  bool Open(Json&& container) {
    if (static_cast<int>(frames_.size()) >= options_.max_depth) {
      malformed_ = true;
      return Fail(Pointer(),
                  "nesting is deeper than " + std::to_string(options_.max_depth) + " levels");
    }
    const bool stream = container.is_array() && frames_.size() == 1 &&
                        frames_[0].node->is_object() && !options_.stream_member.empty() &&
                        frames_[0].key == options_.stream_member && options_.on_element;
    Json* placed = Insert(std::move(container));
    if (placed == nullptr) return false;
    frames_.push_back(Frame{placed, {}, stream});
    return true;
  }

  bool Close() {
    frames_.pop_back();
    if (InStreamedArray()) return Hand(frames_.back().node->back());
    return true;
  }

  // Gives a completed element of the streamed array to the callback; leaves null behind.
  bool Hand(Json& element) {
    const int64_t index = static_cast<int64_t>(frames_.back().node->size()) - 1;
    const bool go_on = options_.on_element(std::move(element), index);
    element = nullptr;
    if (!go_on && errors_.empty()) errors_.push_back({Pointer(), "reading stopped"});
    return go_on;
  }

  const JsonReadOptions& options_;
  Json root_;
  std::vector<Frame> frames_;
  std::vector<DocumentIssue> errors_;
  bool malformed_ = false;
};

}  // namespace

JsonReadResult ReadJson(std::string_view text, const JsonReadOptions& options) {
  DomBuilder builder(options);
  JsonReadResult result;
  bool ok = false;
  try {
    ok = Json::sax_parse(text.begin(), text.end(), &builder, Json::input_format_t::json, true);
  } catch (const std::bad_alloc&) {
    result.errors.push_back({"", "out of memory while reading the document"});
    return result;
  }
  result.errors = builder.TakeErrors();
  result.malformed = builder.malformed();
  if (!ok && result.errors.empty()) {
    result.errors.push_back({"", "malformed JSON"});
    result.malformed = true;
  }
  if (result.errors.empty()) result.root = builder.TakeRoot();
  return result;
}

namespace {

// Length of the well-formed UTF-8 sequence at the start of `s` (RFC 3629: no overlong forms,
// no surrogates, nothing above U+10FFFF), or 0 if it does not start with one.
size_t Utf8SequenceLength(std::string_view s) {
  const auto byte = [&](size_t i) { return static_cast<unsigned char>(s[i]); };
  const unsigned char b0 = byte(0);
  if (b0 < 0x80) return 1;
  size_t n = 0;
  unsigned char lo = 0x80, hi = 0xBF;  // Range of the second byte.
  if (b0 >= 0xC2 && b0 <= 0xDF) {
    n = 2;
  } else if (b0 >= 0xE0 && b0 <= 0xEF) {
    n = 3;
    if (b0 == 0xE0) lo = 0xA0;
    if (b0 == 0xED) hi = 0x9F;
  } else if (b0 >= 0xF0 && b0 <= 0xF4) {
    n = 4;
    if (b0 == 0xF0) lo = 0x90;
    if (b0 == 0xF4) hi = 0x8F;
  } else {
    return 0;
  }
  if (s.size() < n || byte(1) < lo || byte(1) > hi) return 0;
  for (size_t i = 2; i < n; ++i) {
    if (byte(i) < 0x80 || byte(i) > 0xBF) return 0;
  }
  return n;
}

}  // namespace

std::string EscapeInvalidUtf8(std::string_view text) {
  static constexpr char kHex[] = "0123456789ABCDEF";
  std::string out;
  out.reserve(text.size());
  while (!text.empty()) {
    const size_t n = Utf8SequenceLength(text);
    if (n > 0) {
      out.append(text.substr(0, n));
      text.remove_prefix(n);
      continue;
    }
    const auto b = static_cast<unsigned char>(text.front());
    out += "\\x";
    out += kHex[b >> 4];
    out += kHex[b & 15];
    text.remove_prefix(1);
  }
  return out;
}

std::string DumpJson(const Json& json, int indent) {
  return json.dump(indent, ' ', false, Json::error_handler_t::replace);
}

}  // namespace mdp::server
