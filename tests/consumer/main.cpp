// Uses the installed client library: publishes one frame on an ipc://
// endpoint given on the command line and asks a (missing) daemon for its
// status, which must time out with a reason rather than hang.
#include <iostream>
#include <variant>

#include "client/lib/control_client.h"
#include "client/lib/frame_publisher.h"

int main(int argc, char** argv) {
  if (argc != 3) return 2;
  zmq::context_t ctx(1);
  slopecast::client::FramePublisher pub(ctx, argv[1]);
  const auto header = slopecast::client::make_frame_header(0, 0, 4, 4, slopecast::v1::PIXEL_TYPE_U8);
  std::byte pixels[16] = {};
  if (!pub.publish(header, pixels)) return 1;
  slopecast::client::ControlClient control(ctx, argv[2]);
  const auto reply = control.status(std::chrono::milliseconds(200));
  if (!std::holds_alternative<std::string>(reply)) return 1;
  std::cout << "consumer built against the installed slopecast: status said \"" << std::get<std::string>(reply)
            << "\"\n";
  return 0;
}
