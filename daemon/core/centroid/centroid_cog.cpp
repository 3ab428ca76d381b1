#include "daemon/core/centroid/centroid_cog.h"

namespace slopecast::core {

SpotEstimate CogCentroider::measure(const WindowView&, const WindowContext& c) {
  SpotEstimate e;
  if (!c.moments.located) return e;
  e.x = c.moments.cx;
  e.y = c.moments.cy;
  e.located = true;
  return e;
}

}  // namespace slopecast::core
