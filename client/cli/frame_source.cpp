#include "client/cli/frame_source.h"

#include <cmath>
#include <fstream>
#include <iostream>

#include <fmt/format.h>

#include "client/lib/frame_publisher.h"
#include "daemon/io/wire_codec.h"

namespace slopecast::cli {

bool is_fits(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  char head[9] = {};
  in.read(head, 8);
  return std::string(head) == "SIMPLE  ";
}

bool RecordingSource::next(Frame& f) {
  for (;;) {
    if (!reader_) {
      if (index_ >= files_.size()) return false;
      auto opened = io::RecordingReader::open(files_[index_++]);
      if (auto* e = std::get_if<std::string>(&opened)) {
        std::cerr << "slopecast " << command_ << ": " << *e << "; skipped\n";
        ++problems_;
        continue;
      }
      reader_ = std::move(std::get<std::unique_ptr<io::RecordingReader>>(opened));
    }
    io::RecordedMessage m;
    const auto outcome = reader_->next(m);
    if (outcome == io::ReadOutcome::kEnd) {
      reader_.reset();
      continue;
    }
    if (outcome != io::ReadOutcome::kRecord) {
      std::cerr << "slopecast " << command_ << ": warning: " << reader_->problem() << "\n";
      ++problems_;
      continue;
    }
    if (m.kind != io::RecordKind::kFrame || m.parts.size() != 2) continue;
    v1::FrameHeader h;
    if (!h.ParseFromString(m.parts[0])) continue;
    f.header = std::move(m.parts[0]);
    f.pixels = std::move(m.parts[1]);
    f.seq = h.seq();
    f.time_ns = h.camera_time_ns() ? h.camera_time_ns() : m.received_ns;
    return true;
  }
}

void RecordingSource::rewind() {
  reader_.reset();
  index_ = 0;
}

std::string RecordingSource::describe() const { return fmt::format("{} recording file(s)", files_.size()); }

CubeSource::CubeSource(std::string command, std::unique_ptr<io::FitsFrameReader> cube, std::string source_id,
                       std::string path)
    : command_(std::move(command)), cube_(std::move(cube)), path_(std::move(path)) {
  header_ = client::make_frame_header(0, 0, cube_->width(), cube_->height(), io::to_wire(cube_->format()));
  header_.set_source_id(source_id);
  bytes_.resize(static_cast<std::size_t>(cube_->width()) * cube_->height() * core::bytes_per_pixel(cube_->format()));
}

bool CubeSource::use_frame_table() {
  auto table = io::read_fits_table(path_, "FRAMES");
  auto* t = std::get_if<io::FitsTable>(&table);
  if (!t) return false;
  const io::FitsColumn* seq = t->find("FRAME_SEQ");
  if (!seq || static_cast<long>(seq->values.size()) != cube_->planes()) return false;
  std::vector<std::uint64_t> seqs;  // kept only when every value is a seq
  for (double v : seq->values) {
    if (!(v >= 0 && v < 1.8e19 && v == std::floor(v))) return false;
    seqs.push_back(static_cast<std::uint64_t>(v));
  }
  seqs_ = std::move(seqs);
  return true;
}

bool CubeSource::next(Frame& f) {
  if (plane_ >= cube_->planes()) return false;
  if (auto e = cube_->read_plane(plane_, std::as_writable_bytes(std::span(bytes_))); !e.empty()) {
    std::cerr << "slopecast " << command_ << ": " << e << "\n";
    error_ = true;
    return false;
  }
  const std::uint64_t seq = seqs_.empty() ? static_cast<std::uint64_t>(plane_) : seqs_[plane_];
  header_.set_seq(seq);
  f.header = header_.SerializeAsString();
  f.pixels.assign(bytes_.data(), bytes_.size());
  f.seq = seq;
  f.time_ns = 0;
  ++plane_;
  return true;
}

std::string CubeSource::describe() const {
  return fmt::format("FITS cube {} ({} x {} x {}, BITPIX {} as {})", path_, cube_->width(), cube_->height(),
                     cube_->planes(), cube_->bitpix(), core::pixel_format_name(cube_->format()));
}

std::map<std::uint64_t, v1::FrameTruth> read_recorded_truth(const std::vector<std::string>& files,
                                                            std::uint64_t& problems) {
  std::map<std::uint64_t, v1::FrameTruth> out;
  for (const auto& path : files) {
    auto opened = io::RecordingReader::open(path);
    if (std::holds_alternative<std::string>(opened)) {
      ++problems;
      continue;
    }
    auto& reader = *std::get<std::unique_ptr<io::RecordingReader>>(opened);
    io::RecordedMessage m;
    for (io::ReadOutcome r; (r = reader.next(m)) != io::ReadOutcome::kEnd;) {
      if (r != io::ReadOutcome::kRecord) continue;  // the frame pass reports damage
      if (m.kind != io::RecordKind::kTruth || m.parts.size() != 1) continue;
      v1::FrameTruth t;
      if (t.ParseFromString(m.parts[0])) out[t.frame_seq()] = std::move(t);
    }
  }
  return out;
}

}  // namespace slopecast::cli
