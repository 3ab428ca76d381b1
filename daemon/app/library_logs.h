// Log lines from the libraries slopecastd links, routed into its own log.
//
// The protobuf library writes a line to stderr for every string field with
// invalid UTF-8 it parses: a camera sending such a source_id made one line
// per frame, bypassing the daemon's rate-limited reject log. Routed here,
// the first line is logged, later ones at most once a second with a count
// of those left out.
#pragma once

namespace slopecast::app {

// Installs the handler; call once at start, before any thread parses.
void route_protobuf_logs();

}  // namespace slopecast::app
