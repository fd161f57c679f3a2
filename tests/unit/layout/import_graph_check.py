#!/usr/bin/env python3
"""Checks the layout rules of DEVELOPERS.md ("Layout") on the source tree, as ctest's
layout_import_graph test (label unit):

1. The import graph of daemon/ points one way (daemon/CMakeLists.txt):
       cli -> service, offline -> protocol, settings, formats, charts, simulator, concurrency
           -> core, and protocol -> settings (the mode rule for secret files)
   A file in daemon/FOLDER includes "OTHER/x.h" only for an OTHER that FOLDER may depend on.
2. Third-party headers stay in the targets that link them (CLI11 only in cli, toml++ only in
   settings, cairo only in charts, ZeroMQ, Boost.Asio, prometheus-cpp and spdlog only where the
   CMake target links them).
3. core depends on nothing of the daemon, and its public headers include only public headers:
   core/include/nuwatch/*.h is the API, core/src/*.h are internals that only core/src and tests
   may include.

Usage: import_graph_check.py SOURCE_DIR. Prints every violation and exits 1 if there is one.
"""
import pathlib
import re
import sys

# What each daemon folder may include from the other daemon folders (itself always).
ALLOWED = {
    "concurrency": set(),
    # protocol reads CURVE key files with settings' rule for secret files (secret_file.h).
    "protocol": {"settings"},
    "settings": set(),
    "formats": set(),
    "charts": set(),
    "simulator": {"formats"},
    "offline": {"formats", "settings", "charts", "concurrency"},
    "service": {"settings", "protocol", "concurrency"},
    "cli": {"offline", "service", "protocol", "settings", "formats", "charts", "simulator",
            "concurrency"},
}

# Third-party include prefixes and the folders whose targets link the library.
THIRD_PARTY = {
    "CLI/": {"cli"},
    "toml++/": {"settings"},
    "cairo": {"charts"},
    "zmq": {"protocol", "service", "cli"},
    "boost/": {"service", "concurrency", "cli"},
    "prometheus/": {"service"},
    "spdlog/": {"service", "cli"},
}

INCLUDE = re.compile(r'^\s*#\s*include\s*([<"])([^>"]+)[>"]', re.MULTILINE)


def includes(path):
    return INCLUDE.findall(path.read_text(encoding="utf-8", errors="replace"))


def main():
    root = pathlib.Path(sys.argv[1] if len(sys.argv) > 1 else ".")
    daemon = root / "daemon"
    public = {p.name for p in (root / "core/include/nuwatch").glob("*.h")}
    private = {p.name for p in (root / "core/src").glob("*.h")}
    problems = []

    folders = sorted(p.name for p in daemon.iterdir() if p.is_dir())
    unknown = [f for f in folders if f not in ALLOWED]
    if unknown:
        problems.append("daemon/ has folders the graph does not know: %s (add them to ALLOWED "
                        "here and to DEVELOPERS.md)" % ", ".join(unknown))

    for folder in folders:
        for path in sorted((daemon / folder).glob("*")):
            if path.suffix not in (".h", ".cc"):
                continue
            where = path.relative_to(root)
            for kind, name in includes(path):
                head = name.split("/")[0]
                if kind == '"' and head in ALLOWED and head != folder:
                    if head not in ALLOWED.get(folder, set()):
                        problems.append("%s includes \"%s\": %s may not depend on %s"
                                        % (where, name, folder, head))
                if kind == '"' and head == "nuwatch" and name[len("nuwatch/"):] not in public:
                    problems.append("%s includes \"%s\", which is not a public core header"
                                    % (where, name))
                for prefix, users in THIRD_PARTY.items():
                    if name.startswith(prefix) and folder not in users:
                        problems.append("%s includes <%s>: only %s may use it"
                                        % (where, name, ", ".join(sorted(users))))

    for path in sorted((root / "core").rglob("*")):
        if path.suffix not in (".h", ".cc"):
            continue
        where = path.relative_to(root)
        in_public = path.parent == root / "core/include/nuwatch"
        for kind, name in includes(path):
            head = name.split("/")[0]
            if kind == '"' and head in ALLOWED:
                problems.append("%s includes \"%s\": core depends on nothing of the daemon"
                                % (where, name))
            if in_public and kind == '"' and not (head == "nuwatch" and
                                                  name[len("nuwatch/"):] in public):
                problems.append("%s is public but includes \"%s\", which is not" % (where, name))
            if kind == "<" and any(name.startswith(p) for p in list(THIRD_PARTY) + ["nlohmann/"]):
                problems.append("%s includes <%s>: core depends on Eigen only" % (where, name))

    for path in sorted(daemon.rglob("*")):
        if path.suffix not in (".h", ".cc"):
            continue
        for kind, name in includes(path):
            if kind == '"' and "/" not in name and name in private:
                problems.append("%s includes core's internal \"%s\"" % (path.relative_to(root),
                                                                        name))

    for problem in problems:
        print(problem)
    print("%d layout violation(s)" % len(problems) if problems else "layout ok")
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
