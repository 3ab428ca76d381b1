// Starting the real slopecastd / slopecast programs from integration tests.
//
// A ChildProcess that is still running when it goes out of scope is killed
// (SIGKILL) and reaped, so a failed test never leaves a daemon behind. Output
// goes to a log file the test can print when something fails.
#pragma once

#include <sys/types.h>

#include <chrono>
#include <filesystem>
#include <optional>
#include <string>
#include <vector>

namespace slopecast::testing {

class ChildProcess {
 public:
  // Starts program with args; stdout and stderr go to log (appended).
  ChildProcess(const std::string& program, const std::vector<std::string>& args,
               const std::filesystem::path& log);
  ~ChildProcess();
  ChildProcess(const ChildProcess&) = delete;
  ChildProcess& operator=(const ChildProcess&) = delete;

  // Sends a signal (e.g. SIGTERM).
  void signal(int sig);
  pid_t pid() const { return pid_; }
  // Exit status once the process has exited within timeout: the exit code,
  // or 128 + signal number if it was killed by a signal; nullopt if still running.
  [[nodiscard]] std::optional<int> wait(std::chrono::milliseconds timeout);
  bool running();

 private:
  pid_t pid_ = -1;
  std::optional<int> status_;
};

// Resident memory of a running process (VmRSS), kB; 0 if unreadable.
long resident_kb(pid_t pid);

// Contents of a log file, for INFO() on failure.
std::string read_log(const std::filesystem::path& log);

}  // namespace slopecast::testing
