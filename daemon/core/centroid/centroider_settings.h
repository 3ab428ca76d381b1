// Which centroider measures the spots, and its parameters.
//
// Every parameter is a named option with one description, used by the
// config file ([centroider] table), the live control request and the
// `slopecast centroider` command alike: apply_option() is the only place a
// value is checked against its key, validate() the only place the whole is
// checked against the sensor. A key that is not in kCentroiderOptions is an
// error everywhere.
#pragma once

#include <optional>
#include <span>
#include <string>
#include <string_view>
#include <variant>
#include <vector>

namespace slopecast::core {

enum class CentroiderKind {
  kCog,          // centroid_cog.h
  kThresholded,  // centroid_thresholded.h
  kWeighted,     // centroid_weighted.h
  kBrightest,    // centroid_brightest.h
  kCorrelation,  // centroid_correlation.h
  kQuadCell,     // centroid_quad_cell.h
  kGaussianFit,  // centroid_gaussian_fit.h
};
inline constexpr CentroiderKind kAllCentroiderKinds[] = {
    CentroiderKind::kCog,         CentroiderKind::kThresholded, CentroiderKind::kWeighted,
    CentroiderKind::kBrightest,   CentroiderKind::kCorrelation, CentroiderKind::kQuadCell,
    CentroiderKind::kGaussianFit};

enum class ThresholdMode { kRelative, kAbsolute };
enum class CorrelationMetric { kCc, kSdf, kAdf, kAdfSquared };
enum class PeakInterpolation { kParabola, kQuadraticLs, kGaussian };
enum class ReferenceSource { kGaussian, kFile, kCaptured };

// "cog", "tcog", "wcog", "brightest", "correlation", "quad_cell", "gaussian_fit".
std::string_view centroider_name(CentroiderKind kind);
std::optional<CentroiderKind> parse_centroider(std::string_view name);

struct CentroiderSettings {
  CentroiderKind kind = CentroiderKind::kCog;
  // Expected rms width of the spot, px: the weighted CoG's gain, the
  // quad-cell's gain, the synthetic correlation reference, the fit's start.
  double spot_sigma_px = 1.5;

  ThresholdMode threshold_mode = ThresholdMode::kRelative;
  // kRelative: fraction of the window peak (0..1); kAbsolute: ADU above the
  // subtracted background.
  double threshold = 0.2;

  double weight_sigma_px = 2.0;        // rms width of the Gaussian weight
  bool weight_follows_spot = false;    // iterate the weight's centre onto the spot
  int weight_iterations = 10;          // at most, when following
  double weight_tolerance_px = 1e-3;   // stop following when a step is smaller

  int brightest_pixels = 20;

  CorrelationMetric metric = CorrelationMetric::kSdf;
  PeakInterpolation interpolation = PeakInterpolation::kQuadraticLs;
  int search_px = 2;  // largest shift tried each way, px
  ReferenceSource reference = ReferenceSource::kGaussian;
  std::string reference_file;  // FITS image, when reference = kFile (io loads it)
  // The reference image for kFile / kCaptured: reference_size^2 floats,
  // row-major, the size of a subaperture box.
  std::vector<float> reference_image;
  int reference_size = 0;

  int fit_max_iterations = 30;
  double fit_tolerance_px = 1e-4;
  // Camera gain for the fit's noise model (var = noise^2 + gain * signal);
  // 0 weighs every pixel alike.
  double adu_per_electron = 1.0;
};

// A value as it arrives from TOML, protobuf or a command line.
using OptionValue = std::variant<double, bool, std::string>;

struct CentroiderOption {
  std::string_view key;
  std::string_view methods;  // which methods read it ("all", or names)
  std::string_view help;     // one line: meaning, unit, range, default
};
extern const std::span<const CentroiderOption> kCentroiderOptions;

// Sets one option ("method" included) from a value; empty on success,
// otherwise a sentence naming the key, what it wants and what it got.
std::string apply_option(CentroiderSettings& s, std::string_view key, const OptionValue& value);

// A value as written in the config: 2.5, true, "wcog".
std::string format_option(const OptionValue& value);

// A value as typed on a command line: true/false are flags, a whole-string
// number is a number, anything else (quotes removed) is text.
OptionValue parse_option_value(std::string_view text);
// "key=value" (value as above); nullopt without a key and an '='.
std::optional<std::pair<std::string, OptionValue>> parse_option_assignment(std::string_view text);

// Every option's current value, in kCentroiderOptions order, "method" first.
std::vector<std::pair<std::string, OptionValue>> list_options(const CentroiderSettings& s);

// "wcog (weight_sigma_px = 2, ...)": the method and the options it reads.
std::string describe(const CentroiderSettings& s);

// Empty when these settings can measure boxes of pitch_px; otherwise why not.
std::string validate(const CentroiderSettings& s, int pitch_px);

// A synthetic reference: a pixel-integrated Gaussian of rms sigma_px centred
// in a size x size box, normalised to unit sum.
std::vector<float> gaussian_reference(int size, double sigma_px);

}  // namespace slopecast::core
