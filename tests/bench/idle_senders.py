#!/usr/bin/python3
"""CPU nuwatchd spends on idle ingest connections (a benchmark, not a test).

The ingest guard looks at every ingest TCP connection every 100 ms (TCP_INFO, the peer's
address, the receive buffer: three system calls each), so its cost grows with the senders
connected. This starts nuwatchd, reads its CPU time (/proc/PID/stat, user + system) over
--seconds with no sender, then with --senders pyzmq PUSH sockets connected, each having sent one
vector, and prints both as a percentage of one core.

  /usr/bin/python3 tests/bench/idle_senders.py --nuwatchd build/bin/nuwatchd --senders 256
"""
import argparse
import json
import os
import subprocess
import tempfile
import time

import zmq

from ingest_flood import wait_for_ready


def cpu_seconds(pid):
    with open("/proc/%d/stat" % pid) as f:
        fields = f.read().rsplit(")", 1)[1].split()
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--nuwatchd", required=True)
    parser.add_argument("--senders", type=int, default=256)
    parser.add_argument("--seconds", type=float, default=20.0)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as work:
        ready = os.path.join(work, "ready.json")
        daemon = subprocess.Popen(
            [args.nuwatchd, "--ingest", "tcp://127.0.0.1:*", "--publish", "tcp://127.0.0.1:*",
             "--metrics", "127.0.0.1:0", "--control", "ipc://" + work + "/control",
             "--state-dir", os.path.join(work, "state"), "--ready-file", ready,
             "--log-level", "error"])
        context = zmq.Context()
        try:
            endpoints = wait_for_ready(daemon, ready)
            result = {"seconds": args.seconds}
            for senders in (0, args.senders):
                sockets = []
                for i in range(senders):
                    s = context.socket(zmq.PUSH)
                    s.setsockopt(zmq.LINGER, 0)
                    s.connect(endpoints["ingest"][0])
                    s.send_multipart([b"idle-%03d" % i, b'{"t":[1],"x":[[1,2]]}'])
                    sockets.append(s)
                time.sleep(2)  # connected, handshaken, the vector scored
                before, started = cpu_seconds(daemon.pid), time.monotonic()
                time.sleep(args.seconds)
                used = cpu_seconds(daemon.pid) - before
                result["percent_of_a_core_with_%d_senders" % senders] = round(
                    100 * used / (time.monotonic() - started), 2)
                for s in sockets:
                    s.close()
            print(json.dumps(result))
        finally:
            context.term()
            daemon.terminate()
            daemon.wait(timeout=60)


if __name__ == "__main__":
    main()
