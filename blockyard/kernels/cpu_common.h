// What the CPU kernels (scan_cpu.cpp, rglru_cpu.cpp, conv_cpu.cpp, geglu_cpu.cpp, rmsnorm_cpu.cpp)
// share besides vecmath.h: the operator namespace, the compute and state dtype of an input dtype,
// how work is cut into parallel items, and the data pointer of an optional tensor.
#pragma once

#include <ATen/Parallel.h>
#include <ATen/core/Tensor.h>
#include <c10/util/Optional.h>

#include <algorithm>
#include <cstdint>
#include <type_traits>

// The operator namespace; build.py sets it to the build's hash so that two builds never clash.
#ifndef BLOCKYARD_SCAN_NS
#define BLOCKYARD_SCAN_NS blockyard_scan
#endif

namespace blockyard_cpu {

// The dtype a kernel computes and keeps its state in: float64 for float64 inputs, else float32.
inline at::ScalarType state_type(at::ScalarType input) {
  return input == at::kDouble ? at::kDouble : at::kFloat;
}

// The same as a C++ type: what an input element type I is computed in (bfloat16 and float: float).
template <typename I>
using compute_t = std::conditional_t<std::is_same_v<I, double>, double, float>;

// Each batch row of C channels is cut into `blocks` channel blocks of `width` channels (the last may be short).
struct Blocking {
  int64_t blocks;
  int64_t width;
};

// Whole batch rows per item where there are enough of them (each item's memory stays contiguous,
// best for the prefetcher); else rows cut into channel blocks of at least one cache line of float32,
// so that every thread has work.
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

// Items of `steps` x `width` elements per parallel task, at least `min_elements` elements, so that
// tiny problems (a decode step) run on the calling thread instead of paying for a fork.
inline int64_t grain_items(int64_t steps, int64_t width, int64_t min_elements = 1 << 13) {
  return std::max<int64_t>(1, min_elements / std::max<int64_t>(1, steps * width));
}

// Rows of `row_length` elements per parallel chunk: about 16k elements, so that a chunk outweighs
// the thread hand-off (the row-wise kernels: geglu_cpu.cpp, rmsnorm_cpu.cpp).
inline int64_t grain_rows(int64_t row_length) {
  return std::max<int64_t>(1, 16384 / std::max<int64_t>(row_length, 1));
}

// The data of an optional tensor, or nullptr when it is absent.
template <typename I>
const I* opt_ptr(const c10::optional<at::Tensor>& t) {
  return t.has_value() ? t->const_data_ptr<I>() : nullptr;
}

}  // namespace blockyard_cpu
