// The one table of centroider options: every key round-trips, every
// description names a key that exists, and validation speaks in sentences.
#include <catch2/catch.hpp>

#include "daemon/core/centroid/centroider_settings.h"

using namespace slopecast;

TEST_CASE("every option listed can be set back to its own value", "[centroider][settings]") {
  core::CentroiderSettings s;
  const auto before = core::list_options(s);
  REQUIRE(before.size() == core::kCentroiderOptions.size());
  for (std::size_t i = 0; i < before.size(); ++i) {
    CHECK(before[i].first == core::kCentroiderOptions[i].key);
    CHECK(core::apply_option(s, before[i].first, before[i].second).empty());
  }
  CHECK(core::list_options(s) == before);
}

TEST_CASE("every method has a name that parses back", "[centroider][settings]") {
  for (core::CentroiderKind k : core::kAllCentroiderKinds) {
    const auto name = core::centroider_name(k);
    CHECK(core::parse_centroider(name) == k);
    core::CentroiderSettings s;
    CHECK(core::apply_option(s, "method", std::string(name)).empty());
    CHECK(s.kind == k);
    // The summary names the method and only the options it reads.
    CHECK(core::describe(s).rfind(std::string(name), 0) == 0);
  }
  core::CentroiderSettings s;
  s.kind = core::CentroiderKind::kWeighted;
  CHECK(core::describe(s) == "wcog (spot_sigma_px = 1.5, weight_sigma_px = 2, weight_follows_spot = false, "
                             "weight_iterations = 10, weight_tolerance_px = 0.001)");
  CHECK(core::describe(core::CentroiderSettings{}) == "cog");
}

TEST_CASE("a refused option leaves the settings as they were", "[centroider][settings]") {
  core::CentroiderSettings s;
  const auto before = core::list_options(s);
  CHECK_FALSE(core::apply_option(s, "weight_sigma_px", 0.0).empty());
  CHECK_FALSE(core::apply_option(s, "weight_sigma_px", std::string("wide")).empty());
  CHECK_FALSE(core::apply_option(s, "search_px", 2.5).empty());
  CHECK_FALSE(core::apply_option(s, "method", 3.0).empty());
  CHECK(core::list_options(s) == before);
}

TEST_CASE("the synthetic reference is a unit-sum centred Gaussian", "[centroider][settings]") {
  const auto g = core::gaussian_reference(15, 1.5);
  double sum = 0.0, sx = 0.0;
  for (int y = 0; y < 15; ++y)
    for (int x = 0; x < 15; ++x) {
      sum += g[y * 15 + x];
      sx += x * g[y * 15 + x];
    }
  CHECK(sum == Approx(1.0).epsilon(1e-6));
  CHECK(sx / sum == Approx(7.0).margin(1e-6));
}
