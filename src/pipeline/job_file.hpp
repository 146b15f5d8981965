// The job file: TOML read with toml++, checked strictly (unknown keys and wrong types are
// errors naming the line), resolved into inputs and steps.
#pragma once

#include <map>
#include <optional>
#include <string>
#include <vector>

namespace kalends::detail {

/// A step's options as text, in key order: the fingerprint of its parameters.
using StepOptions = std::map<std::string, std::string>;

struct JobInput {
  std::string name;
  std::string stack;  // pattern or raster, resolved against the job file's folder
  std::string qa, keep;
  std::optional<double> scale, offset, nodata, valid_min, valid_max;
  int band = 1, qa_band = 1;
  int stack_line = 0, qa_line = 0;  // where the job file sets them
};

struct JobStep {
  std::string id, kind;   // kind: index, fill, seasons, compare
  std::vector<std::string> inputs;  // names of inputs or earlier steps it reads
  StepOptions options;
  int line = 0;
};

struct Job {
  std::string path, folder;  // the job file and the folder relative paths start from
  std::string name, out;
  int threads = 0;
  std::string memory = "1G";
  int memory_line = 0;  // where the job file sets it; 0: the default
  std::map<std::string, JobInput> inputs;
  std::vector<JobStep> steps;
};

/// Reads and checks the job file; UsageError("job.toml:LINE", reason) on any mistake.
Job read_job(const std::string& path);

}  // namespace kalends::detail
