#!/usr/bin/python3
"""Pauses the machine itself imposes on a thread that wants its core (a probe, not a test).

A loop that does nothing but read the clock should see it advance by a fraction of a microsecond
each time round. A jump of more than --over-ms means the thread was off its core: a kernel
thread, an interrupt or the hypervisor ran instead. Pinned to one core with taskset, it shows
what any latency measured on that core has to live with. Prints one line per pause, seconds
since the start and the pause in ms, then a summary line on stderr.

  taskset -c 0 /usr/bin/python3 tests/bench/core_stalls.py --seconds 20 > core0.txt &
  taskset -c 1 /usr/bin/python3 tests/bench/core_stalls.py --seconds 20 > core1.txt; wait

Run it on an otherwise idle machine; `perf sched record -a -- sleep 20` beside it and then
`perf sched timehist` name the tasks that ran in the pauses.
"""
import argparse
import sys
import time


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=10.0, help="how long to watch")
    parser.add_argument("--over-ms", type=float, default=1.0, help="the shortest pause reported")
    args = parser.parse_args()
    limit = args.over_ms * 1e-3
    pauses = []
    start = last = time.monotonic()
    end = start + args.seconds
    while last < end:
        now = time.monotonic()
        if now - last > limit:
            pauses.append((last - start, 1e3 * (now - last)))
        last = now
    for at, ms in pauses:
        print(f"{at:.3f} {ms:.2f}")
    longest = max((ms for _, ms in pauses), default=0.0)
    print(f"{len(pauses)} pauses over {args.over_ms} ms in {args.seconds} s, the longest "
          f"{longest:.2f} ms, {sum(ms for _, ms in pauses):.1f} ms in all", file=sys.stderr)


if __name__ == "__main__":
    main()
