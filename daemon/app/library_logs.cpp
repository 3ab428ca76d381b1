#include "daemon/app/library_logs.h"

#include <chrono>
#include <mutex>
#include <string>

#include <google/protobuf/stubs/logging.h>
#include <spdlog/spdlog.h>

namespace slopecast::app {

namespace {

std::mutex g_mutex;
std::chrono::steady_clock::time_point g_last{};
long g_left_out = 0;
bool g_any = false;

void on_protobuf_log(google::protobuf::LogLevel level, const char* file, int line, const std::string& message) {
  std::lock_guard<std::mutex> lock(g_mutex);
  const auto now = std::chrono::steady_clock::now();
  if (g_any && now - g_last < std::chrono::seconds(1)) {
    ++g_left_out;
    return;
  }
  const std::string more = g_left_out ? " (" + std::to_string(g_left_out) + " more since the last such line)" : "";
  const auto spd = level >= google::protobuf::LOGLEVEL_ERROR ? spdlog::level::warn : spdlog::level::info;
  spdlog::log(spd, "protobuf library ({}:{}): {}{}", file, line, message, more);
  g_any = true;
  g_last = now;
  g_left_out = 0;
}

}  // namespace

void route_protobuf_logs() { google::protobuf::SetLogHandler(&on_protobuf_log); }

}  // namespace slopecast::app
