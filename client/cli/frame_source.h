// Where recorded frames come from, for the commands that read them back
// (`slopecast replay`, `slopecast eval`): a series of recordings or one FITS
// cube, frame by frame, with the header part a camera would have sent.
#pragma once

#include <cstdint>
#include <map>
#include <memory>
#include <string>
#include <vector>

#include "daemon/io/fits_image.h"
#include "daemon/io/recording.h"
#include "slopecast/v1/frame.pb.h"
#include "slopecast/v1/recording.pb.h"

namespace slopecast::cli {

// True when the file starts like a FITS file ("SIMPLE  ").
bool is_fits(const std::string& path);

// One frame: its header part as recorded (or made) and its pixels.
struct Frame {
  std::string header;
  std::string pixels;
  std::uint64_t seq = 0;
  std::uint64_t time_ns = 0;  // camera time (or the recorder's receive time)
};

class FrameSource {
 public:
  virtual ~FrameSource() = default;
  // Next frame; false at the end. Problems (damage, torn tails) are printed.
  virtual bool next(Frame& f) = 0;
  virtual void rewind() = 0;
  virtual std::string describe() const = 0;
};

// The frame records of a series of recordings, in order. `command` names
// the tool in warnings ("slopecast <command>: ...").
class RecordingSource : public FrameSource {
 public:
  RecordingSource(std::string command, std::vector<std::string> files)
      : command_(std::move(command)), files_(std::move(files)) {}
  bool next(Frame& f) override;
  void rewind() override;
  std::string describe() const override;
  std::uint64_t problems() const { return problems_; }

 private:
  std::string command_;
  std::vector<std::string> files_;
  std::size_t index_ = 0;
  std::unique_ptr<io::RecordingReader> reader_;
  std::uint64_t problems_ = 0;
};

// The planes of a FITS cube. Frame seqs are the plane numbers from 0, or,
// with use_frame_table(), the FRAME_SEQ column of the cube's FRAMES table
// (what `slopecast export --fits-cube` writes).
class CubeSource : public FrameSource {
 public:
  CubeSource(std::string command, std::unique_ptr<io::FitsFrameReader> cube, std::string source_id, std::string path);
  // Reads the FRAMES table's FRAME_SEQ column when the cube has one with a
  // row per plane; false (seqs stay plane numbers) otherwise.
  bool use_frame_table();
  bool next(Frame& f) override;
  void rewind() override { plane_ = 0; }
  std::string describe() const override;
  bool error() const { return error_; }
  long planes() const { return cube_->planes(); }

 private:
  std::string command_;
  std::unique_ptr<io::FitsFrameReader> cube_;
  std::string path_;
  v1::FrameHeader header_;
  std::vector<char> bytes_;
  std::vector<std::uint64_t> seqs_;
  long plane_ = 0;
  bool error_ = false;
};

// Every FrameTruth record of a series of recordings (simulated frames
// recorded with `slopecast record --truth-from`), by frame seq. Damaged
// records are skipped and counted in problems.
std::map<std::uint64_t, v1::FrameTruth> read_recorded_truth(const std::vector<std::string>& files,
                                                            std::uint64_t& problems);

}  // namespace slopecast::cli
