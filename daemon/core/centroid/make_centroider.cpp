#include "daemon/core/centroid/make_centroider.h"

#include <cassert>

#include "daemon/core/centroid/centroid_brightest.h"
#include "daemon/core/centroid/centroid_cog.h"
#include "daemon/core/centroid/centroid_correlation.h"
#include "daemon/core/centroid/centroid_gaussian_fit.h"
#include "daemon/core/centroid/centroid_quad_cell.h"
#include "daemon/core/centroid/centroid_thresholded.h"
#include "daemon/core/centroid/centroid_weighted.h"

namespace slopecast::core {

std::unique_ptr<Centroider> make_centroider(const CentroiderSettings& s, int p) {
  assert(validate(s, p).empty());
  switch (s.kind) {
    case CentroiderKind::kCog: return std::make_unique<CogCentroider>();
    case CentroiderKind::kThresholded: return std::make_unique<ThresholdedCentroider>(s.threshold_mode, s.threshold);
    case CentroiderKind::kWeighted: return std::make_unique<WeightedCentroider>(s, p);
    case CentroiderKind::kBrightest: return std::make_unique<BrightestCentroider>(s.brightest_pixels, p * p);
    case CentroiderKind::kCorrelation: return std::make_unique<CorrelationCentroider>(s, p);
    case CentroiderKind::kQuadCell: return std::make_unique<QuadCellCentroider>(s.spot_sigma_px, p);
    case CentroiderKind::kGaussianFit: return std::make_unique<GaussianFitCentroider>(s, p);
  }
  return nullptr;
}

}  // namespace slopecast::core
