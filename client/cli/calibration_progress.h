// Following an acquisition in slopecastd from the command line: start it,
// show its progress, wait for the outcome; Ctrl-C (or SIGTERM) cancels it
// in the daemon before the command exits.
#pragma once

#include "client/lib/control_client.h"
#include "slopecast/v1/control.pb.h"

namespace slopecast::cli {

// request: a calibration start request. Prints the outcome (or the reply as
// JSON); exit code 0 when the product was applied, 1 when the daemon
// refused or the acquisition failed, 128 + signal when stopped.
void run_acquisition(const char* command, client::ControlClient& control, const v1::ControlRequest& request,
                     double timeout_s, bool no_wait, bool json);

}  // namespace slopecast::cli
