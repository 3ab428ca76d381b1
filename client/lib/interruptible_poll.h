// zmq::poll that reports a signal instead of throwing.
//
// A signal (Ctrl-C) makes poll() fail with EINTR, which cppzmq turns into a
// zmq::error_t; uncaught, that aborted every client. Here it is an ordinary
// outcome: the caller returns and its loop checks whether a stop was asked.
#pragma once

#include <cerrno>
#include <chrono>

#include <zmq.hpp>

namespace slopecast::client {

enum class PollResult { kReady, kTimeout, kInterrupted };

inline PollResult interruptible_poll(zmq::pollitem_t* items, std::size_t n, std::chrono::milliseconds timeout) {
  try {
    return zmq::poll(items, n, timeout) > 0 ? PollResult::kReady : PollResult::kTimeout;
  } catch (const zmq::error_t& e) {
    if (e.num() == EINTR) return PollResult::kInterrupted;
    throw;
  }
}

}  // namespace slopecast::client
