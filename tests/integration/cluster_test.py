#!/usr/bin/python3
"""Several nuwatchd replicas sharing streams by owner (daemon/protocol/PROTOCOL.md §13), as real
processes on loopback.

The routing sender here is written from PROTOCOL.md §13.2 alone: the owner of a key is the member
with the largest BLAKE2b-64(member || 0x00 || key), computed with Python's hashlib.blake2b (a
third-party BLAKE2 implementation) in python_codec_check.py, and messages go over pyzmq
(python3-zmq) PUSH sockets with that file's encoders; `nuwatch send --member NAME=ENDPOINT` is the other sender. The
daemons' results are read on their result sockets, their counters over HTTP, their status on the
control socket. The fraction of keys a fourth member takes is checked against the binomial law of
rendezvous hashing (Thaler & Ravishankar 1998): each key moves with probability 1/4.

Usage (run by tests/integration/cluster_test.cc):
  cluster_test.py --nuwatchd BIN --nuwatch BIN [unittest arguments]
"""

import argparse
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import unittest

import zmq

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import daemon_e2e_test as e2e  # noqa: E402  (the nuwatchd process, pyzmq peer and metrics helpers)
import python_codec_check as codec  # noqa: E402

NUWATCH = None
STREAMS = 300
# How long a test waits for results or models. Generous: under ThreadSanitizer, with another test
# on the 2-core CI machine, four replicas took over 30 s for the 9000 vectors of one phase (CI on
# 2026-12-03: 57 of 60 results per stream after 30 s); a release build takes about a second.
WAIT = 120
# Small detectors, so that 300 streams warm up in a few seconds. No periodic refit within a run
# (refit_every is larger than what a stream receives) and no calibration: each stream's model is the
# one fitted on its first WARMUP vectors, so a replica's decisions can be compared with a lone
# daemon's vector for vector.
WINDOW, WARMUP = 40, 30
DETECTOR = """
[limits]
max_streams = 2000
max_dims = 8

[detector]
nu = 0.1
window = %d
warmup = %d
refit_every = 1000
support_vector_budget = 64
calibration_folds = 0
""" % (WINDOW, WARMUP)


# PROTOCOL.md §13.2 in python_codec_check.py, the independent Python reading of the document.
owner = codec.owner_of


def probe_key(name, members):
    """A probe key the member owns, so that the probe is scored there (e2e's probe is "probe")."""
    if not members:
        return "probe"
    return next("probe-%d" % i for i in range(1000) if owner("probe-%d" % i, members) == name)


def names(n):
    return ["nuwatchd-%d" % i for i in range(n)]


def cluster_config(members, control_endpoint=None, handoff_timeout=None):
    text = DETECTOR + "\n[cluster]\nmembers = [%s]\n" % ", ".join('"%s"' % m for m in members)
    if control_endpoint:
        text += 'control_endpoint = "%s"\n' % control_endpoint
    if handoff_timeout:
        text += "handoff_timeout_seconds = %r\n" % handoff_timeout
    return text


class Replica(e2e.Daemon):
    """nuwatchd with `--member NAME` (the name from the flag, the list from the file), or a lone
    daemon (name None)."""

    def __init__(self, workdir, name, members, subscribe=None, control_endpoint=None,
                 handoff_timeout=None):
        os.makedirs(workdir, exist_ok=True)
        self.name = name
        self.subscribe = subscribe
        self.control_endpoint = control_endpoint  # cluster.control_endpoint, the handoff's
        self.handoff_timeout = handoff_timeout  # cluster.handoff_timeout_seconds (None: default)
        # e2e.Daemon writes its test configuration; the [limits] and [detector] here replace its.
        super().__init__(workdir, os.path.join(workdir, "state"))
        self.write_config(members)

    def write_config(self, members):
        with open(self.config_path, "w") as f:
            f.write('[daemon]\nlog_level = "info"\nrefit_threads = 1\nscoring_threads = 1\n')
            f.write(cluster_config(members, self.control_endpoint, self.handoff_timeout)
                    if members else DETECTOR)

    def start(self):
        if os.path.exists(self.ready_path):
            os.remove(self.ready_path)
        self.log = open(self.log_path, "wb")
        args = [e2e.NUWATCHD, "--config", self.config_path,
                "--ingest", "tcp://127.0.0.1:*", "--publish", "tcp://127.0.0.1:*",
                "--metrics", "127.0.0.1:0", "--state-dir", self.state_dir,
                "--ready-file", self.ready_path]
        if self.name is not None:
            args += ["--member", self.name]
        if self.subscribe:
            args += ["--subscribe", self.subscribe]
        self.process = subprocess.Popen(args, stdout=self.log, stderr=subprocess.STDOUT,
                                        stdin=subprocess.DEVNULL)
        deadline = time.monotonic() + e2e.START_TIMEOUT
        while not os.path.exists(self.ready_path):
            if self.process.poll() is not None:
                raise AssertionError("nuwatchd exited with %d before it was ready:\n%s"
                                     % (self.process.returncode, self.log_tail()))
            if time.monotonic() > deadline:
                raise AssertionError("no ready file:\n%s" % self.log_tail())
            time.sleep(0.02)  # polling a file for its appearance, bounded by the deadline
        with open(self.ready_path) as f:
            self.endpoints = json.load(f)
        return self.endpoints


class Fleet:
    """Invented readings of STREAMS units (Gaussian noise around a point per unit)."""

    def __init__(self, seed):
        rng = random.Random(seed)
        self.keys = ["site-%d/pump-%03d" % (i % 3, i) for i in range(STREAMS)]
        self.center = {k: [rng.uniform(5, 15), rng.uniform(40, 60), rng.uniform(0.5, 2)]
                       for k in self.keys}
        self.rng = random.Random(seed + 1)
        self.next_t = {k: e2e.T0 for k in self.keys}

    def rows(self, count, keys=None):
        """count vectors per stream, interleaved across the streams: [(key, t, x)]."""
        out = []
        for _ in range(count):
            for k in keys or self.keys:
                t = self.next_t[k]
                self.next_t[k] += 10.0
                out.append((k, t, [c + self.rng.gauss(0, 0.05 * c) for c in self.center[k]]))
        return out

    @staticmethod
    def write_csv(path, rows):
        with open(path, "w") as f:
            f.write("time,stream,a,b,c\n")
            for k, t, x in rows:
                f.write("%r,%s,%s\n" % (t, k, ",".join(repr(v) for v in x)))


class ClusterTestCase(unittest.TestCase):
    def setUp(self):
        for program in (e2e.NUWATCHD, NUWATCH):
            if not program or not os.access(program, os.X_OK):
                self.fail("program not found or not executable: %r" % program)
        self.workdir = tempfile.mkdtemp(prefix="nuwatch-cluster-")
        self.replicas = {}  # name (None: the lone daemon) -> Replica
        self.peers = {}
        self.context = zmq.Context()
        self.routes = {}  # member -> PUSH socket of the Python router

    def tearDown(self):
        self.context.destroy(linger=0)
        for peer in self.peers.values():
            peer.close()
        for replica in self.replicas.values():
            replica.kill()
        failed = getattr(getattr(self, "_outcome", None), "result", None)
        if failed is None or any(t is self for t, _ in failed.errors + failed.failures):
            # Without the incident lines, which are many and routine, so that the failure's own
            # message (printed after this) is not cut from a CI log that keeps its two ends.
            for replica in self.replicas.values():
                lines = [line for line in replica.log_text().splitlines()
                         if " incident opened " not in line and " incident closed " not in line]
                sys.stderr.write("--- %s ---\n%s\n" % (replica.log_path, "\n".join(lines[-25:])))
        shutil.rmtree(self.workdir, ignore_errors=True)

    def start(self, name, members, subscribe=None, probe=True, control_endpoint=None,
              handoff_timeout=None):
        replica = Replica(os.path.join(self.workdir, name or "lone"), name, members, subscribe,
                          control_endpoint, handoff_timeout)
        self.replicas[name] = replica
        endpoints = replica.start()
        peer = e2e.Peer(endpoints)
        # status pauses every scoring thread; with four or five ThreadSanitizer daemons and another
        # test on two cores, a reply took over 10 s while a warm-up was queued.
        peer.control_timeout = WAIT
        # Thousands of results arrive while the test is sending: no high-water mark on this side
        # (set before connecting), so that the daemon never has to drop one for a slow reader.
        peer.sub.close()
        peer.sub = peer.context.socket(zmq.SUB)
        peer.sub.setsockopt(zmq.LINGER, 0)
        peer.sub.setsockopt(zmq.RCVHWM, 0)
        peer.sub.setsockopt(zmq.SUBSCRIBE, b"")
        # The monitor goes on before connect: set after it, it missed a handshake that a loaded
        # CI machine completed in between (the test then waited 10 s for an event already past).
        monitor = None if probe else peer.sub.get_monitor_socket(zmq.EVENT_HANDSHAKE_SUCCEEDED)
        peer.sub.connect(endpoints["publish"])
        self.peers[name] = peer
        if probe:
            peer.subscribe_with_probe(probe_key(name, members))
        else:
            # No probe result to wait for: wait for the subscriber's ZMTP handshake instead, after
            # which its subscription goes out ahead of anything the daemon publishes later.
            try:
                if not monitor.poll(int(e2e.WAIT_TIMEOUT * 1000)):
                    self.fail("%s: the result socket did not connect" % name)
            finally:
                peer.sub.disable_monitor()
                monitor.close(0)
        return replica, peer

    def route(self, rows, members):
        """The Python router of §13: each row to its owner, one JSON message per vector."""
        for key, t, x in rows:
            m = owner(key, members)
            if m not in self.routes:
                push = self.context.socket(zmq.PUSH)
                push.setsockopt(zmq.LINGER, 2000)
                push.connect(self.replicas[m].endpoints["ingest"][0])
                self.routes[m] = push
            self.routes[m].send_multipart([key.encode(), codec.encode_json([t], [x])])

    def send_to_lone(self, rows):
        for key, t, x in rows:
            self.peers[None].send(key, codec.encode_json([t], [x]))

    def nuwatch_send(self, rows, *target):
        path = os.path.join(self.workdir, "rows-%d.csv" % len(os.listdir(self.workdir)))
        Fleet.write_csv(path, rows)
        run = subprocess.run([NUWATCH, "send", "--input", path] + list(target),
                             capture_output=True, timeout=60)
        self.assertEqual(run.returncode, 0, run.stderr.decode())
        return run.stderr.decode()

    def member_flags(self, members):
        return [a for m in members
                for a in ("--member", "%s=%s" % (m, self.replicas[m].endpoints["ingest"][0]))]

    def results_by_stream(self, name, keys):
        return {k: self.peers[name].results(k) for k in keys if self.peers[name].results(k)}

    def wait_for_results(self, expected, timeout=None):
        """Until replica n has expected[n][key] results of each key (or more)."""
        timeout = timeout or WAIT
        def complete():
            return all(len(self.peers[n].results(k)) >= count
                       for n, counts in expected.items() for k, count in counts.items())
        deadline = time.monotonic() + timeout
        while not complete():
            if time.monotonic() > deadline:
                missing = [(n, k, len(self.peers[n].results(k)), c)
                           for n, counts in expected.items() for k, c in counts.items()
                           if len(self.peers[n].results(k)) < c]
                self.fail("results missing after %d s (replica, stream, got, expected): %r"
                          % (timeout, missing[:5]))
            for n in expected:
                try:
                    self.peers[n].wait_for(complete, "results", timeout=0.05)
                except AssertionError:
                    pass  # this replica has nothing more now: read the next

    def wait_for_models(self, name, keys):
        """Until the replica's status shows a model for every key of `keys`."""
        deadline = time.monotonic() + WAIT
        while True:
            status = self.peers[name].control({"command": "status"})
            versions = {s["stream"]: s["model_version"] for s in status["streams"]}
            if all(versions.get(k, 0) >= 1 for k in keys):
                return status
            self.assertLess(time.monotonic(), deadline,
                            "%s: streams without a model after %d s" % (name, WAIT))
            time.sleep(0.05)  # polling the control socket, bounded by the deadline

    def counter(self, name, metric, **labels):
        return e2e.metric(e2e.parse_metrics(self.peers[name].scrape()), metric, **labels)


class OwnershipAndRouting(ClusterTestCase):
    def test_every_stream_is_scored_once_by_its_owner_as_a_lone_daemon_scores_it(self):
        members = names(3)
        for m in members:
            self.start(m, members)
        self.start(None, [])
        for m in members:
            status = self.peers[m].control({"command": "status"})
            self.assertEqual((status["member"], status["members"]), (m, 3))
            shown = subprocess.run([NUWATCH, "control", "--connect",
                                    self.replicas[m].endpoints["control"], "status"],
                                   capture_output=True, timeout=e2e.WAIT_TIMEOUT)
            self.assertEqual(shown.returncode, 0, shown.stderr)
            self.assertIn(", member %s of 3\n" % m, shown.stdout.decode())
        status = self.peers[None].control({"command": "status"})
        self.assertEqual((status["member"], status["members"]), (None, 0))

        fleet = Fleet(seed=1)
        owners = {k: owner(k, members) for k in fleet.keys}
        # The hash spreads the 300 keys: Binomial(300, 1/3) per member, sd 8.2; 5 sd either side.
        for m in members:
            share = sum(1 for k in fleet.keys if owners[k] == m)
            self.assertLess(abs(share - 100), 41, (m, share))

        # Warm-up through the Python router, the same messages to the lone daemon.
        warm = fleet.rows(WARMUP)
        self.route(warm, members)
        self.send_to_lone(warm)
        for m in members:
            self.wait_for_models(m, [k for k in fleet.keys if owners[k] == m])
        self.wait_for_models(None, fleet.keys)

        # Then through `nuwatch send --member`, and `nuwatch send --connect` to the lone daemon.
        scored = fleet.rows(10)
        out = self.nuwatch_send(scored, *self.member_flags(members))
        for m in members:
            share = sum(1 for k in fleet.keys if owners[k] == m)
            self.assertIn("member %s (%s): %d vectors of %d stream(s)"
                          % (m, self.replicas[m].endpoints["ingest"][0], 10 * share, share), out)
        self.nuwatch_send(scored, "--connect", self.replicas[None].endpoints["ingest"][0])
        expected = {m: {} for m in members + [None]}
        for k in fleet.keys:
            expected[owners[k]][k] = expected[None][k] = WARMUP + 10
        self.wait_for_results(expected)

        lone = self.peers[None]
        for k in fleet.keys:
            at = [m for m in members if self.peers[m].results(k)]
            self.assertEqual(at, [owners[k]], k)  # exactly one replica, the owner by hashlib
            mine = self.peers[owners[k]].results(k)
            self.assertEqual([r["t"] for r in mine], [r["t"] for r in lone.results(k)], k)
            self.assertEqual(len(mine), WARMUP + 10, k)
            # The last 10 were scored by the model fitted on the warm-up, on both sides: the same
            # decisions, bit for bit (the same code, data and message shapes).
            for r, expected in zip(mine[WARMUP:], lone.results(k)[WARMUP:]):
                self.assertEqual(r["state"], "scoring", k)
                self.assertEqual((r["decision"], r["anomaly"]),
                                 (expected["decision"], expected["anomaly"]), (k, r["t"]))
        for m in members:
            self.assertEqual(self.counter(m, "nuwatch_rejected_messages_total",
                                          reason="not_owner"), 0)
            # What the fleet rules compare across replicas (nuwatch_rules.yml, nuwatch-fleet).
            self.assertEqual(self.counter(m, "nuwatch_cluster_members"), len(members))
        self.assertEqual(self.counter(None, "nuwatch_cluster_members"), 0)

        # A misrouted message: counted under not_owner, and it creates no stream.
        key = next(k for k in fleet.keys if owners[k] == "nuwatchd-1")
        (_, t, x), = fleet.rows(1, [key])
        self.peers["nuwatchd-0"].send(key, codec.encode_json([t], [x]))
        deadline = time.monotonic() + e2e.WAIT_TIMEOUT
        while self.counter("nuwatchd-0", "nuwatch_rejected_messages_total",
                           reason="not_owner") < 1:
            self.assertLess(time.monotonic(), deadline, "no not_owner rejection counted")
            time.sleep(0.05)  # polling the counter, bounded by the deadline
        status = self.peers["nuwatchd-0"].control({"command": "status"})
        self.assertNotIn(key, [s["stream"] for s in status["streams"]])
        self.assertEqual(self.counter("nuwatchd-0", "nuwatch_rejected_messages_total",
                                      reason="not_owner"), 1)


class SubscribedReplicas(ClusterTestCase):
    def test_replicas_on_one_publisher_keep_their_own_streams_and_count_the_rest(self):
        """README "Producers that cannot route": every replica subscribes to the producer's PUB
        socket and keeps only the keys it owns; the others count under not_owner (§13.2)."""
        members = names(3)
        publisher = self.context.socket(zmq.PUB)
        self.addCleanup(publisher.close, 0)
        publisher.setsockopt(zmq.SNDHWM, 0)  # no drops on this side while the replicas keep up
        publisher.bind("tcp://127.0.0.1:*")
        endpoint = publisher.getsockopt(zmq.LAST_ENDPOINT).decode()
        for m in members:
            self.start(m, members, subscribe=endpoint, probe=False)
        # ZeroMQ delivers to a subscriber only once its subscription has arrived: publish each
        # replica's probe until every replica has scored its own (results from each one's socket).
        probes = {m: probe_key(m, members) for m in members}
        data = e2e.StreamData(seed=7, start=e2e.T0 + 1e8)
        deadline = time.monotonic() + e2e.WAIT_TIMEOUT
        while not all(self.peers[m].results(probes[m]) for m in members):
            self.assertLess(time.monotonic(), deadline, "the replicas do not see the publisher")
            for m in members:
                t, x = data.normal()
                publisher.send_multipart([probes[m].encode(), codec.encode_json([t], [x])])
            for m in members:
                try:
                    self.peers[m].wait_for(lambda: False, "probe", timeout=0.05)
                except AssertionError:
                    pass  # results are read; the loop checks them
        before = {m: self.counter(m, "nuwatch_rejected_messages_total", reason="not_owner")
                  for m in members}

        fleet = Fleet(seed=4)
        rows = fleet.rows(5)
        for key, t, x in rows:
            publisher.send_multipart([key.encode(), codec.encode_json([t], [x])])
        owners = {k: owner(k, members) for k in fleet.keys}
        self.wait_for_results({m: {k: 5 for k in fleet.keys if owners[k] == m} for m in members})
        for m in members:
            mine = sum(1 for k in fleet.keys if owners[k] == m)
            deadline = time.monotonic() + e2e.WAIT_TIMEOUT
            while True:
                rejected = self.counter(m, "nuwatch_rejected_messages_total",
                                        reason="not_owner") - before[m]
                if rejected >= 5 * (STREAMS - mine) or time.monotonic() > deadline:
                    break
                time.sleep(0.05)  # polling the counter, bounded by the deadline
            # Every message of another member's key, and none of its own, counted not_owner.
            self.assertEqual(rejected, 5 * (STREAMS - mine), m)
            status = self.peers[m].control({"command": "status"})
            self.assertEqual({s["stream"] for s in status["streams"]} - set(probes.values()),
                             {k for k in fleet.keys if owners[k] == m})
            for k in fleet.keys:
                if owners[k] != m:
                    self.assertFalse(self.peers[m].results(k), (m, k))


class MembershipChanges(ClusterTestCase):
    def warm(self, fleet, members):
        self.route(fleet.rows(WARMUP), members)
        owners = {k: owner(k, members) for k in fleet.keys}
        for m in members:
            self.wait_for_models(m, [k for k in fleet.keys if owners[k] == m])
        return owners

    def test_a_fourth_member_takes_about_a_quarter_of_the_streams_which_relearn_there(self):
        three, four = names(3), names(4)
        for m in three:
            self.start(m, three)
        self.start("nuwatchd-3", four)
        fleet = Fleet(seed=2)
        before = self.warm(fleet, three)
        after = {k: owner(k, four) for k in fleet.keys}
        moved = [k for k in fleet.keys if after[k] != before[k]]
        # Rendezvous hashing moves keys only to the new member (Thaler & Ravishankar 1998)...
        self.assertTrue(all(after[k] == "nuwatchd-3" for k in moved))
        # ... each with probability 1/4: Binomial(300, 1/4), mean 75, sd 7.5; 5 sd either side.
        self.assertLess(abs(len(moved) - 75), 38, len(moved))

        for m in three:
            self.replicas[m].write_config(four)
            self.replicas[m].process.send_signal(signal.SIGHUP)
        for m in three:
            mine = [k for k in moved if before[k] == m]
            self.replicas[m].wait_for_log(lambda text: "reload: released %d streams" % len(mine)
                                          in text or (not mine and "cluster.members has 4"
                                                      in text), "the release")
            self.assertEqual(self.counter(m, "nuwatch_streams_released_total"), len(mine))
            status = self.peers[m].control({"command": "status"})
            self.assertEqual(status["members"], 4)
            tracked = {s["stream"] for s in status["streams"]}
            self.assertFalse(tracked & set(mine), m)
            self.assertEqual(tracked - {s for s in tracked if s.startswith("probe")},
                             {k for k in fleet.keys if after[k] == m})
            # The state files stay on disk (§13.4).
            files = set(os.listdir(self.replicas[m].state_dir))
            for k in mine:
                self.assertIn(k.replace("/", "%").replace(":", "+") + ".state", files)

        # Routed over four members: the moved streams learn afresh at nuwatchd-3 (a new warm-up:
        # no cluster.control_endpoint, so no handoff), the others go on scoring where they were.
        self.route(fleet.rows(WARMUP), four)
        self.wait_for_results({m: {k: WARMUP if k in moved else 2 * WARMUP
                                   for k in fleet.keys if after[k] == m} for m in four})
        for k in fleet.keys:
            results = self.peers[after[k]].results(k)
            if k in moved:
                self.assertEqual(len(results), WARMUP, k)
                self.assertTrue(all(r["state"] == "learning" for r in results), k)
            else:
                self.assertEqual(len(results), 2 * WARMUP, k)
                self.assertTrue(all(r["state"] == "scoring" for r in results[WARMUP:]), k)
        self.wait_for_models("nuwatchd-3", moved)
        self.route(fleet.rows(1, moved), four)
        self.wait_for_results({"nuwatchd-3": {k: WARMUP + 1 for k in moved}})
        for k in moved:
            self.assertEqual(self.peers["nuwatchd-3"].results(k)[-1]["state"], "scoring", k)

        # A restart leaves the released streams' state files on disk, unread (§13.4), and
        # restores the streams the member owns.
        m = max(three, key=lambda n: sum(1 for k in moved if before[k] == n))
        released = [k for k in moved if before[k] == m]
        self.peers.pop(m).close()
        self.assertEqual(self.replicas[m].stop(), 0, self.replicas[m].log_tail())
        self.start(m, four, probe=False)
        self.replicas[m].wait_for_log(
            lambda text: "state: %d state files are of streams other members" % len(released)
            in text, "the count of state files left unread")
        status = self.peers[m].control({"command": "status"})
        restored = {s["stream"] for s in status["streams"]}
        self.assertEqual(restored - {s for s in restored if s.startswith("probe")},
                         {k for k in fleet.keys if after[k] == m})
        self.assertTrue(all(s["model_version"] >= 1 for s in status["streams"]
                            if not s["stream"].startswith("probe")))
        files = set(os.listdir(self.replicas[m].state_dir))
        for k in released:
            self.assertIn(k.replace("/", "%").replace(":", "+") + ".state", files)

    def test_a_fourth_member_takes_over_a_quarter_of_the_streams_with_their_state(self):
        """Issue 12 §3, PROTOCOL.md §13.4: with cluster.control_endpoint each moved stream is
        handed to nuwatchd-3 with its state (adopt, §11.7) and scores there without a new
        warm-up; every vector is scored exactly once across the replicas, with the decisions a
        lone daemon fed the same vectors makes."""
        three, four = names(3), names(4)
        # The replicas' control sockets are their default ipc://STATE_DIR/nuwatchd.control. The
        # three start without handoff (a member started with it waits for the state of every key
        # it has no state file for, §13.4) and take it with the new member list, as an operator
        # who turns it on with the scale-up does; the joining member has it from the start, and
        # waits for its keys' state (its probe would wait too).
        template = "ipc://%s/{member}/state/nuwatchd.control" % self.workdir
        for m in three:
            self.start(m, three)
        # Generous: under ThreadSanitizer on the shared 2-core machine an adoption took 0.45 s
        # (10.7 s for 24 streams), against a few ms in a release build.
        slow = 120
        # Its wait runs from its own start, before the warm-up below, which under ThreadSanitizer
        # with another test on the two cores took most of two minutes: so five.
        self.start("nuwatchd-3", four, control_endpoint=template, probe=False,
                   handoff_timeout=300)
        self.assertEqual(self.replicas["nuwatchd-3"].endpoints["control"],
                         template.replace("{member}", "nuwatchd-3"))
        self.start(None, [])
        fleet = Fleet(seed=5)
        warm = fleet.rows(WARMUP)
        self.route(warm, three)
        self.send_to_lone(warm)
        before = {k: owner(k, three) for k in fleet.keys}
        versions = {}
        for m in three:
            status = self.wait_for_models(m, [k for k in fleet.keys if before[k] == m])
            versions.update({s["stream"]: s["model_version"] for s in status["streams"]})
        self.wait_for_models(None, fleet.keys)
        after = {k: owner(k, four) for k in fleet.keys}
        moved = [k for k in fleet.keys if after[k] != before[k]]
        self.assertTrue(all(after[k] == "nuwatchd-3" for k in moved))
        self.assertLess(abs(len(moved) - 75), 38, len(moved))  # Binomial(300, 1/4), 5 sd
        # The probes stay with their members, so that the counts below are the fleet's alone.
        self.assertTrue(all(owner(probe_key(m, three), four) == m for m in three))

        # The three reload and, at once, the router sends over four members: vectors of a moved
        # stream that reach nuwatchd-3 before its state are held there, then scored by the handed
        # model (§13.4), never by a fresh one.
        for m in three:
            self.replicas[m].control_endpoint = template
            self.replicas[m].handoff_timeout = slow
            self.replicas[m].write_config(four)
            self.replicas[m].process.send_signal(signal.SIGHUP)
        scored = fleet.rows(10)
        self.route(scored, four)
        self.send_to_lone(scored)
        seconds = []
        for m in three:
            mine = [k for k in moved if before[k] == m]
            if not mine:
                continue
            summary = "handoff: %d of %d streams adopted" % (len(mine), len(mine))
            self.replicas[m].wait_for_log(lambda text: summary in text,
                                          "the handoff of %d streams" % len(mine), timeout=slow)
            text = self.replicas[m].log_text()
            line = text[text.index(summary):]
            seconds.append(float(line.split(" in ")[1].split(" s")[0]))
            self.assertEqual(self.counter(m, "nuwatch_streams_released_total"), len(mine))
            self.assertEqual(self.counter(m, "nuwatch_stream_handoffs_total", direction="sent",
                                          outcome="ok"), len(mine))
            status = self.peers[m].control({"command": "status"})
            self.assertFalse({s["stream"] for s in status["streams"]} & set(mine), m)
        self.wait_for_results({m: {k: 10 if k in moved else WARMUP + 10
                                   for k in fleet.keys if after[k] == m} for m in four},
                              timeout=slow)
        self.wait_for_results({None: {k: WARMUP + 10 for k in fleet.keys}})
        for m in four:  # anything published late (a vector scored twice) arrives meanwhile
            try:
                self.peers[m].wait_for(lambda: False, "late results", timeout=0.5)
            except AssertionError:
                pass

        lone = self.peers[None]
        for k in fleet.keys:
            expected = lone.results(k)
            self.assertEqual([r["t"] for r in expected], [t for key, t, _ in warm + scored
                                                          if key == k], k)
            # Exactly once across the replicas: the warm-up at the old owner, the rest at the new.
            at = {m: self.peers[m].results(k) for m in four if self.peers[m].results(k)}
            if k in moved:
                self.assertEqual(sorted(at), sorted([before[k], "nuwatchd-3"]), k)
                self.assertEqual([r["t"] for r in at[before[k]]],
                                 [r["t"] for r in expected[:WARMUP]], k)
            else:
                self.assertEqual(list(at), [after[k]], k)
            mine = at[after[k]][-10:]
            self.assertEqual([r["t"] for r in at[after[k]]],
                             [r["t"] for r in expected[WARMUP if k in moved else 0:]], k)
            # No new warm-up: scored by the handed model, the decisions the lone daemon's.
            for r, e in zip(mine, expected[WARMUP:]):
                self.assertEqual(r["state"], "scoring", (k, r["t"]))
                self.assertEqual(r["model_version"], versions[k], (k, r["t"]))
                self.assertEqual((r["decision"], r["anomaly"]), (e["decision"], e["anomaly"]),
                                 (k, r["t"]))

        # nuwatchd-3 holds the moved streams with their counters, and their state files; the old
        # owners' copies are deleted once nuwatchd-3 has written its own (§11.7 state_written).
        status = self.peers["nuwatchd-3"].control({"command": "status"})
        held = {s["stream"]: s for s in status["streams"]}
        self.assertEqual(set(held), set(moved))
        for k in moved:
            self.assertEqual((held[k]["vectors"], held[k]["model_version"]),
                             (WARMUP + 10, versions[k]), k)
        self.assertEqual(self.counter("nuwatchd-3", "nuwatch_stream_handoffs_total",
                                      direction="received", outcome="ok"), len(moved))
        for m in four:
            for reason in ("awaiting_handoff", "not_owner"):
                self.assertEqual(self.counter(m, "nuwatch_rejected_messages_total",
                                              reason=reason), 0, (m, reason))
        escaped = {k: k.replace("/", "%").replace(":", "+") + ".state" for k in moved}
        self.assertTrue(set(escaped.values()) <=
                        set(os.listdir(self.replicas["nuwatchd-3"].state_dir)))
        deadline = time.monotonic() + WAIT
        while True:
            left = [k for k in moved
                    if escaped[k] in os.listdir(self.replicas[before[k]].state_dir)]
            if not left:
                break
            self.assertLess(time.monotonic(), deadline, "old owners keep state files: %r" % left)
            time.sleep(0.05)  # polling the directories, bounded by the deadline
        log = self.replicas["nuwatchd-3"].log_text()
        held_vectors = sum(int(line.split("; ")[1].split(" vectors held")[0])
                           for line in log.splitlines() if "handoff: adopted stream=" in line)
        sys.stderr.write("handoff: %d streams moved, adopted in %s s by the senders' clocks; "
                         "%d vectors held at nuwatchd-3 before their state came\n"
                         % (len(moved), ", ".join("%.3f" % s for s in seconds), held_vectors))

    def test_a_state_that_does_not_come_in_time_leaves_the_stream_to_start_afresh(self):
        """PROTOCOL.md §13.4: a new owner holds a key's vectors for handoff_timeout_seconds, then
        starts the stream afresh with them, in order, counted; an old owner whose offer comes too
        late is refused (stream_exists) and keeps its state file, while a stream the new owner
        has not started is adopted."""
        one, two = ["nuwatchd-0"], names(2)
        template = "ipc://%s/{member}/state/nuwatchd.control" % self.workdir
        self.start("nuwatchd-0", one)
        fleet = Fleet(seed=6)
        keys = [k for k in fleet.keys if owner(k, two) == "nuwatchd-1"][:20]
        warm = fleet.rows(WARMUP, keys)
        self.route(warm, one)
        self.wait_for_models("nuwatchd-0", keys)
        early, late = keys[:10], keys[10:]

        # nuwatchd-1 joins with a short wait; nuwatchd-0 has not reloaded, so nothing comes.
        started = time.monotonic()
        self.start("nuwatchd-1", two, probe=False, control_endpoint=template, handoff_timeout=2.0)
        rows = fleet.rows(3, early)
        self.route(rows, two)
        self.wait_for_results({"nuwatchd-1": {k: 3 for k in early}})
        waited = time.monotonic() - started
        for k in early:
            results = self.peers["nuwatchd-1"].results(k)
            self.assertEqual([r["t"] for r in results], [t for key, t, _ in rows if key == k], k)
            self.assertEqual([r["state"] for r in results], ["learning"] * 3, k)
        self.assertGreaterEqual(waited, 2.0)  # held for the whole wait, not scored before
        self.assertEqual(self.counter("nuwatchd-1", "nuwatch_stream_handoffs_total",
                                      direction="received", outcome="timeout"), len(early))
        self.assertEqual(self.counter("nuwatchd-1", "nuwatch_rejected_messages_total",
                                      reason="awaiting_handoff"), 0)

        # Now nuwatchd-0 reloads: the streams nuwatchd-1 started afresh are refused there, the
        # others adopted; a refused stream's state file stays at nuwatchd-0.
        self.replicas["nuwatchd-0"].control_endpoint = template
        self.replicas["nuwatchd-0"].handoff_timeout = 2.0
        self.replicas["nuwatchd-0"].write_config(two)
        self.assertTrue(self.peers["nuwatchd-0"].control({"command": "reload"})["ok"])
        # nuwatchd-0's probe moves too when nuwatchd-1 owns it: adopted, never seen there.
        probe = 1 if owner(probe_key("nuwatchd-0", one), two) == "nuwatchd-1" else 0
        summary = "handoff: %d of %d streams adopted" % (len(late) + probe, len(keys) + probe)
        self.replicas["nuwatchd-0"].wait_for_log(lambda text: summary in text, summary)
        self.assertEqual(self.counter("nuwatchd-0", "nuwatch_stream_handoffs_total",
                                      direction="sent", outcome="refused"), len(early))
        self.assertEqual(self.counter("nuwatchd-0", "nuwatch_stream_handoffs_total",
                                      direction="sent", outcome="ok"), len(late) + probe)
        files = set(os.listdir(self.replicas["nuwatchd-0"].state_dir))
        for k in early:
            self.assertIn(k.replace("/", "%").replace(":", "+") + ".state", files)
        status = {s["stream"]: s for s in
                  self.peers["nuwatchd-1"].control({"command": "status"})["streams"]}
        for k in late:
            self.assertEqual(status[k]["vectors"], WARMUP, k)
            self.assertGreaterEqual(status[k]["model_version"], 1, k)
        sys.stderr.write("handoff: %d held streams started afresh %.1f s after nuwatchd-1's "
                         "start (handoff_timeout_seconds = 2)\n" % (len(early), waited))

    def test_a_change_taken_back_before_the_handoff_resumes_the_streams_from_their_state(self):
        """PROTOCOL.md §13.4 "A change taken back": a member reloaded with a list that gives some
        of its streams to a member that does not answer (it never started), then reloaded back
        before any was adopted, withdraws its offers and resumes those streams from the offered
        state, without waiting for handoff_timeout_seconds: the same model and window, no new
        warm-up. Vectors sent right after the second reload are held until then and scored by
        that model, each once, with the decisions of a lone daemon fed the same vectors."""
        one, two = ["nuwatchd-0"], names(2)
        template = "ipc://%s/{member}/state/nuwatchd.control" % self.workdir
        # Started without handoff, which it takes with the new list (as in the scale-up above: a
        # member started with it would hold every key it has no state file for).
        self.start("nuwatchd-0", one)
        self.start(None, [])
        fleet = Fleet(seed=7)
        warm = fleet.rows(WARMUP)
        self.route(warm, one)
        self.send_to_lone(warm)
        versions = {s["stream"]: s["model_version"]
                    for s in self.wait_for_models("nuwatchd-0", fleet.keys)["streams"]}
        self.wait_for_models(None, fleet.keys)
        moved = [k for k in fleet.keys if owner(k, two) == "nuwatchd-1"]
        self.assertLess(abs(len(moved) - 150), 44, len(moved))  # Binomial(300, 1/2), 5 sd
        probe = 1 if owner(probe_key("nuwatchd-0", one), two) == "nuwatchd-1" else 0

        replica = self.replicas["nuwatchd-0"]
        replica.control_endpoint = template
        replica.handoff_timeout = WAIT  # far longer than the test waits for the streams to resume
        replica.write_config(two)
        self.assertTrue(self.peers["nuwatchd-0"].control({"command": "reload"})["ok"])
        released = "reload: released %d streams" % (len(moved) + probe)
        replica.wait_for_log(lambda text: released in text, released)
        status = self.peers["nuwatchd-0"].control({"command": "status"})
        self.assertFalse({s["stream"] for s in status["streams"]} & set(moved))
        self.assertEqual(status["handoffs_pending"], len(moved) + probe)

        # Taken back: nuwatchd-1 never answered, so nothing was adopted.
        replica.write_config(one)
        self.assertTrue(self.peers["nuwatchd-0"].control({"command": "reload"})["ok"])
        scored = fleet.rows(3)
        self.route(scored, one)
        self.send_to_lone(scored)
        self.wait_for_results({"nuwatchd-0": {k: WARMUP + 3 for k in fleet.keys}})
        self.wait_for_results({None: {k: WARMUP + 3 for k in fleet.keys}})
        try:  # anything published late (a vector scored twice) arrives meanwhile
            self.peers["nuwatchd-0"].wait_for(lambda: False, "late results", timeout=0.5)
        except AssertionError:
            pass
        for k in fleet.keys:
            expected = self.peers[None].results(k)
            results = self.peers["nuwatchd-0"].results(k)
            self.assertEqual([r["t"] for r in results], [r["t"] for r in expected], k)
            for r, e in zip(results[WARMUP:], expected[WARMUP:]):
                self.assertEqual(r["state"], "scoring", (k, r["t"]))
                self.assertEqual(r["model_version"], versions[k], (k, r["t"]))
                self.assertEqual((r["decision"], r["anomaly"]), (e["decision"], e["anomaly"]),
                                 (k, r["t"]))
        status = self.peers["nuwatchd-0"].control({"command": "status"})
        self.assertEqual(status["handoffs_pending"], 0)
        counts = {s["stream"]: (s["vectors"], s["model_version"]) for s in status["streams"]}
        for k in moved:
            self.assertEqual(counts[k], (WARMUP + 3, versions[k]), k)
        self.assertEqual(self.counter("nuwatchd-0", "nuwatch_stream_handoffs_total",
                                      direction="sent", outcome="withdrawn"), len(moved) + probe)
        for direction, outcome in (("sent", "ok"), ("sent", "timeout"), ("sent", "refused"),
                                   ("received", "timeout")):
            self.assertEqual(self.counter("nuwatchd-0", "nuwatch_stream_handoffs_total",
                                          direction=direction, outcome=outcome), 0, outcome)
        log = replica.log_text()
        self.assertEqual(log.count("handoff: took back stream="), len(moved) + probe)
        self.assertNotIn("starts afresh", log)

    def test_a_member_taken_out_of_the_list_hands_its_streams_to_the_others(self):
        """Issue 12 §3 for a scale-down, PROTOCOL.md §13.4 "A departure": reloaded with a list
        that no longer names it, a member hands every stream to its new owner and owns no key;
        the streams go on scoring there with the same model (the decisions of a lone daemon fed
        the same vectors), and nothing is scored twice or by a fresh model."""
        three, two = names(3), names(2)
        template = "ipc://%s/{member}/state/nuwatchd.control" % self.workdir
        for m in three:
            self.start(m, three)
        self.start(None, [])
        fleet = Fleet(seed=7)
        leaving = [k for k in fleet.keys if owner(k, three) == "nuwatchd-2"]
        warm = fleet.rows(WARMUP)
        self.route(warm, three)
        self.send_to_lone(warm)
        status = self.wait_for_models("nuwatchd-2", leaving)
        versions = {s["stream"]: s["model_version"] for s in status["streams"]}
        self.wait_for_models(None, leaving)
        after = {k: owner(k, two) for k in leaving}
        # Rendezvous hashing: only the departing member's keys move (Thaler & Ravishankar 1998).
        self.assertTrue(all(owner(k, two) == owner(k, three)
                            for k in fleet.keys if k not in leaving))

        # The survivors reload first (they hold the departing member's keys meanwhile), then
        # nuwatchd-2, whose new list lacks it; the router already sends over two members.
        for m in ("nuwatchd-0", "nuwatchd-1", "nuwatchd-2"):
            self.replicas[m].control_endpoint = template
            self.replicas[m].handoff_timeout = 120  # a ThreadSanitizer build is slow
            self.replicas[m].write_config(two)
            self.assertTrue(self.peers[m].control({"command": "reload"})["ok"], m)
            if m == "nuwatchd-1":
                scored = fleet.rows(10, leaving)
                self.route(scored, two)
                self.send_to_lone(scored)
        # The leaving member's own probe is handed over too.
        probe = probe_key("nuwatchd-2", three)
        handed = len(leaving) + 1
        summary = "handoff: %d of %d streams adopted" % (handed, handed)
        self.replicas["nuwatchd-2"].wait_for_log(lambda text: summary in text, summary,
                                                 timeout=120)
        self.assertIn("nuwatchd-2 is not one of cluster.members any more",
                      self.replicas["nuwatchd-2"].log_text())
        status = self.peers["nuwatchd-2"].control({"command": "status"})
        self.assertEqual((status["member"], status["members"], status["departed"],
                          status["handoffs_pending"], status["streams"]),
                         ("nuwatchd-2", 2, True, 0, []))
        self.assertEqual(self.counter("nuwatchd-2", "nuwatch_stream_handoffs_total",
                                      direction="sent", outcome="ok"), handed)
        shown = subprocess.run([NUWATCH, "control", "status", "--connect",
                                self.replicas["nuwatchd-2"].endpoints["control"]],
                               capture_output=True, timeout=e2e.WAIT_TIMEOUT)
        self.assertIn(", nuwatchd-2 departed from the 2 members\n", shown.stdout.decode())
        for m in two:
            status = self.peers[m].control({"command": "status"})
            self.assertFalse(status["departed"], m)
            mine = [k for k in leaving if after[k] == m] + ([probe] if owner(probe, two) == m
                                                            else [])
            self.assertEqual(self.counter(m, "nuwatch_stream_handoffs_total",
                                          direction="received", outcome="ok"), len(mine), m)

        self.wait_for_results({m: {k: 10 for k in leaving if after[k] == m} for m in two},
                              timeout=120)
        self.wait_for_results({None: {k: WARMUP + 10 for k in leaving}})
        for k in leaving:
            expected = self.peers[None].results(k)[WARMUP:]
            got = self.peers[after[k]].results(k)
            self.assertEqual([r["t"] for r in got], [r["t"] for r in expected], k)
            for r, e in zip(got, expected):
                self.assertEqual((r["state"], r["model_version"]), ("scoring", versions[k]), k)
                self.assertEqual((r["decision"], r["anomaly"]), (e["decision"], e["anomaly"]), k)
        for m in two:
            self.assertEqual(self.counter(m, "nuwatch_rejected_messages_total",
                                          reason="awaiting_handoff"), 0, m)

        # The departed member owns no key: a message still sent to it is counted, not scored.
        self.peers["nuwatchd-2"].send(leaving[0], codec.encode_json([fleet.next_t[leaving[0]]],
                                                                    [[1.0, 2.0, 3.0]]))
        deadline = time.monotonic() + e2e.WAIT_TIMEOUT
        while self.counter("nuwatchd-2", "nuwatch_rejected_messages_total",
                           reason="not_owner") < 1:
            self.assertLess(time.monotonic(), deadline, "the misrouted message not counted")
            time.sleep(0.05)  # polling the counter, bounded by the deadline
        self.peers.pop("nuwatchd-2").close()
        self.assertEqual(self.replicas["nuwatchd-2"].stop(), 0,
                         self.replicas["nuwatchd-2"].log_tail())

    def test_a_member_restarted_under_the_same_list_waits_for_no_handoff(self):
        """PROTOCOL.md §13.4: a member started with control_endpoint and no record of its last
        member list holds the new keys it owns (it may just have joined); one restarted under
        the list its state directory recorded at its last start knows no key came to it while
        it was down, and scores new keys at once, without waiting handoff_timeout_seconds."""
        two = names(2)
        template = "ipc://%s/{member}/state/nuwatchd.control" % self.workdir
        _, peer = self.start("nuwatchd-0", two, control_endpoint=template, probe=False,
                             handoff_timeout=120)
        replica = self.replicas["nuwatchd-0"]
        self.assertIn("no member list recorded", replica.log_text())
        fleet = Fleet(seed=8)
        mine = [k for k in fleet.keys if owner(k, two) == "nuwatchd-0"]
        self.route(fleet.rows(1, mine[:1]), two)
        with self.assertRaises(AssertionError):  # held: no result within a second
            peer.wait_for(lambda: peer.results(mine[0]), "a held key's result", timeout=1.0)
        self.peers.pop("nuwatchd-0").close()
        self.assertEqual(replica.stop(), 0, replica.log_tail())
        self.routes.pop("nuwatchd-0").close(0)
        with open(os.path.join(replica.state_dir, "nuwatchd.members")) as f:
            self.assertEqual([line.split(" ", 1)[1] for line in f.read().splitlines()
                              if not line.startswith("#")], ["nuwatchd-0"] + two)

        _, peer = self.start("nuwatchd-0", two, control_endpoint=template, probe=False,
                             handoff_timeout=120)
        self.assertIn("the member list is the one recorded",
                      self.replicas["nuwatchd-0"].log_text())
        started = time.monotonic()
        self.route(fleet.rows(1, mine[1:2]), two)
        peer.wait_for(lambda: peer.results(mine[1]), "a new key's result", timeout=30)
        self.assertEqual(peer.results(mine[1])[0]["state"], "learning")
        self.assertLess(time.monotonic() - started, 30)  # not held for the 120 s
        self.assertEqual(self.counter("nuwatchd-0", "nuwatch_stream_handoffs_total",
                                      direction="received", outcome="timeout"), 0)

    def test_a_killed_member_leaves_its_streams_to_the_others_which_start_them_fresh(self):
        three, two = names(3), names(2)
        for m in three:
            self.start(m, three)
        fleet = Fleet(seed=3)
        before = self.warm(fleet, three)
        lost = [k for k in fleet.keys if before[k] == "nuwatchd-2"]
        self.replicas["nuwatchd-2"].process.send_signal(signal.SIGKILL)
        self.replicas["nuwatchd-2"].process.wait(timeout=e2e.WAIT_TIMEOUT)

        # Until the survivors' member list drops the lost member, its keys are still not theirs:
        # a sender that routes them elsewhere sees them counted under not_owner (§13.2).
        rows = fleet.rows(1, lost[:5])
        self.nuwatch_send(rows, *self.member_flags(two))
        deadline = time.monotonic() + e2e.WAIT_TIMEOUT
        while sum(self.counter(m, "nuwatch_rejected_messages_total", reason="not_owner")
                  for m in two) < 5:
            self.assertLess(time.monotonic(), deadline, "the 5 misrouted messages not counted")
            time.sleep(0.05)  # polling the counters, bounded by the deadline

        # The survivors reload with two members; the sender, given the surviving members, routes
        # every stream; the lost member's streams start afresh at their new owners.
        for m in two:
            self.replicas[m].write_config(two)
            self.replicas[m].process.send_signal(signal.SIGHUP)
            self.replicas[m].wait_for_log(lambda text: "cluster.members has 2" in text, "reload")
            self.assertEqual(self.counter(m, "nuwatch_streams_released_total"), 0)
        rows = fleet.rows(3)
        self.nuwatch_send(rows, *self.member_flags(two))
        after = {k: owner(k, two) for k in fleet.keys}
        self.wait_for_results({m: {k: 3 if k in lost else WARMUP + 3
                                   for k in fleet.keys if after[k] == m} for m in two})
        for k in fleet.keys:
            # Rendezvous: a surviving member keeps its keys (the lost member's move alone).
            if k not in lost:
                self.assertEqual(after[k], before[k], k)
            results = self.peers[after[k]].results(k)
            if k in lost:
                self.assertEqual([r["state"] for r in results], ["learning"] * 3, k)
            else:
                self.assertEqual([r["state"] for r in results[WARMUP:]], ["scoring"] * 3, k)


class ConfigurationErrors(ClusterTestCase):
    """Bad member lists stop nuwatchd with one line and status 2 (PROTOCOL.md §11.6), a reload
    with one is refused as a whole, and `nuwatch send` refuses bad --member flags with one line."""

    def run_nuwatchd(self, members, member):
        path = os.path.join(self.workdir, "bad.toml")
        with open(path, "w") as f:
            f.write(cluster_config(members))
        return subprocess.run([e2e.NUWATCHD, "--config", path, "--member", member,
                               "--ingest", "tcp://127.0.0.1:*", "--publish", "tcp://127.0.0.1:*",
                               "--metrics", "127.0.0.1:0",
                               "--state-dir", os.path.join(self.workdir, "bad-state")],
                              capture_output=True, timeout=e2e.WAIT_TIMEOUT)

    def assert_refused(self, run, *fragments):
        err = run.stderr.decode()
        self.assertEqual(run.returncode, 2, err)
        self.assertEqual(len(err.strip().splitlines()), 1, err)
        for fragment in fragments:
            self.assertIn(fragment, err)

    def test_bad_member_lists_are_refused_at_start_and_on_reload(self):
        self.assert_refused(self.run_nuwatchd(["nuwatchd-0", "nuwatchd-1"], "nuwatchd-7"),
                            'cluster.member = "nuwatchd-7" is not one of cluster.members '
                            "(nuwatchd-0, nuwatchd-1)")
        self.assert_refused(self.run_nuwatchd(["nuwatchd-0", "nuwatchd-0"], "nuwatchd-0"),
                            "cluster.members")
        self.assert_refused(self.run_nuwatchd(["nuwatchd 0"], "nuwatchd 0"),
                            "cluster.members", "0x20 at offset 8")
        self.assert_refused(self.run_nuwatchd(["a=b"], "a=b"), "0x3D at offset 1")

        # A lone daemon cannot be reloaded into a list without it (a member outside the list is
        # a departure only for a member of a cluster, §13.4); a bad list is refused as a whole.
        self.start("nuwatchd-0", [])
        replica = self.replicas["nuwatchd-0"]
        replica.write_config(["nuwatchd-1", "nuwatchd-2"])  # --member nuwatchd-0 is not in it
        reply = self.peers["nuwatchd-0"].control({"command": "reload"})
        self.assertFalse(reply["ok"])
        self.assertIn('cluster.member = "nuwatchd-0" is not one of cluster.members', reply["error"])
        replica.write_config(["nuwatchd-0", "nuwatchd-0"])
        reply = self.peers["nuwatchd-0"].control({"command": "reload"})
        self.assertFalse(reply["ok"])
        self.assertIn("cluster.members", reply["error"])
        self.assertEqual(self.peers["nuwatchd-0"].control({"command": "status"})["members"], 0)

        endpoint = replica.endpoints["ingest"][0]
        path = os.path.join(self.workdir, "one.csv")
        Fleet.write_csv(path, [("pump-1", e2e.T0, [1.0, 2.0, 3.0])])
        for flags, fragment in (
                (["--member", "a=" + endpoint, "--member", "a=" + endpoint], '"a" appears twice'),
                (["--member", "a"], "no endpoint"),
                (["--member", "a b=" + endpoint], "0x20"),
                (["--member", "a=" + endpoint, "--connect", endpoint], "exclude each other"),
                (["--member", "a=" + endpoint, "--metrics", replica.endpoints["metrics"]],
                 "--metrics reads one daemon"),
                (["--member", "a", "--member-endpoint", "nowhere"], "--member a")):
            run = subprocess.run([NUWATCH, "send", "--input", path] + flags,
                                 capture_output=True, timeout=e2e.WAIT_TIMEOUT)
            err = run.stderr.decode()
            self.assertEqual(run.returncode, 1, (flags, err))
            self.assertEqual(len(err.strip().splitlines()), 1, err)
            self.assertIn(fragment, err, flags)


def main():
    global NUWATCH
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nuwatchd", required=True)
    parser.add_argument("--nuwatch", required=True)
    args, rest = parser.parse_known_args()
    e2e.NUWATCHD, NUWATCH = args.nuwatchd, args.nuwatch
    unittest.main(argv=[sys.argv[0]] + rest, verbosity=2)


if __name__ == "__main__":
    main()
