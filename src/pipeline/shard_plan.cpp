#include "pipeline/shard_plan.hpp"

#include <algorithm>
#include <filesystem>
#include <fmt/format.h>
#include <fstream>

#include "kalends/error.hpp"
#include "kalends/fill.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

namespace fs = std::filesystem;

const PlannedStep* ShardPlan::step(const std::string& id) const {
  for (const PlannedStep& s : steps)
    if (s.id == id) return &s;
  return nullptr;
}

Window ShardPlan::window(const std::string& root, int k) const {
  const Grid& g = grids.at(root);
  const int strips = (g.height + tile - 1) / tile;
  const int first = int(std::int64_t(k - 1) * strips / shards), last = int(std::int64_t(k) * strips / shards);
  const int y0 = first * tile, y1 = std::min(last * tile, g.height);
  return Window{0, y0, g.width, y1 - y0};
}

std::string ShardPlan::shard_folder(int k) const {
  return (fs::path(out) / ".kalends" / "shards" / fmt::format("{}-of-{}", k, shards)).string();
}

std::string ShardPlan::file() const { return (fs::path(out) / ".kalends" / "plan.tsv").string(); }

namespace {
// A field with a tab or a line break would split the plan's lines; escaped as in the text
// format of PostgreSQL's COPY (common practice for tab-separated files).
std::string tsv_field(const std::string& text) {
  std::string out;
  out.reserve(text.size());
  for (const char c : text) {
    switch (c) {
      case '\\': out += "\\\\"; break;
      case '\t': out += "\\t"; break;
      case '\n': out += "\\n"; break;
      case '\r': out += "\\r"; break;
      default: out += c;
    }
  }
  return out;
}
}  // namespace

std::string ShardPlan::text() const {
  std::string t = "# kalends shard plan: shard K of N computes its rows of every split step (kalends run JOB --shard K);\n"
                  "# the other steps run in kalends run JOB --finalize. Written by kalends plan.\n";
  t += fmt::format("job\t{}\nout\t{}\nshards\t{}\ntile\t{}\nmemory_mib\t{}\nthreads\t{}\n", tsv_field(job_path), tsv_field(out), shards, tile,
                   (memory_bytes + 1048575) / 1048576, threads);
  for (const PlannedStep& s : steps)
    t += fmt::format("step\t{}\t{}\t{}\t{}\n", tsv_field(s.id), tsv_field(s.kind), s.split ? "split" : "finalize",
                     tsv_field(s.split ? s.root : s.why_whole));
  for (const auto& [root, g] : grids)
    for (int k = 1; k <= shards; ++k) {
      const Window w = window(root, k);
      t += fmt::format("shard\t{}\t{}\trows\t{}\t{}\tcolumns\t{}\t{}\n", k, tsv_field(root), w.y, w.y + w.height, w.x, w.x + w.width);
    }
  return t;
}

ShardPlan make_shard_plan(const Job& job, const std::string& out, int shards, int threads,
                          std::vector<std::string>* left_out, std::vector<std::string>* skipped) {
  if (shards < 1) throw UsageError("--shards", "must be at least 1");
  ShardPlan plan;
  plan.shards = shards;
  plan.job_path = fs::absolute(job.path).lexically_normal().string();
  plan.out = fs::absolute(out).lexically_normal().string();
  // Room above the job's memory budget for what it does not count (common practice: a quarter).
  plan.memory_bytes = parse_memory_size(job.memory) * 5 / 4;
  plan.threads = threads > 0 ? threads : job.threads > 0 ? job.threads : 4;
  for (const JobStep& js : job.steps) {
    PlannedStep s;
    s.id = js.id;
    s.kind = js.kind;
    const StepKind* kind = find_step_kind(js.kind);
    bool from_inputs = false, from_steps = false;
    std::string root, why;
    // Decided by the kind alone first: only candidates have their inputs' grids opened.
    if (!kind || !kind->splits_by_area) why = "needs the whole area";
    else if (js.options.count("tiles")) why = "a tile set: its tiles are its own windows";
    for (const std::string& name : why.empty() ? js.inputs : std::vector<std::string>{}) {
      std::string this_root;
      if (job.inputs.count(name)) {
        from_inputs = true;
        this_root = name;
      } else {
        from_steps = true;
        const PlannedStep* earlier = plan.step(name);
        if (!earlier || !earlier->split) {
          why = "reads '" + name + "', which is computed in --finalize";
          break;
        }
        this_root = earlier->root;
      }
      if (!plan.grids.count(this_root)) {
        const JobInput& input = job.inputs.at(this_root);
        ValueRules rules;
        rules.band = input.band;
        for (int attempt = 0;; ++attempt) {
          if (left_out) rules.exclude = *left_out;
          try {
            plan.grids[this_root] = Stack::open(input.stack, rules).grid();
            break;
          } catch (const InputError& e) {
            // As a run's --skip-bad: a damaged file is left out, the others give the grid.
            if (!skipped || !left_out || attempt > 1000 || e.where().empty() || !fs::is_regular_file(e.where()) ||
                std::find(left_out->begin(), left_out->end(), e.where()) != left_out->end())
              throw;
            left_out->push_back(e.where());
            skipped->push_back(e.where() + ": " + e.reason());
          }
        }
      }
      if (!root.empty()) {
        const Grid &a = plan.grids.at(root), &b = plan.grids.at(this_root);
        if (a.width != b.width || a.height != b.height) {
          why = "reads grids of different sizes";
          break;
        }
      } else {
        root = this_root;
      }
    }
    if (why.empty() && root.empty()) why = "reads nothing a shard could split";
    else if (why.empty() && from_inputs && from_steps) why = "reads both a job input and an earlier step";
    s.split = why.empty();
    s.why_whole = why;
    if (s.split) {
      s.root = root;
      s.reads_inputs = from_inputs;
    }
    plan.steps.push_back(s);
  }
  // Only grids of split steps matter; every one needs a strip per shard.
  std::map<std::string, Grid> used;
  for (const PlannedStep& s : plan.steps)
    if (s.split) used[s.root] = plan.grids.at(s.root);
  plan.grids = used;
  for (const auto& [root, g] : plan.grids) {
    const int strips = (g.height + ShardPlan::tile - 1) / ShardPlan::tile;
    if (strips < shards)
      throw UsageError("--shards", fmt::format("input '{}' has {} rows, {} strip{} of {} rows: use at most {} shard{}",
                                               root, g.height, strips, strips == 1 ? "" : "s", ShardPlan::tile, strips,
                                               strips == 1 ? "" : "s"));
  }
  return plan;
}

int planned_shard_count(const std::string& out) {
  std::ifstream in(fs::path(out) / ".kalends" / "plan.tsv");
  for (std::string line; std::getline(in, line);)
    if (line.rfind("shards\t", 0) == 0) return std::atoi(line.c_str() + 7);
  return 0;
}

}  // namespace kalends::detail
