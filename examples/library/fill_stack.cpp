// Fills a stack with the Whittaker smoother (lambda 10) and prints what it did: the library's
// run_fill is what `kalends fill` runs, with the same outputs. Errors are kalends::Error, each
// with the file (or option) and the reason.
#include <cstdio>

#include "kalends/error.hpp"
#include "kalends/fill.hpp"

int main(int argc, char** argv) {
  if (argc != 3) {
    std::fprintf(stderr, "usage: fill_stack 'PATTERN' OUT_FOLDER\n");
    return 2;
  }
  kalends::FillRequest request;
  request.input = argv[1];
  request.out_dir = argv[2];
  request.method.method = "whittaker";
  request.method.lambda = 10.0;
  try {
    const kalends::FillSummary summary = kalends::run_fill(request);
    std::printf("kalends %s: %d dates of %d x %d px: %lld observed, %lld filled, %lld left empty -> %s\n",
                KALENDS_VERSION, summary.dates, summary.width, summary.height,
                static_cast<long long>(summary.observed), static_cast<long long>(summary.filled),
                static_cast<long long>(summary.unfilled), summary.out_dir.c_str());
  } catch (const kalends::Error& e) {
    std::fprintf(stderr, "fill_stack: %s: %s\n", e.where().c_str(), e.reason().c_str());
    return 1;
  }
  return 0;
}
