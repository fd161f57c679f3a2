#!/usr/bin/env bash
# The main job, end to end on the invented demo plant: generate two days of a pump fleet with
# injected faults, fit a model on a fault-free day of one pump, score the held-out day and print
# what is flagged and why, beside the labelled incidents.
set -euo pipefail
cd "$(dirname "$0")/.."
echo "building (log in build/demo-build.log) ..."
mkdir -p build
bash deploy/build.sh >build/demo-build.log 2>&1 || { tail -30 build/demo-build.log; exit 1; }
nuwatch=build/bin/nuwatch
out=${NUWATCH_DEMO_DIR:-demo-out}
mkdir -p "$out"

echo "== 1. The demo plant: 3 pumps, one vector a minute for 4 days, faults injected after day 1"
"$nuwatch" simulate --output "$out/plant" --pumps 3 --duration 4d --interval 60s --seed 11 --force

# Day 1 holds no fault (the simulator keeps the first quarter clean); pick the first pump with one.
pump=$(awk -F, 'NR > 1 { print $1; exit }' "$out/plant/incidents.csv")
day2=$(awk -F, -v p="$pump" 'NR > 1 && $2 == p { n++ } n == 1441 { print $1; exit }' "$out/plant/stream.csv")
awk -F, -v p="$pump" -v d="$day2" 'NR == 1 || ($2 == p && $1 < d)' "$out/plant/stream.csv" > "$out/train.csv"
awk -F, -v p="$pump" -v d="$day2" 'NR == 1 || ($2 == p && $1 >= d)' "$out/plant/stream.csv" > "$out/heldout.csv"

echo
echo "== 2. Fit the envelope of $pump on its first day ($(($(wc -l < "$out/train.csv") - 1)) vectors)"
"$nuwatch" fit --input "$out/train.csv" --output "$out/$pump.model" --false-alarm-rate 0.001

echo
echo "== 3. Score the held-out days 2-4; flagged vectors with the two features that move the decision most"
"$nuwatch" score --model "$out/$pump.model" --input "$out/heldout.csv" --explain 2 > "$out/scores.csv"
# Columns: time,stream,decision,p_value,anomaly,feature_1,share_1,feature_2,share_2.
# Flagged vectors less than 5 minutes apart are one event; each event shows its strangest vector
# (lowest p-value). Isolated flags are expected at about the budget on normal data (0.001 of the
# vectors) and are only counted.
awk -F, 'function flush() { if (n == 1) singles++; if (n > 1) printf "  %s .. %s  %3d flagged  p %.1e  %s %.0f%%, %s %.0f%%\n",
                                   first, last, n, lowest, f1, 100 * s1, f2, 100 * s2; n = 0 }
         NR == 1 { next }
         $5 == 1 { total++
                   if (n && NR - last_row > 5) flush()
                   if (!n) { first = $1; lowest = 2 }
                   n++; last = $1; last_row = NR
                   if ($4 < lowest) { lowest = $4; f1 = $6; s1 = $7; f2 = $8; s2 = $9 } }
         END { flush(); printf "  %d of %d held-out vectors flagged; %d of them isolated (not shown)\n",
                     total, NR - 1, singles }' "$out/scores.csv"

echo
echo "== 4. The labelled incidents of $pump (what the flags should coincide with)"
awk -F, -v p="$pump" 'NR == 1 || $1 == p { printf "  %s\n", $0 }' "$out/plant/incidents.csv"
echo
echo "== 5. Live: nuwatchd on loopback with config/demo.toml; 12 pumps streamed 3600x faster than real"
echo "   time (two simulated days in about a minute: the first, fault-free day is learning)"
nuwatchd=build/bin/nuwatchd
py=/usr/bin/python3
ready="$out/ready.json"
rm -rf "$ready" "$out/state" "$out/live"
"$nuwatchd" --config config/demo.toml --ingest 'tcp://127.0.0.1:*' --publish 'tcp://127.0.0.1:*' \
  --metrics 127.0.0.1:0 --state-dir "$out/state" \
  --ready-file "$ready" 2>"$out/nuwatchd.log" &
daemon=$!
cleanup() {
  kill "$daemon" "${tail_pid:-}" "${json_pid:-}" 2>/dev/null || true
}
trap cleanup EXIT
for _ in $(seq 100); do [ -s "$ready" ] && break; sleep 0.1; done
[ -s "$ready" ] || { echo "nuwatchd did not start:"; cat "$out/nuwatchd.log"; exit 1; }
field() { "$py" -c 'import json,sys; d=json.load(open(sys.argv[1])); v=d[sys.argv[2]]; print(v[0] if isinstance(v, list) else v)' "$ready" "$1"; }
ingest=$(field ingest); publish=$(field publish); control=$(field control); metrics=$(field metrics)
echo "   ingest $ingest, results $publish, control $control, metrics http://$metrics/metrics"
echo

# Incident events as they happen; every anomaly goes to a file.
"$nuwatch" tail --connect "$publish" --anomalies-only > "$out/anomalies.txt" &
tail_pid=$!
# The same events as JSON, to score the incidents against the simulator's labels at the end.
"$nuwatch" tail --connect "$publish" --anomalies-only --json > "$out/anomalies.jsonl" 2>/dev/null &
json_pid=$!
( while kill -0 "$tail_pid" 2>/dev/null; do sleep 1; done ) &
"$nuwatch" simulate --live --speed 3600 --pumps 12 --interval 60s --duration 2d --seed 7 --fault-free 1d --force \
  --fault-rate 3 --output "$out/live" 2>/dev/null |
  "$nuwatch" send --connect "$ingest" --input - 2>"$out/send.log" &
feeder=$!
shown=0
while kill -0 "$feeder" 2>/dev/null; do
  sleep 1
  total=$(grep -c INCIDENT "$out/anomalies.txt" || true)
  if [ "$total" -gt "$shown" ]; then
    grep INCIDENT "$out/anomalies.txt" | sed -n "$((shown + 1)),${total}p" | sed 's/^/   /'
    shown=$total
  fi
done
wait "$feeder" || true
sleep 1
grep INCIDENT "$out/anomalies.txt" | sed -n "$((shown + 1)),\$p" | sed 's/^/   /'

echo
echo "== 6. What Prometheus would scrape (a few of the nuwatch_ series)"
"$py" - "$metrics" <<'PY'
import re, sys, urllib.request
text = urllib.request.urlopen("http://%s/metrics" % sys.argv[1], timeout=5).read().decode()
totals = {}
for line in text.splitlines():
    m = re.match(r'(nuwatch_[a-z_]+)(\{[^}]*\})? ([0-9.eE+-]+)$', line)
    if not m:
        continue
    name, labels, value = m.group(1), m.group(2) or "", float(m.group(3))
    if name in ("nuwatch_vectors_total", "nuwatch_anomalies_total", "nuwatch_support_vectors",
                "nuwatch_incidents_open"):
        totals[name] = totals.get(name, 0) + value
    if name in ("nuwatch_streams", "nuwatch_build_info") or 'result="ok"' in labels and 'pump-01' in labels:
        print("   %s%s %g" % (name, labels, value))
    if name == "nuwatch_support_vectors" and 'pump-01"' in labels:
        print("   %s%s %g" % (name, labels, value))
for name in sorted(totals):
    print("   sum of %s over the pumps: %g" % (name, totals[name]))
PY

echo
echo "== 7. Shut down (SIGTERM: snapshot every stream, exit 0) and sum up"
kill -TERM "$daemon"
wait "$daemon" && echo "   nuwatchd exited 0; state files: $(ls "$out/state" | wc -l) in $out/state"
kill "$tail_pid" "$json_pid" 2>/dev/null || true
opened=$(grep -c "OPENED" "$out/anomalies.txt" || true)
flagged=$(grep -vc INCIDENT "$out/anomalies.txt" || true)
echo "   $flagged flagged vectors, $opened incidents opened. The simulator labelled these faults:"
sed 's/^/     /' "$out/live/incidents.csv"
# Closed incidents as alarm events (stream,start,end), scored against the labels.
"$py" - "$out/anomalies.jsonl" > "$out/alarm-events.csv" <<'PY'
import json, sys
# An incident still open at shutdown counts from its start to the last event seen of its stream.
print("stream,start,end")
open_incidents, last = {}, {}
for line in open(sys.argv[1]):
    event = json.loads(line)
    stream = event.get("stream")
    last[stream] = max(last.get(stream, 0), event.get("t", 0))
    if event.get("event") == "incident_open":
        open_incidents[stream] = event["start"]
    elif event.get("event") == "incident_close":
        open_incidents.pop(stream, None)
        print("%s,%s,%s" % (stream, event["start"], event["end"]))
for stream, start in open_incidents.items():
    print("%s,%s,%s" % (stream, start, max(start, last[stream])))
PY
echo
echo "   The incidents scored against the labels (nuwatch evaluate, 10 minutes of grace):"
"$nuwatch" evaluate --alarms "$out/alarm-events.csv" --incidents "$out/live/incidents.csv" \
  --grace 10m | sed 's/^/   /' | grep -E "stream|overall|options" || true
