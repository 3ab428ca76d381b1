// Builds the centroider that settings name, sized for boxes of pitch_px.
#pragma once

#include <memory>

#include "daemon/core/centroid/centroider.h"

namespace slopecast::core {

// Precondition: validate(settings, pitch_px) is empty.
std::unique_ptr<Centroider> make_centroider(const CentroiderSettings& settings, int pitch_px);

}  // namespace slopecast::core
