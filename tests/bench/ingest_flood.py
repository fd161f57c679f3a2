#!/usr/bin/python3
"""Memory of nuwatchd under a flood of maximal ingest messages (a benchmark, not a test).

PEERS PUSH sockets (pyzmq) each send MESSAGES valid binary messages as close to
limits.max_message_bytes (4 MiB by default) as the protocol allows: 4096 vectors of 126 f64
features, one stream per peer, as fast as ZeroMQ takes them, while this script samples the
daemon's resident memory (VmRSS, /proc) every 20 ms. It waits until the daemon has counted every
vector, scored (nuwatch_vectors_total) or shed (nuwatch_ingest_shed_messages_total, 4096 each:
ingest.max_unread_bytes), lets it idle for six seconds (the daemon trims its heap every five) and
reads VmRSS again. Prints one JSON object: peak and settled RSS, the RSS before the flood, the
bytes sent and the messages shed.

  /usr/bin/python3 tests/bench/ingest_flood.py --nuwatchd build/bin/nuwatchd --peers 1 --messages 300
  /usr/bin/python3 tests/bench/ingest_flood.py --nuwatchd build/bin/nuwatchd --peers 10 --messages 30
  /usr/bin/python3 tests/bench/ingest_flood.py --nuwatchd build/bin/nuwatchd --peers 1 --messages 300 \
      --receive-high-water-mark 8
  /usr/bin/python3 tests/bench/ingest_flood.py --nuwatchd build/bin/nuwatchd --peers 1 --messages 300 \
      --max-unread-bytes 0
  /usr/bin/python3 tests/bench/ingest_flood.py --nuwatchd build/bin/nuwatchd --peers 1 --messages 300 \
      --subscribe

With --subscribe the peers are PUB sockets (no mark, so that they drop nothing) that the daemon
subscribes to (ingest.subscribe) instead of PUSH sockets connected to its ingest socket.
"""
import argparse
import json
import os
import struct
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request

import zmq

sys.path.insert(0, os.path.join(os.path.dirname(__file__), "..", "integration"))
import python_codec_check as codec  # noqa: E402

VECTORS, DIMS = 4096, 126  # 4096 * (126 + 1) * 8 + header = 4,161,560 bytes <= 4 MiB


def rss_bytes(pid):
    with open("/proc/%d/status" % pid) as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) * 1024
    return 0


def gauge(metrics, name):
    text = urllib.request.urlopen("http://%s/metrics" % metrics, timeout=5).read().decode()
    for line in text.splitlines():
        if line.startswith(name + " "):
            return float(line.rsplit(" ", 1)[1])
    return 0.0


def vectors_counted(metrics):
    """(vectors scored, messages shed) as the metrics endpoint counts them."""
    text = urllib.request.urlopen("http://%s/metrics" % metrics, timeout=5).read().decode()
    total = 0.0
    shed = 0.0
    for line in text.splitlines():
        if line.startswith("nuwatch_vectors_total{"):
            total += float(line.rsplit(" ", 1)[1])
        elif line.startswith("nuwatch_ingest_shed_messages_total"):
            shed += float(line.rsplit(" ", 1)[1])
    return total, shed


def wait_for_ready(daemon, ready):
    """The endpoints nuwatchd wrote to its --ready-file once it listens (30 s at most)."""
    deadline = time.monotonic() + 30
    while not os.path.exists(ready):
        assert daemon.poll() is None and time.monotonic() < deadline, "no ready file"
        time.sleep(0.05)
    with open(ready) as f:
        return json.load(f)


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--nuwatchd", required=True)
    parser.add_argument("--peers", type=int, default=1)
    parser.add_argument("--messages", type=int, default=300)
    parser.add_argument("--receive-high-water-mark", type=int, default=None,
                        help="ingest.receive_high_water_mark of the daemon (default: its own)")
    parser.add_argument("--max-unread-bytes", type=int, default=None,
                        help="ingest.max_unread_bytes of the daemon (default: its own; 0: none)")
    parser.add_argument("--subscribe", action="store_true",
                        help="the peers are publishers the daemon subscribes to (ingest.subscribe)")
    args = parser.parse_args()

    payload_rows = [[(i * 7 + j) % 13 * 0.1 for j in range(DIMS)] for i in range(VECTORS)]
    context = zmq.Context()
    publishers = []
    if args.subscribe:
        for _ in range(args.peers):
            pub = context.socket(zmq.PUB)
            pub.setsockopt(zmq.SNDHWM, 0)
            pub.setsockopt(zmq.LINGER, 0)
            port = pub.bind_to_random_port("tcp://127.0.0.1")
            publishers.append((pub, "tcp://127.0.0.1:%d" % port))
    with tempfile.TemporaryDirectory() as work:
        config = os.path.join(work, "flood.toml")
        with open(config, "w") as f:
            # A short window keeps the streams' own memory (126 x 500 x 8 bytes each) small
            # beside the queued messages, which are what this measures.
            f.write("[detector]\nwindow = 500\nwarmup = 400\nrefit_every = 0\n")
            f.write("[ingest]\n")
            if args.receive_high_water_mark is not None:
                f.write("receive_high_water_mark = %d\n" % args.receive_high_water_mark)
            if args.max_unread_bytes is not None:
                f.write("max_unread_bytes = %d\n" % args.max_unread_bytes)
            if publishers:
                f.write("subscribe = [%s]\n" % ", ".join('"%s"' % e for _, e in publishers))
        ready = os.path.join(work, "ready.json")
        daemon = subprocess.Popen(
            [args.nuwatchd, "--config", config, "--ingest", "tcp://127.0.0.1:*",
             "--publish", "tcp://127.0.0.1:*", "--metrics", "127.0.0.1:0",
             "--control", "ipc://" + work + "/control", "--ready-file", ready,
             "--log-level", "warn"])
        try:
            endpoints = wait_for_ready(daemon, ready)
            deadline = time.monotonic() + 30
            # A PUB sends nothing until the subscription has reached it: probe each publisher
            # (a stream of its own, one small vector at a time) until the daemon counts one.
            probes = 0
            for p, (pub, _) in enumerate(publishers):
                key = ("probe-%02d" % p).encode()
                while True:
                    assert time.monotonic() < deadline, "a subscription never joined"
                    pub.send_multipart([key, codec.encode_json([float(probes)], [[0.0, 1.0]])])
                    probes += 1
                    time.sleep(0.02)
                    text = urllib.request.urlopen("http://%s/metrics" % endpoints["metrics"],
                                                  timeout=5).read().decode()
                    if ('nuwatch_vectors_total{stream="%s"}' % key.decode()) in text:
                        break
            time.sleep(0.5)
            before = rss_bytes(daemon.pid)
            peak = [before]
            # The daemon's own gauges, sampled as often: what ZeroMQ held unread at a check, and
            # what the scoring threads had queued.
            gauges = {"nuwatch_ingest_unread_bytes": 0.0, "nuwatch_ingest_queued_bytes": 0.0}
            sampling = threading.Event()
            sampling.set()

            def sample():
                while sampling.is_set():
                    peak[0] = max(peak[0], rss_bytes(daemon.pid))
                    for name in gauges:
                        gauges[name] = max(gauges[name], gauge(endpoints["metrics"], name))
                    time.sleep(0.02)

            sampler = threading.Thread(target=sample)
            sampler.start()
            payloads = [codec.encode_binary([float(m * VECTORS + i) for i in range(VECTORS)],
                                            payload_rows) for m in range(2)]
            sent_bytes = 0

            def flood(peer):
                nonlocal sent_bytes
                if publishers:
                    push = publishers[peer][0]
                else:
                    push = context.socket(zmq.PUSH)
                    push.setsockopt(zmq.LINGER, -1)
                    push.connect(endpoints["ingest"][0])
                key = ("flood-%02d" % peer).encode()
                for m in range(args.messages):
                    times = [float(m * VECTORS + i) for i in range(VECTORS)]
                    body = struct.pack("<%dd" % VECTORS, *times)
                    payload = payloads[0][:codec.HEADER.size] + body + \
                        payloads[0][codec.HEADER.size + 8 * VECTORS:]
                    push.send_multipart([key, payload])
                    sent_bytes += len(payload)
                if not publishers:
                    push.close()

            probes_scored = vectors_counted(endpoints["metrics"])[0]  # the subscriptions' probes
            started = time.monotonic()
            peers = [threading.Thread(target=flood, args=(p,)) for p in range(args.peers)]
            for t in peers:
                t.start()
            for t in peers:
                t.join()
            expected = args.peers * args.messages * VECTORS + probes_scored
            while True:
                scored, shed = vectors_counted(endpoints["metrics"])
                if scored + shed * VECTORS >= expected:
                    break
                assert daemon.poll() is None, "nuwatchd exited"
                assert time.monotonic() - started < 600, "not every vector counted"
                time.sleep(0.2)
            drained = time.monotonic() - started
            time.sleep(6.0)  # longer than the daemon's 5 s heap trim interval
            settled = rss_bytes(daemon.pid)
            sampling.clear()
            sampler.join()
            for pub, _ in publishers:
                pub.close()
            context.term()
            print(json.dumps({
                "peers": args.peers, "messages_per_peer": args.messages,
                "subscribe": args.subscribe,
                "receive_high_water_mark": args.receive_high_water_mark,
                "max_unread_bytes": args.max_unread_bytes,
                "messages_shed": shed, "vectors_scored": scored,
                "message_bytes": len(payloads[0]), "sent_bytes": sent_bytes,
                "rss_before_bytes": before, "rss_peak_bytes": peak[0],
                "rss_settled_bytes": settled,
                "peak_unread_bytes_gauge": gauges["nuwatch_ingest_unread_bytes"],
                "peak_queued_bytes_gauge": gauges["nuwatch_ingest_queued_bytes"],
                "seconds_to_count_every_vector": round(drained, 2),
            }))
        finally:
            daemon.terminate()
            daemon.wait(timeout=120)


if __name__ == "__main__":
    main()
