// slopecast: the command-line companion of slopecastd.
#include <csignal>
#include <atomic>

#include "client/cli/commands.h"

namespace slopecast::cli {
namespace {
std::atomic<bool> g_stop{false};
void on_signal(int) { g_stop = true; }
}  // namespace

int& exit_code() {
  static int code = 0;
  return code;
}
bool stop_requested() { return g_stop.load(); }
}  // namespace slopecast::cli

int main(int argc, char** argv) {
  using namespace slopecast::cli;
  std::signal(SIGINT, on_signal);
  std::signal(SIGTERM, on_signal);
  CLI::App app{"slopecast: simulate a lenslet camera, watch and query slopecastd."};
  app.require_subcommand(1);
  add_sim_command(app);
  add_watch_command(app);
  add_status_command(app);
  CLI11_PARSE(app, argc, argv);
  return exit_code();
}
