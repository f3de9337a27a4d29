# Sourced by the benchmark runners: runs a PyTorch reference script in each environment it is
# measured in, with every output line tagged by the environment's name; the summaries and
# collect_results.py take the fastest.
#
# - OpenBLAS's native kernel: the machine's OpenBLAS settings pin an older kernel, so the
#   reference runs without them (as fast as it can be here).
# - glibc's allocator two ways. PyTorch allocates and frees its tensors on every call; with
#   glibc's default thresholds every buffer above 128 kB comes from mmap and goes back at once,
#   so each call pays the page faults for it again (dear on this VM: PyTorch's plans took
#   2.4-3.2x as long, its training epoch 1.5x, measured 2026-12-03). "heap" raises the thresholds so
#   that freed memory stays in the heap and is reused, as a tuned deployment of PyTorch would.
#
#   run_torch tests/bench/model_bench_torch.py --threads 1 --repeats 30
TORCH_HEAP_TUNABLES="glibc.malloc.mmap_threshold=33554432:glibc.malloc.trim_threshold=268435456"

run_torch() {
  local allocator
  for allocator in default heap; do
    local tunables=""
    [ "$allocator" = heap ] && tunables="$TORCH_HEAP_TUNABLES"
    env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE GLIBC_TUNABLES="$tunables" \
      /usr/bin/python3 "$@" | sed "s/^{/{\"allocator\": \"$allocator\", /"
  done
}
