// Log lines from the libraries slopecastd links, routed into its own log.
//
// The protobuf library writes a line to stderr for every string field with
// invalid UTF-8 it parses: a camera sending such a source_id made one line
// per frame, bypassing the daemon's rate-limited reject log. Routed here,
// the first line is logged, later ones at most once a second with a count
// of those left out.
#pragma once

#include <spdlog/pattern_formatter.h>

namespace slopecast::app {

// "%*" in a log pattern: the syslog priority of the line's level, as the
// systemd journal reads it from a "<N>" prefix (sd-daemon(3)).
class SyslogPriorityFlag : public spdlog::custom_flag_formatter {
 public:
  void format(const spdlog::details::log_msg& msg, const std::tm&, spdlog::memory_buf_t& dest) override {
    char digit = '6';
    switch (msg.level) {
      case spdlog::level::critical: digit = '2'; break;
      case spdlog::level::err: digit = '3'; break;
      case spdlog::level::warn: digit = '4'; break;
      case spdlog::level::info: digit = '6'; break;
      default: digit = '7'; break;
    }
    dest.push_back(digit);
  }
  std::unique_ptr<custom_flag_formatter> clone() const override { return std::make_unique<SyslogPriorityFlag>(); }
};


// Installs the handler; call once at start, before any thread parses.
void route_protobuf_logs();

}  // namespace slopecast::app
