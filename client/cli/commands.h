// The `slopecast` tool's subcommands. Each add_*_command() registers its
// options on the parent CLI11 app and sets a callback that runs it; each
// command is a thin layer over client/lib and client/sim.
#pragma once

#include <CLI/CLI.hpp>

namespace slopecast::cli {

// Exit code a command leaves in; main returns it.
int& exit_code();

void add_sim_command(CLI::App& app);
void add_watch_command(CLI::App& app);
void add_status_command(CLI::App& app);

// True once SIGINT or SIGTERM has arrived (installed by main).
bool stop_requested();

}  // namespace slopecast::cli
