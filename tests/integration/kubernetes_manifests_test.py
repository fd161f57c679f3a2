#!/usr/bin/python3
"""deploy/kubernetes/base and its overlay deploy/kubernetes/authenticated, built as a user builds
them and checked against what nuwatchd reads.

`kubectl kustomize DIR` (Debian's kubernetes-client, or any kubectl on PATH) must build each set; a missing kubectl is a failure, not a skip. The built objects are then read with
PyYAML and checked for what issue 12 asks of a sharded deployment (a StatefulSet with a headless
Service, a claim per replica, a PodDisruptionBudget, anti-affinity, a NetworkPolicy, probes that do
not use /metrics) and for agreement between the manifests and the configuration file they mount:
the member names are the StatefulSet's pod names (`<name>-<ordinal>`, the StatefulSet naming rule
of the Kubernetes documentation), the container ports are the endpoints' ports, the probes'
control socket is the default one in the state directory. Last, the real nuwatchd loads the
ConfigMap's file (its endpoints moved to loopback): it must start as nuwatchd-1 and refuse a member
name that is not in the list. The overlay is held to all of that, and to what [auth] and the
handoff need: the probes are CURVE clients of the tcp:// control socket with keys from the
mounted Secrets, the replicas may reach each other's control port and DNS (NetworkPolicy), the
handoff template names each member by its DNS name under the headless Service (the StatefulSet's
"Stable Network ID"), and the real nuwatchd started on its file, with keys `nuwatch keygen`
made, answers the probe's own command line.

Usage: kubernetes_manifests_test.py SOURCE_DIR NUWATCHD
"""
import json
import os
import re
import shutil
import socket
import subprocess
import sys
import tempfile
import time
import tomllib
import unittest

import yaml

SOURCE_DIR = None
NUWATCHD = None


def build_manifests(directory):
    kubectl = shutil.which("kubectl")
    if kubectl is None:
        raise AssertionError("kubectl is missing: install Debian's kubernetes-client "
                             "(deploy/install-deps.sh)")
    run = subprocess.run([kubectl, "kustomize", os.path.join(SOURCE_DIR, directory)],
                         capture_output=True, text=True, timeout=60)
    if run.returncode != 0:
        raise AssertionError("kubectl kustomize failed:\n" + run.stderr)
    return [d for d in yaml.safe_load_all(run.stdout) if d]


def port_of(endpoint):
    match = re.search(r":(\d+)$", endpoint)
    assert match, endpoint
    return int(match.group(1))


class Manifests(unittest.TestCase):
    DIRECTORY = "deploy/kubernetes/base"

    @classmethod
    def setUpClass(cls):
        cls.objects = build_manifests(cls.DIRECTORY)
        cls.by_kind = {}
        for o in cls.objects:
            cls.by_kind.setdefault(o["kind"], []).append(o)
        (cls.config_map,) = cls.by_kind["ConfigMap"]
        cls.config_text = cls.config_map["data"]["nuwatchd.toml"]
        cls.config = tomllib.loads(cls.config_text)
        (cls.statefulset,) = cls.by_kind["StatefulSet"]
        cls.pod = cls.statefulset["spec"]["template"]
        (cls.container,) = cls.pod["spec"]["containers"]

    def test_the_set_holds_every_kind_a_sharded_deployment_needs(self):
        for kind in ["ConfigMap", "Service", "StatefulSet", "PodDisruptionBudget", "NetworkPolicy"]:
            self.assertIn(kind, self.by_kind)
        # A Deployment would give replicas random names; member names must be stable.
        self.assertNotIn("Deployment", self.by_kind)

    def test_the_service_is_headless_and_governs_the_statefulset(self):
        (service,) = self.by_kind["Service"]
        # Headless (clusterIP: None): DNS names each pod, so senders route to the owner and
        # Prometheus finds every replica (Kubernetes documentation, StatefulSet "Stable Network ID").
        self.assertEqual(service["spec"]["clusterIP"], "None")
        self.assertEqual(self.statefulset["spec"]["serviceName"], service["metadata"]["name"])
        labels = self.pod["metadata"]["labels"]
        for key, value in service["spec"]["selector"].items():
            self.assertEqual(labels.get(key), value, key)

    def test_the_member_list_is_the_statefulsets_pod_names(self):
        name = self.statefulset["metadata"]["name"]
        replicas = self.statefulset["spec"]["replicas"]
        self.assertGreaterEqual(replicas, 2)
        members = self.config["cluster"]["members"]
        self.assertEqual(sorted(members), ["%s-%d" % (name, i) for i in range(replicas)])
        # Each pod passes its own name as --member.
        env = {e["name"]: e for e in self.container.get("env", [])}
        self.assertEqual(env["POD_NAME"]["valueFrom"]["fieldRef"]["fieldPath"], "metadata.name")
        args = self.container["args"]
        self.assertEqual(args[args.index("--member") + 1], "$(POD_NAME)")

    def test_each_replica_has_its_own_claim_mounted_at_the_state_directory(self):
        templates = self.statefulset["spec"]["volumeClaimTemplates"]
        self.assertEqual(len(templates), 1)
        claim = templates[0]["metadata"]["name"]
        mounts = {m["name"]: m["mountPath"] for m in self.container["volumeMounts"]}
        self.assertEqual(mounts[claim], self.config["state"]["dir"])
        # No pod-level volume of that name would shadow the per-replica claim.
        self.assertNotIn(claim, [v["name"] for v in self.pod["spec"].get("volumes", [])])

    def test_disruption_budget_and_anti_affinity_select_the_replicas(self):
        labels = self.pod["metadata"]["labels"]
        (budget,) = self.by_kind["PodDisruptionBudget"]
        self.assertEqual(budget["spec"]["maxUnavailable"], 1)
        for key, value in budget["spec"]["selector"]["matchLabels"].items():
            self.assertEqual(labels.get(key), value, key)
        anti = self.pod["spec"]["affinity"]["podAntiAffinity"]
        terms = anti.get("preferredDuringSchedulingIgnoredDuringExecution", [])
        self.assertTrue(terms)
        term = terms[0]["podAffinityTerm"]
        self.assertEqual(term["topologyKey"], "kubernetes.io/hostname")
        for key, value in term["labelSelector"]["matchLabels"].items():
            self.assertEqual(labels.get(key), value, key)
        (policy,) = self.by_kind["NetworkPolicy"]
        for key, value in policy["spec"]["podSelector"]["matchLabels"].items():
            self.assertEqual(labels.get(key), value, key)

    def test_container_ports_are_the_configured_endpoints(self):
        ports = {p["name"]: p["containerPort"] for p in self.container["ports"]}
        self.assertEqual(ports["ingest"], port_of(self.config["ingest"]["endpoints"][0]))
        self.assertEqual(ports["results"], port_of(self.config["publish"]["endpoint"]))
        self.assertEqual(ports["metrics"], port_of(self.config["metrics"]["listen"]))

    def test_probes_ask_the_control_socket_not_metrics(self):
        # config/REFERENCE.md: without control.endpoint the control socket is
        # ipc://STATE_DIR/nuwatchd.control.
        self.assertNotIn("endpoint", self.config.get("control", {}))
        control = "ipc://" + self.config["state"]["dir"] + "/nuwatchd.control"
        for probe in ["readinessProbe", "livenessProbe"]:
            command = self.container[probe]["exec"]["command"]
            self.assertEqual(command[:3], ["nuwatch", "control", "status"], probe)
            self.assertEqual(command[command.index("--connect") + 1], control, probe)
            self.assertNotIn("httpGet", self.container[probe])

    def local_config(self, work):
        """The ConfigMap's file for a run on this machine (the base's needs no change)."""
        return self.config_text

    def local_control(self, work):
        return "ipc://" + work + "/control"

    def run_nuwatchd(self, member, wait_ready, check=None):
        """Starts nuwatchd on the ConfigMap's file with loopback endpoints; returns (code, log,
        endpoints). `check(endpoints, work)`, if given, runs while the daemon is ready."""
        with tempfile.TemporaryDirectory() as work:
            config_path = os.path.join(work, "nuwatchd.toml")
            with open(config_path, "w") as f:
                f.write(self.local_config(work))
            ready = os.path.join(work, "ready.json")
            state = os.path.join(work, "state")
            os.mkdir(state, 0o700)
            args = [NUWATCHD, "--config", config_path, "--member", member,
                    "--ingest", "tcp://127.0.0.1:*", "--publish", "tcp://127.0.0.1:*",
                    "--metrics", "127.0.0.1:0", "--control", self.local_control(work),
                    "--state-dir", state, "--ready-file", ready]
            proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.STDOUT,
                                    text=True)
            if not wait_ready:
                out, _ = proc.communicate(timeout=30)
                return proc.returncode, out, None
            deadline = time.monotonic() + 30
            while not os.path.exists(ready) and proc.poll() is None:
                self.assertLess(time.monotonic(), deadline, "nuwatchd did not become ready")
                time.sleep(0.05)  # polling for the ready file, bounded by the deadline
            endpoints = None
            if os.path.exists(ready):
                with open(ready) as f:
                    endpoints = json.load(f)
            try:
                if endpoints is not None and check is not None:
                    check(endpoints, work)
            finally:
                proc.terminate()
            out, _ = proc.communicate(timeout=60)
            return proc.returncode, out, endpoints

    def test_nuwatchd_starts_on_the_configmaps_file_as_a_listed_member(self):
        code, out, endpoints = self.run_nuwatchd("nuwatchd-1", wait_ready=True)
        self.assertIsNotNone(endpoints, out)
        self.assertEqual(code, 0, out)

    def test_nuwatchd_refuses_a_member_name_the_list_lacks(self):
        code, out, _ = self.run_nuwatchd("nuwatchd-3", wait_ready=False)
        self.assertNotEqual(code, 0, out)
        self.assertIn("nuwatchd-3", out)


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class AuthenticatedManifests(Manifests):
    """The overlay: everything the base is held to, and what [auth] and the handoff need."""

    DIRECTORY = "deploy/kubernetes/authenticated"

    @classmethod
    def setUpClass(cls):
        super().setUpClass()
        cls.ports = {p["name"]: p["containerPort"] for p in cls.container["ports"]}
        cls.mounts = {m["name"]: m["mountPath"] for m in cls.container["volumeMounts"]}
        cls.secrets = {v["name"]: v["secret"]["secretName"]
                       for v in cls.pod["spec"]["volumes"] if "secret" in v}
        cls.control_port = free_port()

    def mount_of_secret(self, secret):
        (volume,) = [name for name, s in self.secrets.items() if s == secret]
        return self.mounts[volume]

    def local_config(self, work):
        """The file with the mounted key paths moved to keys `nuwatch keygen` makes in `work`."""
        keys, clients = os.path.join(work, "keys"), os.path.join(work, "clients")
        os.mkdir(keys)
        os.mkdir(clients)
        nuwatch = os.path.join(os.path.dirname(NUWATCHD), "nuwatch")
        run = subprocess.run([nuwatch, "keygen", "--output", os.path.join(keys, "server")],
                             capture_output=True, text=True, timeout=30)
        self.assertEqual(run.returncode, 0, run.stderr)
        # members.key: the server's public key, as kustomization.yaml has the Secret made.
        shutil.copy(os.path.join(keys, "server.key"), os.path.join(clients, "members.key"))
        return (self.config_text
                .replace(self.mount_of_secret("nuwatchd-server-key"), keys)
                .replace(self.mount_of_secret("nuwatchd-client-keys"), clients))

    def local_control(self, work):
        return "tcp://127.0.0.1:%d" % self.control_port

    def test_probes_ask_the_control_socket_not_metrics(self):
        # The probes are CURVE clients of the tcp:// control socket, with the server pair from
        # the mounted Secret: the key nuwatchd-client-keys lists as members.key.
        port = port_of(self.config["control"]["endpoint"])
        self.assertEqual(self.ports["control"], port)
        server_keys = self.mount_of_secret("nuwatchd-server-key")
        self.assertEqual(self.config["auth"]["server_secret_key_file"],
                         server_keys + "/server.key_secret")
        self.assertEqual(self.config["auth"]["client_keys"],
                         self.mount_of_secret("nuwatchd-client-keys"))
        for probe in ["readinessProbe", "livenessProbe"]:
            command = self.container[probe]["exec"]["command"]
            self.assertEqual(command[:3], ["nuwatch", "control", "status"], probe)
            self.assertEqual(command[command.index("--connect") + 1],
                             "tcp://127.0.0.1:%d" % port, probe)
            self.assertEqual(command[command.index("--client-key") + 1],
                             server_keys + "/server.key_secret", probe)
            self.assertEqual(command[command.index("--server-key") + 1],
                             server_keys + "/server.key", probe)

    def test_the_handoff_reaches_each_member_by_its_dns_name(self):
        # A StatefulSet pod's DNS name is <pod>.<serviceName> within its namespace (Kubernetes
        # documentation, StatefulSet "Stable Network ID"); the pod names are the member names.
        self.assertEqual(self.config["cluster"]["control_endpoint"],
                         "tcp://{member}.%s:%d" % (self.statefulset["spec"]["serviceName"],
                                                   self.ports["control"]))

    def test_the_network_policy_lets_replicas_reach_each_others_control_and_dns(self):
        (policy,) = self.by_kind["NetworkPolicy"]
        labels = self.pod["metadata"]["labels"]

        def selects_replicas(peer):
            selector = peer.get("podSelector", {}).get("matchLabels")
            return bool(selector) and all(labels.get(k) == v for k, v in selector.items())

        def ports(rule):
            return {(p["port"], p.get("protocol", "TCP")) for p in rule.get("ports", [])}

        control = (self.ports["control"], "TCP")
        self.assertTrue(any(control in ports(rule) and any(map(selects_replicas, rule["from"]))
                            for rule in policy["spec"]["ingress"]))
        self.assertTrue(any(control in ports(rule) and any(map(selects_replicas, rule["to"]))
                            for rule in policy["spec"]["egress"]))
        self.assertTrue(any((53, "UDP") in ports(rule) for rule in policy["spec"]["egress"]))
        # Nothing else opened: the base's client and metrics rules stay as they were.
        base = {o["kind"]: o for o in build_manifests(Manifests.DIRECTORY)}["NetworkPolicy"]
        for rule in base["spec"]["ingress"]:
            self.assertIn(rule, policy["spec"]["ingress"])
        self.assertEqual(len(policy["spec"]["ingress"]), len(base["spec"]["ingress"]) + 1)

    def test_the_file_is_the_bases_but_for_auth_control_and_handoff(self):
        base = [o for o in build_manifests(Manifests.DIRECTORY) if o["kind"] == "ConfigMap"]
        expected = tomllib.loads(base[0]["data"]["nuwatchd.toml"])
        got = dict(self.config)
        for section in ("auth", "control"):
            got.pop(section)
        got["cluster"] = {k: v for k, v in got["cluster"].items()
                          if k not in ("control_endpoint", "handoff_timeout_seconds")}
        self.assertEqual(got, expected)

    def test_nuwatchd_answers_the_probes_command_line_only_with_the_keys(self):
        nuwatch = os.path.join(os.path.dirname(NUWATCHD), "nuwatch")
        command = self.container["readinessProbe"]["exec"]["command"]
        server_keys = self.mount_of_secret("nuwatchd-server-key")

        def probe(endpoints, work):
            local = [nuwatch] + [a.replace(server_keys, os.path.join(work, "keys")).replace(
                "tcp://127.0.0.1:%d" % self.ports["control"], endpoints["control"])
                for a in command[1:]]
            run = subprocess.run(local, capture_output=True, text=True, timeout=30)
            self.assertEqual(run.returncode, 0, run.stderr)
            status = json.loads(run.stdout)
            self.assertEqual((status["member"], status["members"]), ("nuwatchd-1", 3))
            # Without the keys the same request is refused: the socket wants CURVE.
            bare = local[:local.index("--client-key")]
            run = subprocess.run(bare, capture_output=True, text=True, timeout=30)
            self.assertNotEqual(run.returncode, 0, run.stdout)

        code, out, endpoints = self.run_nuwatchd("nuwatchd-1", wait_ready=True, check=probe)
        self.assertIsNotNone(endpoints, out)
        self.assertEqual(code, 0, out)


if __name__ == "__main__":
    SOURCE_DIR, NUWATCHD = sys.argv[1], sys.argv[2]
    unittest.main(argv=[sys.argv[0], "-v"] + sys.argv[3:])
