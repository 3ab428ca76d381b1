// slopecast: the command-line companion of slopecastd.
//
// Signals: SIGINT and SIGTERM set a flag that every command's loop checks
// (the waits in client/lib return early on them); the command prints what it
// has and exits with the shell's convention, 128 + the signal number (130
// for Ctrl-C, 143 for SIGTERM), so scripts can tell a stop from success.
#include <csignal>
#include <atomic>
#include <string>

#include "client/cli/commands.h"

namespace slopecast::cli {
namespace {
std::atomic<int> g_stop_signal{0};
void on_signal(int sig) { g_stop_signal = sig; }
}  // namespace

int& exit_code() {
  static int code = 0;
  return code;
}
namespace {
std::string& invocation_text() {
  static std::string text;
  return text;
}
}  // namespace
const std::string& invocation() { return invocation_text(); }
void set_invocation(int argc, char** argv) {
  std::string& t = invocation_text();
  t = "slopecast";
  // Arguments with spaces or shell characters are single-quoted, so the
  // text can be pasted back into a shell.
  for (int i = 1; i < argc; ++i) {
    const std::string a = argv[i];
    if (!a.empty() && a.find_first_of(" \t\n'\"$`\\*?[]|&;<>(){}#~") == std::string::npos) {
      t += " " + a;
      continue;
    }
    t += " '";
    for (char c : a) t += c == '\'' ? std::string("'\\''") : std::string(1, c);
    t += "'";
  }
}
bool stop_requested() { return g_stop_signal.load() != 0; }
int stopped_exit_code() { return 128 + g_stop_signal.load(); }
}  // namespace slopecast::cli

int main(int argc, char** argv) {
  using namespace slopecast::cli;
  struct sigaction sa {};
  sa.sa_handler = on_signal;
  sigemptyset(&sa.sa_mask);
  sa.sa_flags = 0;  // no SA_RESTART: blocking calls return EINTR at once
  sigaction(SIGINT, &sa, nullptr);
  sigaction(SIGTERM, &sa, nullptr);
  set_invocation(argc, argv);
  CLI::App app{"slopecast: simulate a lenslet camera; watch, query and calibrate slopecastd; record, replay and "
               "export streams; score centroiders."};
  app.require_subcommand(1);
  add_sim_command(app);
  add_watch_command(app);
  add_status_command(app);
  add_centroider_command(app);
  add_roundtrip_command(app);
  add_calibrate_command(app);
  add_register_command(app);
  add_keys_command(app);
  add_record_command(app);
  add_replay_command(app);
  add_export_command(app);
  add_snap_command(app);
  add_eval_command(app);
  CLI11_PARSE(app, argc, argv);
  if (stop_requested() && exit_code() == 0) exit_code() = stopped_exit_code();
  return exit_code();
}
