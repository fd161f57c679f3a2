// nuwatch: the command-line tool (fit, score, inspect, bench, replay, simulate, tune, evaluate,
// send, tail). Each subcommand lives in its own cmd_*.cc file and registers itself.
#include <malloc.h>
#include <sys/mman.h>
#include <unistd.h>

#include <algorithm>
#include <cstdint>
#include <cstdlib>
#include <exception>
#include <iostream>

#include "cli/cli_util.h"
#include "cli/commands.h"
#include "nuwatch/types.h"

namespace nuwatch::cli {

std::vector<RegisteredCommand>& RegisteredCommands() {
  static std::vector<RegisteredCommand> commands;
  return commands;
}

CommandRegistration::CommandRegistration(int order, CommandAdder adder) {
  RegisteredCommands().push_back({order, adder});
}

}  // namespace nuwatch::cli

namespace {

// A command touches most of its memory once: a 5000-row fit fills about 12 MB of kernel columns
// and blocks, and on this virtual machine each first touch of a 4 KiB page costs several
// microseconds (3000 page faults were a third of the fit's 0.06 s; perf stat). Transparent huge
// pages take that to a handful, but the kernel gives them only where the program asks
// (transparent_hugepage/enabled = madvise, Debian 12's default). glibc asks by itself under
// GLIBC_TUNABLES=glibc.malloc.hugetlb=1, which it reads before main; so this grows the heap once
// by a pad and advises that range, where the command's allocations then land. Other threads'
// arenas and memory beyond the pad keep small pages; nothing depends on this but speed.
void AdviseHugePagesForTheHeap() {
  constexpr std::size_t kHugePage = std::size_t{2} << 20;
  constexpr std::size_t kPad = std::size_t{64} << 20;
  mallopt(M_TOP_PAD, static_cast<int>(kPad));
  char* const before = static_cast<char*>(sbrk(0));
  void* const probe = std::malloc(kHugePage);  // extends the heap by about the pad
  // Written, so that the compiler does not drop the malloc and free as unused.
  if (probe != nullptr) *static_cast<volatile char*>(probe) = 0;
  char* const after = static_cast<char*>(sbrk(0));
  std::free(probe);  // kept by the heap: M_TRIM_THRESHOLD is far above it
  // A sanitizer's allocator does not use the heap: then nothing moved.
  if (before == reinterpret_cast<char*>(-1) || after <= before) return;
  const auto aligned =
      (reinterpret_cast<std::uintptr_t>(before) + kHugePage - 1) & ~(kHugePage - 1);
  const auto end = reinterpret_cast<std::uintptr_t>(after) & ~(kHugePage - 1);
  if (end > aligned) {
    (void)madvise(reinterpret_cast<void*>(aligned), end - aligned, MADV_HUGEPAGE);
  }
}

}  // namespace

int main(int argc, char** argv) {
  // nuwatch runs once and exits. Batch scoring allocates and frees megabyte temporaries per block
  // of rows; glibc would hand each back to the kernel and fault it in again (a fifth of `score`'s
  // time on 200,000 rows). Keep freed memory for reuse instead.
  mallopt(M_TRIM_THRESHOLD, 512 << 20);
  mallopt(M_MMAP_THRESHOLD, 32 << 20);  // the largest glibc takes
  AdviseHugePagesForTheHeap();
  CLI::App app{
      "nuwatch: learn each stream's normal envelope with a nu one-class SVM and flag what "
      "falls outside it"};
  app.require_subcommand(1);
  app.set_version_flag("--version", NUWATCH_VERSION);
  // Every flag given twice takes its last value, as most command lines do (subcommands inherit
  // this default; a repeatable flag such as tail's --stream says so itself).
  app.option_defaults()->multi_option_policy(CLI::MultiOptionPolicy::TakeLast);
  auto commands = nuwatch::cli::RegisteredCommands();
  std::sort(commands.begin(), commands.end(),
            [](const auto& a, const auto& b) { return a.order < b.order; });
  for (const auto& command : commands) command.adder(app);
  try {
    nuwatch::cli::CheckUnknownFlags(app, argc, argv);
  } catch (const std::exception& e) {
    std::cerr << "nuwatch " << argv[1] << ": " << e.what() << "\n";
    return 1;
  }
  try {
    app.parse(argc, argv);
  } catch (const CLI::CallForHelp& e) {
    return app.exit(e);
  } catch (const CLI::CallForAllHelp& e) {
    return app.exit(e);
  } catch (const CLI::CallForVersion& e) {
    return app.exit(e);
  } catch (const CLI::ParseError& e) {
    // One line and status 1, like every other bad input ("--nu: Value abc not a number").
    std::string name = "nuwatch";
    for (const CLI::App* sub : app.get_subcommands()) name += " " + sub->get_name();
    std::cerr << name << ": " << e.what() << " (see --help)\n";
    return 1;
  } catch (const nuwatch::cli::CommandStatusError& e) {
    std::string name = "nuwatch";
    for (const CLI::App* sub : app.get_subcommands()) name += " " + sub->get_name();
    std::cerr << name << ": " << e.what() << "\n";
    return e.exit_status();
  } catch (const std::exception& e) {
    std::string name = "nuwatch";
    for (const CLI::App* sub : app.get_subcommands()) name += " " + sub->get_name();
    std::cerr << name << ": " << e.what() << "\n";
    return 1;
  }
  return 0;
}
