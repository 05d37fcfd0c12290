// What the recurrence block's CPU kernels (rglru_cpu.cpp: the RG-LRU; conv_cpu.cpp: the causal
// depthwise conv) share besides vecmath.h: the state dtype of an input dtype, how the (B, C) plane
// is cut into parallel work items, and the data pointer of an optional tensor.
#pragma once

#include <ATen/Parallel.h>
#include <ATen/core/Tensor.h>
#include <c10/util/Optional.h>

#include <algorithm>
#include <cstdint>

// The operator namespace; build.py sets it to the build's hash so that two builds never clash.
#ifndef BLOCKYARD_SCAN_NS
#define BLOCKYARD_SCAN_NS blockyard_scan
#endif

namespace blockyard_cpu {

// The dtype a kernel computes and keeps its state in: float64 for float64 inputs, else float32.
inline at::ScalarType state_type(at::ScalarType input) {
  return input == at::kDouble ? at::kDouble : at::kFloat;
}

// Each batch row of C channels is cut into `blocks` channel blocks of `width` channels (the last may be short).
struct Blocking {
  int64_t blocks;
  int64_t width;
};

// Whole batch rows per item where there are enough of them; else rows cut into channel blocks
// of at least one cache line, so that every thread has work.
inline Blocking choose_blocking(int64_t batch, int64_t channels) {
  const int64_t wanted_items = 4 * static_cast<int64_t>(at::get_num_threads());
  int64_t blocks = batch >= wanted_items ? 1 : (wanted_items + batch - 1) / std::max<int64_t>(batch, 1);
  const int64_t min_width = 16;
  blocks = std::max<int64_t>(1, std::min(blocks, (channels + min_width - 1) / min_width));
  int64_t width = (channels + blocks - 1) / blocks;
  width = (width + min_width - 1) / min_width * min_width;
  blocks = (channels + width - 1) / width;
  return {blocks, width};
}

// Items per parallel task: tiny problems (a decode step) run on the calling thread.
inline int64_t grain_items(int64_t steps, int64_t width) {
  const int64_t min_elements = 1 << 13;
  return std::max<int64_t>(1, min_elements / std::max<int64_t>(1, steps * width));
}

// The data of an optional tensor, or nullptr when it is absent.
template <typename I>
const I* opt_ptr(const c10::optional<at::Tensor>& t) {
  return t.has_value() ? t->const_data_ptr<I>() : nullptr;
}

}  // namespace blockyard_cpu
