// How close the per-frame computation runs to the memory floor, for every
// centroider, hot and cold.
//
// For each sensor size the benchmark times three references -- memcpy of
// the frame's bytes, a plain vectorised sum over its pixels (the least work
// that reads every pixel once), and OpenCV's cv::moments on every window of
// the frame (what a careful lab script would call) -- then
// Pipeline::measure with each method at its default settings (dark,
// border background, moments, the method, flags and slopes), the CoG's
// pixel work alone (column sums and box moments, see BM_pixel_work), the CoG with
// two worker threads, the CoG with the dark alone (no background
// estimate), and the CoG plus building and serialising the
// measurement protobuf as the daemon does per frame, and the CoG over
// layouts that are not a regular grid and with calibration applied. Each runs hot (the
// frame in cache from the previous iteration) and cold (an 8 MB buffer
// swept between frames, outside the timing, so the frame and the dark come
// from beyond L2: the development machines' L2 is 2 x 2 MB; their L3, 260
// MB shared by a VM's neighbours, is out of a benchmark's reach). It prints ratios to memcpy and to the plain sum from the
// same run: ratios, not absolute times, compare across shared machines.
//
// Run: build/tests/bench/pipeline_bench --benchmark_repetitions=5
//          --benchmark_report_aggregates_only=true   (ratios of medians)
// Noise-free second figure (instructions, see DEVELOPERS.md):
//   valgrind --tool=callgrind build/tests/bench/pipeline_bench
//       --benchmark_filter='measure/cog/16x16.*hot' --benchmark_min_time=0.01
#include <benchmark/benchmark.h>
#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <cstring>
#include <iostream>
#include <map>
#include <opencv2/imgproc.hpp>
#include <random>
#include <set>

#include "client/sim/detector_model.h"
#include "client/sim/spot_field.h"
#include "client/sim/spot_image.h"
#include "daemon/app/row_workers.h"
#include "daemon/core/frame/raw_columns.h"
#include "daemon/core/metrics/window_moments.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/wire_codec.h"

using namespace slopecast;

namespace {

struct Sensor {
  const char* name;
  int n, pitch;
};
constexpr Sensor kSensors[] = {{"16x16x15px", 16, 15}, {"40x40x10px", 40, 10}, {"80x80x10px", 80, 10}};

struct Fixture {
  core::PipelineSettings settings;
  std::vector<std::uint16_t> frame;
  core::ImageView view() const {
    return {std::as_bytes(std::span(frame)), settings.camera.width_px, settings.camera.height_px,
            static_cast<std::size_t>(settings.camera.width_px) * 2, core::PixelFormat::kU16};
  }
};

Fixture make_fixture(const Sensor& s) {
  Fixture f;
  const int side = s.n * s.pitch;
  f.settings.camera = {side, side, core::PixelFormat::kU16};
  f.settings.grid = {s.n, s.n, s.pitch, 0, 0};
  f.settings.dark_adu.assign(static_cast<std::size_t>(side) * side, 100.0f);
  f.settings.min_flux_adu = 100;
  f.settings.centroider.spot_sigma_px = 1.0;  // the simulator's default spot
  sim::SpotFieldSettings field;
  field.grid = f.settings.grid;
  std::mt19937_64 rng(1);
  const auto expected = sim::render_spot_field(field, sim::draw_offsets(field, rng), side, side);
  f.frame.resize(expected.size());
  sim::expose(expected, sim::DetectorModel{}, rng, f.frame);
  return f;
}

// Sweeps a buffer twice the size of the L2 caches, so that the next frame
// and its dark come from L3 or memory.
void evict_caches() {
  static std::vector<char> junk(8 << 20);
  for (std::size_t i = 0; i < junk.size(); i += 64) junk[i] = static_cast<char>(junk[i] + 1);
  benchmark::ClobberMemory();
}

// Times body() per frame, hot or cold.
template <typename Body>
void per_frame(benchmark::State& state, const Fixture& f, bool cold, Body body) {
  for (auto _ : state) {
    if (cold) {
      state.PauseTiming();
      evict_caches();
      state.ResumeTiming();
    }
    body();
  }
  state.SetBytesProcessed(state.iterations() * static_cast<std::int64_t>(f.frame.size()) * 2);
}

void BM_memcpy(benchmark::State& state, Sensor s, bool cold) {
  const Fixture f = make_fixture(s);
  std::vector<std::uint16_t> dst(f.frame.size());
  per_frame(state, f, cold, [&] {
    std::memcpy(dst.data(), f.frame.data(), f.frame.size() * 2);
    benchmark::DoNotOptimize(dst.data());
    benchmark::ClobberMemory();
  });
}

// The floor for pixel work: sum every pixel of the frame (the compiler
// vectorises this loop).
void BM_sum(benchmark::State& state, Sensor s, bool cold) {
  const Fixture f = make_fixture(s);
  per_frame(state, f, cold, [&] {
    std::uint64_t total = 0;
    for (std::uint16_t v : f.frame) total += v;
    benchmark::DoNotOptimize(total);
  });
}

// A careful script's CoG: OpenCV's moments of every window (no dark, no
// background, no flags).
void BM_cv_moments(benchmark::State& state, Sensor s, bool cold) {
  const Fixture f = make_fixture(s);
  const int side = s.n * s.pitch;
  const cv::Mat image(side, side, CV_16U, const_cast<std::uint16_t*>(f.frame.data()));
  per_frame(state, f, cold, [&] {
    double sum = 0.0;
    for (int iy = 0; iy < s.n; ++iy)
      for (int ix = 0; ix < s.n; ++ix) {
        const cv::Moments m = cv::moments(image(cv::Rect(ix * s.pitch, iy * s.pitch, s.pitch, s.pitch)));
        sum += m.m10 / m.m00;
      }
    benchmark::DoNotOptimize(sum);
  });
}

void BM_measure(benchmark::State& state, Sensor s, core::CentroiderKind kind, bool cold) {
  Fixture f = make_fixture(s);
  f.settings.centroider.kind = kind;
  f.settings.centroider.brightest_pixels = std::min(20, s.pitch * s.pitch - 1);
  core::Pipeline p(f.settings);
  auto m = p.make_measurement();
  per_frame(state, f, cold, [&] {
    p.measure(f.view(), m);
    benchmark::DoNotOptimize(m.slope_x_px.data());
  });
}

// The CoG with the dark and no background subtraction (background "none"),
// the configuration of the folded-dark prototype in the performance issue.
// The ring is still read: the flux significance (min_snr), the published
// snr and the frame's noise figures need its rms, so this row shows what
// the subtraction itself costs, not what the ring does.
void BM_measure_dark_only(benchmark::State& state, Sensor s, bool cold) {
  Fixture f = make_fixture(s);
  f.settings.background = core::BackgroundMode::kNone;
  core::Pipeline p(f.settings);
  auto m = p.make_measurement();
  per_frame(state, f, cold, [&] {
    p.measure(f.view(), m);
    benchmark::DoNotOptimize(m.slope_x_px.data());
  });
}

// The CoG's pixel work alone, as the folded path does it: the raw integer
// column sums of each row of boxes and each box's moments from them, the
// dark folded out as per-box constants. No border ring, no decisions, no
// slopes: what the measurement costs beyond this row is per-box work,
// whatever the pixel count.
void BM_pixel_work(benchmark::State& state, Sensor s, bool cold) {
  const Fixture f = make_fixture(s);
  const int p = s.pitch, side = s.n * s.pitch;
  const auto kernel = core::raw_column_kernel(core::PixelFormat::kU16, core::best_simd_level());
  std::vector<std::uint32_t> cs(side + core::kRawColumnSlack), csy(cs.size()), csyy(cs.size()), cmax(cs.size());
  const core::RawColumns cols{cs.data(), csy.data(), csyy.data(), cmax.data()};
  std::vector<core::FoldedDark> dark;
  for (int iy = 0; iy < s.n; ++iy)
    for (int ix = 0; ix < s.n; ++ix) dark.push_back(core::fold_dark(f.settings.dark_adu, side, ix * p, iy * p, p, p));
  const bool fits_32 = core::box_sums_fit_32(p, p, 65535);
  const std::vector<float> levels(s.n, 0.0f);
  std::vector<core::WindowMoments> moments(s.n);
  per_frame(state, f, cold, [&] {
    for (int iy = 0; iy < s.n; ++iy) {
      kernel(f.view(), 0, iy * p, side, p, cols);
      core::folded_moments_run(cols, s.n, p, p, dark.data() + static_cast<std::size_t>(iy) * s.n, levels.data(),
                               fits_32, core::best_simd_level(), moments.data());
      benchmark::DoNotOptimize(moments.data());
    }
  });
}

// The CoG over layouts that are not a regular grid, and with calibration:
//   turned     -- the boxes of a lattice turned by 0.4 degrees: each row of
//                 boxes steps down a pixel every ~14 boxes, so a 40-box row
//                 is read as 3 runs (subaperture_layout.h); the frame is one
//                 box row taller than the grid's (the ratios below are to
//                 the plain sum of the grid's frame: ~7 % more pixels);
//   single     -- every box its own run (the general path);
//   calibrated -- turned, plus reference slopes, a valid map and 0.1 % bad
//                 pixels (patched into the sums on the folded path);
//   flat       -- calibrated plus a flat field (the float path).
enum class Layout { kTurned, kSingle, kCalibrated, kFlat };

void BM_measure_layout(benchmark::State& state, Sensor s, Layout layout, bool cold) {
  Fixture f = make_fixture(s);
  auto& ps = f.settings;
  ps.layout = core::regular_layout(ps.grid);
  if (layout != Layout::kSingle) {
    // Every row steps down the same way; the frame grows by one box row so
    // that the last row still fits, and its spots are drawn anew, centred
    // in the moved boxes as a registration would place them.
    const double step = std::tan(0.4 * 3.14159265358979 / 180.0) * s.pitch;
    for (int iy = 0; iy < s.n; ++iy)
      for (int ix = 0; ix < s.n; ++ix)
        ps.layout[static_cast<std::size_t>(iy) * s.n + ix].y0 += static_cast<int>(std::lround(ix * step)) % s.pitch;
    const int w = s.n * s.pitch, h = w + s.pitch;
    ps.camera.height_px = h;
    ps.dark_adu.assign(static_cast<std::size_t>(w) * h, 100.0f);
    std::vector<double> expected(static_cast<std::size_t>(w) * h, 0.0);
    std::mt19937_64 rng(2);
    std::uniform_real_distribution<double> offset(-0.5, 0.5);
    for (auto& b : ps.layout) {
      const double c = 0.5 * (s.pitch - 1);
      sim::add_gaussian_spot(expected, w, b.x0 + c + offset(rng), b.y0 + c + offset(rng), 0.9, 5000,
                             sim::ClipRect{b.x0, b.y0, b.x0 + s.pitch, b.y0 + s.pitch});
    }
    f.frame.resize(expected.size());
    sim::expose(expected, sim::DetectorModel{}, rng, f.frame);
  } else {
    for (int iy = 0; iy < s.n; ++iy)
      std::reverse(ps.layout.begin() + static_cast<long>(iy) * s.n, ps.layout.begin() + static_cast<long>(iy + 1) * s.n);
  }
  if (layout == Layout::kCalibrated || layout == Layout::kFlat) {
    const auto n = static_cast<std::size_t>(ps.grid.count());
    ps.reference_slope_x_px.assign(n, 0.05f);
    ps.reference_slope_y_px.assign(n, -0.05f);
    ps.valid_map.assign(n, 1);
    ps.bad_pixels.assign(ps.dark_adu.size(), 0);
    std::mt19937_64 rng(3);
    for (std::size_t k = 0; k < ps.bad_pixels.size() / 1000; ++k) ps.bad_pixels[rng() % ps.bad_pixels.size()] = 1;
  }
  if (layout == Layout::kFlat) ps.flat.assign(ps.dark_adu.size(), 1.0f);
  core::Pipeline p(ps);
  auto m = p.make_measurement();
  per_frame(state, f, cold, [&] {
    p.measure(f.view(), m);
    benchmark::DoNotOptimize(m.slope_x_px.data());
  });
}

void BM_measure_threads(benchmark::State& state, Sensor s, int threads, bool cold) {
  const Fixture f = make_fixture(s);
  core::Pipeline p(f.settings, threads);
  app::RowWorkers workers(threads);
  auto m = p.make_measurement();
  per_frame(state, f, cold, [&] {
    workers.measure_rows(p, f.view());
    p.finish(m);
    benchmark::DoNotOptimize(m.slope_x_px.data());
  });
}

void BM_measure_encode(benchmark::State& state, Sensor s, bool cold) {
  const Fixture f = make_fixture(s);
  core::Pipeline p(f.settings);
  auto m = p.make_measurement();
  v1::Measurement msg;
  std::vector<std::uint8_t> out(1 << 20);
  io::MeasurementStamp stamp;
  stamp.n_subap_x = stamp.n_subap_y = s.n;
  per_frame(state, f, cold, [&] {
    p.measure(f.view(), m);
    io::encode_measurement(m, stamp, msg);
    const std::size_t n = msg.ByteSizeLong();
    msg.SerializeWithCachedSizesToArray(out.data());
    benchmark::DoNotOptimize(n);
  });
}

// Collects each benchmark's time per iteration (the median when
// --benchmark_repetitions asks for several runs) so main can print ratios.
class RatioReporter : public benchmark::ConsoleReporter {
 public:
  std::map<std::string, double> ns;
  void ReportRuns(const std::vector<Run>& runs) override {
    for (const auto& r : runs) {
      const std::string name = r.run_name.function_name;  // without "/iterations:N"
      if (r.run_type == Run::RT_Aggregate && r.aggregate_name == "median") {
        ns[name] = r.GetAdjustedRealTime();
        medians_.insert(name);
      } else if (r.run_type == Run::RT_Iteration && !medians_.count(name)) {
        ns[name] = r.GetAdjustedRealTime();
      }
    }
    ConsoleReporter::ReportRuns(runs);
  }

 private:
  std::set<std::string> medians_;
};

const char* temp(bool cold) { return cold ? "cold" : "hot"; }

}  // namespace

int main(int argc, char** argv) {
  for (bool cold : {false, true})
    for (const Sensor& s : kSensors) {
      auto name = [&](const std::string& what) { return fmt::format("{}/{}/{}", what, s.name, temp(cold)); };
      // A cold frame pays a sweep outside the timing: a fixed count keeps
      // the run short (the time per frame is still an average of many).
      auto cap = [&](benchmark::internal::Benchmark* b) {
        if (cold) b->Iterations(200);
      };
      cap(benchmark::RegisterBenchmark(name("memcpy").c_str(), BM_memcpy, s, cold));
      cap(benchmark::RegisterBenchmark(name("sum").c_str(), BM_sum, s, cold));
      cap(benchmark::RegisterBenchmark(name("cv_moments").c_str(), BM_cv_moments, s, cold));
      for (core::CentroiderKind k : core::kAllCentroiderKinds)
        cap(benchmark::RegisterBenchmark(name(fmt::format("measure/{}", core::centroider_name(k))).c_str(),
                                         BM_measure, s, k, cold));
      cap(benchmark::RegisterBenchmark(name("measure/cog-dark-only").c_str(), BM_measure_dark_only, s, cold));
      cap(benchmark::RegisterBenchmark(name("pixel-work/cog").c_str(), BM_pixel_work, s, cold));
      cap(benchmark::RegisterBenchmark(name("measure/cog-2-threads").c_str(), BM_measure_threads, s, 2, cold));
      cap(benchmark::RegisterBenchmark(name("measure+encode/cog").c_str(), BM_measure_encode, s, cold));
      for (auto [label, layout] : {std::pair{"turned", Layout::kTurned}, std::pair{"single", Layout::kSingle},
                                   std::pair{"calibrated", Layout::kCalibrated}, std::pair{"flat", Layout::kFlat}})
        cap(benchmark::RegisterBenchmark(name(fmt::format("measure/cog-{}", label)).c_str(), BM_measure_layout, s,
                                         layout, cold));
    }
  benchmark::Initialize(&argc, argv);
  RatioReporter reporter;
  benchmark::RunSpecifiedBenchmarks(&reporter);

  // Per method and sensor, time per frame as a ratio to memcpy and to the
  // plain sum of the same frame (1.0 = the floor), hot and cold.
  for (bool cold : {false, true}) {
    std::cout << fmt::format("\n{} cache: per-frame time as a ratio to memcpy / to a plain sum of the same u16 frame:\n",
                             temp(cold));
    std::cout << fmt::format("  {:<22}", "method");
    for (const Sensor& s : kSensors) std::cout << fmt::format(" {:>22}", s.name);
    std::cout << "\n";
    auto row = [&](const std::string& label, const std::string& what) {
      std::cout << fmt::format("  {:<22}", label);
      for (const Sensor& s : kSensors) {
        auto at = [&](const std::string& w) { return reporter.ns[fmt::format("{}/{}/{}", w, s.name, temp(cold))]; };
        const double copy = at("memcpy"), sum = at("sum"), t = at(what);
        std::cout << (copy > 0 && sum > 0 && t > 0 ? fmt::format(" {:>10.1f}x / {:>7.2f}x", t / copy, t / sum)
                                                   : fmt::format(" {:>22}", "-"));
      }
      std::cout << "\n";
    };
    row("sum (floor)", "sum");
    row("cv::moments, windows", "cv_moments");
    for (core::CentroiderKind k : core::kAllCentroiderKinds)
      row(std::string(core::centroider_name(k)), fmt::format("measure/{}", core::centroider_name(k)));
    row("cog, dark only", "measure/cog-dark-only");
    row("cog pixel work only", "pixel-work/cog");
    row("cog, 2 threads", "measure/cog-2-threads");
    row("cog + encode", "measure+encode/cog");
    row("cog, turned layout", "measure/cog-turned");
    row("cog, 1 box per run", "measure/cog-single");
    row("cog, calibrated", "measure/cog-calibrated");
    row("cog, calibrated+flat", "measure/cog-flat");
  }
  benchmark::Shutdown();
  return 0;
}
