#!/usr/bin/python3
"""A second implementation of the nuwatch wire protocol, version 1, in Python.

It is an independent implementation that follows daemon/protocol/PROTOCOL.md only (section numbers below,
"§", refer to it): it shares no code with the C++ codec and relies on nothing the document does not
say, so that the C++ tests (tests/unit/protocol/wire_protocol_test.cc) check the C++ codec against a
separate reading of the document. Only the standard library is used (struct, json, math, hashlib).

Usage:
  python_codec_check.py --emit DIR        write sample payloads and DIR/manifest.json, which says
                                          for each file what a receiver must decode or which
                                          reason it must reject it with
  python_codec_check.py --decode FILE...  decode payload files; print one JSON line per file:
                                          {"file", "reason": null|label, "times", "values", "dims"}
  python_codec_check.py --check-keys FILE check the stream keys in FILE (one JSON string per line);
                                          print one JSON line each: {"key", "ok"}
  python_codec_check.py --check-results FILE
                                          validate each line of FILE as a §9 result or incident
                                          event; print one normalised JSON line each; exit 1 with a
                                          message at the first line that breaks §9
  python_codec_check.py --decode-result-batch FILE
                                          decode FILE as a §9.5 binary result batch; print one
                                          normalised JSON line per row (as --check-results prints
                                          the JSON form; NaN written as null); exit 1 with a
                                          message when it breaks §9.5.4
  python_codec_check.py --self-test       check this implementation against the §6.4 and §9.5.5
                                          examples and §13.3's vectors
"""

import argparse
import hashlib
import json
import math
import os
import random
import struct
import sys

# §7 defaults.
MAX_KEY_BYTES = 128
MAX_DIMS = 1024
MAX_VECTORS_PER_MESSAGE = 4096
MAX_MESSAGE_BYTES = 4 * 1024 * 1024
MAX_JSON_DEPTH = 32  # §5

MAGIC = b"NUWB"  # §6.1
HEADER = struct.Struct("<4sBBHII")  # magic, version, dtype, dims, count, reserved
DTYPE_F32 = 1
DTYPE_F64 = 2
DTYPE_SIZE = {DTYPE_F32: 4, DTYPE_F64: 8}
DTYPE_CODE = {DTYPE_F32: "f", DTYPE_F64: "d"}

KEY_BYTES = set(b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789._:/-")  # §3


class Rejected(Exception):
    """A payload rejected with a §8 reason."""

    def __init__(self, reason):
        super().__init__(reason)
        self.reason = reason


class _NonFiniteNumber(Exception):
    pass


class _BadLiteral(Exception):
    pass


class ProtocolError(Exception):
    """A result or event object that breaks §9."""


# --- Stream keys (§3) ---


def key_ok(key: bytes) -> bool:
    return 1 <= len(key) <= MAX_KEY_BYTES and all(b in KEY_BYTES for b in key)


# --- Ownership across replicas (§13) ---


def owner_weight(member: str, key: str) -> int:
    """§13.2: BLAKE2b with an 8-byte digest of member || 0x00 || key, big-endian."""
    digest = hashlib.blake2b(member.encode() + b"\0" + key.encode(), digest_size=8).digest()
    return int.from_bytes(digest, "big")


def owner_of(key: str, members) -> str:
    """§13.2: the member with the largest weight; a tie to the bytewise smaller name."""
    return min(members, key=lambda m: (-owner_weight(m, key), m.encode()))


# --- Encoders ---


def encode_binary(times, rows, dtype=DTYPE_F64) -> bytes:
    """§6: header, count f64 timestamps, count*dims values, all little-endian."""
    count = len(times)
    dims = len(rows[0])
    assert count == len(rows) and count >= 1 and dims >= 1
    assert all(len(r) == dims for r in rows)
    out = bytearray(HEADER.pack(MAGIC, 1, dtype, dims, count, 0))
    out += struct.pack("<%dd" % count, *times)
    flat = [v for r in rows for v in r]
    out += struct.pack("<%d%s" % (len(flat), DTYPE_CODE[dtype]), *flat)
    return bytes(out)


def _number_text(v):
    return repr(float(v))  # shortest round-trip form


def encode_json(times, rows, batch=None) -> bytes:
    """§5: the single shape for one vector unless batch is True, the batch shape otherwise."""
    if batch is None:
        batch = len(times) != 1
    if not batch:
        text = '{"t": %s, "x": [%s]}' % (_number_text(times[0]),
                                         ", ".join(_number_text(v) for v in rows[0]))
    else:
        text = '{"t": [%s], "x": [%s]}' % (
            ", ".join(_number_text(t) for t in times),
            ", ".join("[" + ", ".join(_number_text(v) for v in r) + "]" for r in rows))
    return text.encode("utf-8")


# --- Decoder ---


def decode_payload(data: bytes):
    """Returns (times, rows, dtype_name) or raises Rejected(reason)."""
    if len(data) == 0:
        raise Rejected("empty_payload")
    if len(data) > MAX_MESSAGE_BYTES:
        raise Rejected("message_too_large")
    first = data[0:1]
    if first in (b"{", b" ", b"\t", b"\n", b"\r"):
        return _decode_json(data)
    if first == b"N":
        return _decode_binary(data)
    raise Rejected("unknown_format")


def _decode_binary(data: bytes):
    # The §6.5 order.
    if len(data) < 5 or data[0:4] != MAGIC:
        raise Rejected("bad_header")
    if data[4] != 1:
        raise Rejected("unsupported_version")
    if len(data) < HEADER.size:
        raise Rejected("bad_header")
    _, _, dtype, dims, count, reserved = HEADER.unpack_from(data, 0)
    if dtype not in DTYPE_SIZE:
        raise Rejected("bad_dtype")
    if reserved != 0:
        raise Rejected("bad_header")
    if dims == 0:
        raise Rejected("empty_vector")
    if count == 0:
        raise Rejected("empty_batch")
    if dims > MAX_DIMS:
        raise Rejected("dims_limit")
    if count > MAX_VECTORS_PER_MESSAGE:
        raise Rejected("count_limit")
    if len(data) != HEADER.size + 8 * count + count * dims * DTYPE_SIZE[dtype]:
        raise Rejected("size_mismatch")
    times = list(struct.unpack_from("<%dd" % count, data, HEADER.size))
    flat = struct.unpack_from("<%d%s" % (count * dims, DTYPE_CODE[dtype]), data,
                              HEADER.size + 8 * count)
    if not all(math.isfinite(t) for t in times) or not all(math.isfinite(v) for v in flat):
        raise Rejected("non_finite")
    rows = [list(flat[i * dims:(i + 1) * dims]) for i in range(count)]
    return times, rows, "f32" if dtype == DTYPE_F32 else "f64"


class _Object(dict):
    """A JSON object that remembers which of its member names appeared more than once."""

    def __init__(self, pairs):
        super().__init__()
        self.duplicates = set()
        for k, v in pairs:
            if k in self:
                self.duplicates.add(k)
            self[k] = v


def _finite_float(text):
    v = float(text)
    if not math.isfinite(v):
        raise _NonFiniteNumber()
    return v


def _finite_int(text):
    v = _finite_float(text)
    return 0.0 if v == 0 else v  # §5: the integer literal -0 reads as 0


def _reject_literal(_):
    raise _BadLiteral()  # NaN, Infinity, -Infinity are not JSON


def _check_depth_and_strings(value):
    """§5: nesting at most 32 deep (top-level object = 1); no unpaired surrogate escapes."""
    stack = [(value, 1)]
    while stack:
        v, depth = stack.pop()
        if isinstance(v, (dict, list)):
            if depth > MAX_JSON_DEPTH:
                raise Rejected("bad_json")
            items = list(v.items()) if isinstance(v, dict) else [(None, e) for e in v]
            for k, e in items:
                if k is not None:
                    _check_string(k)
                stack.append((e, depth + 1))
        elif isinstance(v, str):
            _check_string(v)


def _check_string(s):
    if any(0xD800 <= ord(c) <= 0xDFFF for c in s):
        raise Rejected("bad_json")


def _is_number(v):
    return isinstance(v, float)  # every JSON number is read as a float; bools are not floats


def _decode_json(data: bytes):
    try:
        text = data.decode("utf-8")
        obj = json.loads(text, object_pairs_hook=_Object, parse_float=_finite_float,
                         parse_int=_finite_int, parse_constant=_reject_literal)
    except _NonFiniteNumber:
        raise Rejected("non_finite")
    except (UnicodeDecodeError, ValueError, RecursionError, _BadLiteral):
        raise Rejected("bad_json")
    if not isinstance(obj, dict):
        raise Rejected("bad_json")
    _check_depth_and_strings(obj)
    if "t" in obj.duplicates or "x" in obj.duplicates:
        raise Rejected("bad_json")
    if "t" not in obj or "x" not in obj:
        raise Rejected("missing_field")
    t, x = obj["t"], obj["x"]
    if not isinstance(x, list):
        raise Rejected("bad_field_type")
    if _is_number(t):
        if not all(_is_number(v) for v in x):
            raise Rejected("bad_field_type")
        if len(x) == 0:
            raise Rejected("empty_vector")
        if len(x) > MAX_DIMS:
            raise Rejected("dims_limit")
        return [t], [list(x)], "json"
    if not isinstance(t, list) or not all(_is_number(v) for v in t):
        raise Rejected("bad_field_type")
    if not all(isinstance(r, list) for r in x):
        raise Rejected("bad_field_type")
    if not all(_is_number(v) for r in x for v in r):
        raise Rejected("bad_field_type")
    if len(t) == 0 and len(x) == 0:
        raise Rejected("empty_batch")
    if len(t) > MAX_VECTORS_PER_MESSAGE or len(x) > MAX_VECTORS_PER_MESSAGE:
        raise Rejected("count_limit")
    if any(len(r) == 0 for r in x):
        raise Rejected("empty_vector")
    if any(len(r) > MAX_DIMS for r in x):
        raise Rejected("dims_limit")
    if len(t) != len(x):
        raise Rejected("batch_length_mismatch")
    if any(len(r) != len(x[0]) for r in x):
        raise Rejected("ragged_rows")
    return list(t), [list(r) for r in x], "json"


# --- Results and events (§9) ---


def _need(cond, message):
    if not cond:
        raise ProtocolError(message)


def _is_json_number(v):
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _is_json_integer(v):
    return isinstance(v, int) and not isinstance(v, bool)


def parse_published_messages(text: str):
    """Validates one published message: a §9 object, or a §9.4 batch {"results": [...]} of §9.1
    results (an object without an "event" member). Returns the normalised objects in order."""
    obj = json.loads(text)
    _need(isinstance(obj, dict), "not a JSON object")
    if "results" in obj and "event" not in obj:
        if "v" in obj:
            _need(obj["v"] == 1, "a later version (v = %r): a v1 subscriber drops it" % obj["v"])
        _need(isinstance(obj["results"], list), "results must be an array")
        _need(len(obj["results"]) >= 1, "a batch holds at least one result")
        out = []
        for item in obj["results"]:
            normalised = _parse_object(item)
            _need(normalised["kind"] == "result", "a batch holds results only, not events")
            out.append(normalised)
        return out
    return [_parse_object(obj)]


def parse_published(text: str):
    """Validates one §9 object; returns it normalised (known members only, plus "kind")."""
    return _parse_object(json.loads(text))


def _parse_object(obj):
    _need(isinstance(obj, dict), "not a JSON object")
    if "v" in obj:
        _need(obj["v"] == 1, "a later version (v = %r): a v1 subscriber drops it" % obj["v"])
    if "event" in obj:
        ev = obj["event"]
        _need(ev in ("incident_open", "incident_close"), "unknown event %r" % ev)
        _need(_is_json_integer(obj.get("incident")) and obj["incident"] >= 0,
              "incident must be an integer >= 0")
        _need(_is_json_number(obj.get("t")), "t must be a number")
        _need(_is_json_number(obj.get("start")), "start must be a number")
        out = {"kind": "event", "event": ev, "incident": obj["incident"], "t": obj["t"],
               "start": obj["start"]}
        if ev == "incident_close":
            _need(_is_json_number(obj.get("end")), "a close event needs a number end")
            out["end"] = obj["end"]
        else:
            _need("end" not in obj, "an open event has no end")
        if "peak_decision" in obj:
            _need(_is_json_number(obj["peak_decision"]), "peak_decision must be a number")
            out["peak_decision"] = obj["peak_decision"]
        return out
    _need(_is_json_number(obj.get("t")), "t must be a number")
    _need(obj.get("state") in ("learning", "history", "scoring"),
          "state must be learning, history or scoring")
    learning = obj["state"] != "scoring"
    _need("decision" in obj, "decision is absent")
    _need("p_value" in obj, "p_value is absent")
    if learning:
        _need(obj["decision"] is None, "decision must be null unless scoring")
        _need(obj["p_value"] is None, "p_value must be null unless scoring")
    else:
        _need(_is_json_number(obj["decision"]), "decision must be a number while scoring")
        _need(obj["p_value"] is None or (_is_json_number(obj["p_value"]) and
                                         0 <= obj["p_value"] <= 1),
              "p_value must be null or a number in [0, 1]")
    _need(isinstance(obj.get("anomaly"), bool), "anomaly must be a boolean")
    _need(not (learning and obj["anomaly"]), "anomaly must be false while learning")
    _need("incident" in obj, "incident is absent")
    _need(obj["incident"] is None or (_is_json_integer(obj["incident"]) and obj["incident"] >= 0),
          "incident must be null or an integer >= 0")
    _need(_is_json_integer(obj.get("model_version")), "model_version must be an integer")
    _need(_is_json_integer(obj.get("support_vectors")), "support_vectors must be an integer")
    if learning:
        _need(obj["model_version"] == 0 and obj["support_vectors"] == 0,
              "model_version and support_vectors are 0 while learning")
    out = {"kind": "result", "t": obj["t"], "state": obj["state"], "decision": obj["decision"],
           "p_value": obj["p_value"], "anomaly": obj["anomaly"], "incident": obj["incident"],
           "model_version": obj["model_version"], "support_vectors": obj["support_vectors"]}
    _need(("top_features" in obj) == obj["anomaly"],
          "top_features is present exactly for anomalies")
    if obj["anomaly"]:
        top = obj["top_features"]
        _need(isinstance(top, list), "top_features must be an array")
        features = []
        for entry in top:
            _need(isinstance(entry, dict), "a top_features entry must be an object")
            _need(isinstance(entry.get("feature"), str), "feature must be a string")
            share = entry.get("share")
            _need(_is_json_number(share) and 0 <= share <= 1, "share must be a number in [0, 1]")
            features.append({"feature": entry["feature"], "share": share})
        shares = [f["share"] for f in features]
        _need(shares == sorted(shares, reverse=True), "top_features must be by decreasing share")
        out["top_features"] = features
    return out


# --- Binary result batches (§9.5) ---

RESULT_MAGIC = b"NUWR"  # §9.5.1
RESULT_HEADER = struct.Struct("<4sBBHII")  # magic, version, flags, reserved, count, features
RESULT_ROW = struct.Struct("<dddqQIBBBB")  # §9.5.2: t, decision, p_value, incident,
#                                            model_version, support_vectors, state, anomaly,
#                                            top_features, reserved
RESULT_FEATURE = struct.Struct("<dII")  # §9.5.3: share, feature, reserved
RESULT_STATES = {0: "learning", 1: "history", 2: "scoring"}


def decode_result_batch(frame: bytes, feature_names=None):
    """Decodes frame 2 of a §9.5 message, checked in the order of §9.5.4. Returns its rows as the
    normalised objects parse_published gives for the JSON form (NaN as None, incident -1 as None),
    each top feature named feature_names[index] when names are given, else str(index) (§9.5.3).
    Raises ProtocolError naming the failed check."""
    _need(len(frame) >= 5 and frame[:4] == RESULT_MAGIC, "not a binary batch (magic)")
    _need(frame[4] == 1, "a later version (%d): a v1 subscriber drops it" % frame[4])
    _need(len(frame) >= RESULT_HEADER.size, "truncated header (%d bytes)" % len(frame))
    _, _, flags, reserved, count, features = RESULT_HEADER.unpack_from(frame, 0)
    _need(flags == 0 and reserved == 0, "flags or reserved not 0")
    _need(count >= 1, "count = 0")
    size = RESULT_HEADER.size + RESULT_ROW.size * count + RESULT_FEATURE.size * features
    _need(len(frame) == size, "size %d, the header implies %d" % (len(frame), size))
    rows = []
    claimed = 0
    for i in range(count):
        (t, decision, p_value, incident, model_version, support_vectors, state, anomaly, top,
         row_reserved) = RESULT_ROW.unpack_from(frame, RESULT_HEADER.size + RESULT_ROW.size * i)
        _need(state in RESULT_STATES, "row %d: state %d" % (i, state))
        _need(anomaly in (0, 1) and not (anomaly == 1 and state != 2),
              "row %d: anomaly %d with state %d" % (i, anomaly, state))
        _need(top == 0 or anomaly == 1, "row %d: top features on a row not flagged" % i)
        _need(row_reserved == 0, "row %d: reserved byte not 0" % i)
        _need(incident >= -1, "row %d: incident %d" % (i, incident))
        _need(claimed + top <= features, "row %d: its top features run past the entries" % i)
        rows.append((t, decision, p_value, incident, model_version, support_vectors, state,
                     anomaly, claimed, top))
        claimed += top
    _need(claimed == features, "rows claim %d entries, the header %d" % (claimed, features))
    entries = []
    base = RESULT_HEADER.size + RESULT_ROW.size * count
    for k in range(features):
        share, index, entry_reserved = RESULT_FEATURE.unpack_from(frame,
                                                                  base + RESULT_FEATURE.size * k)
        _need(entry_reserved == 0, "entry %d: reserved not 0" % k)
        name = feature_names[index] if feature_names is not None else str(index)
        entries.append({"feature": name, "share": share})
    out = []
    for (t, decision, p_value, incident, model_version, support_vectors, state, anomaly, first,
         top) in rows:
        result = {"kind": "result", "t": t, "state": RESULT_STATES[state],
                  "decision": None if math.isnan(decision) else decision,
                  "p_value": None if math.isnan(p_value) else p_value,
                  "anomaly": anomaly == 1, "incident": None if incident == -1 else incident,
                  "model_version": model_version, "support_vectors": support_vectors}
        if anomaly == 1:
            result["top_features"] = entries[first:first + top]
        out.append(result)
    return out


# --- Command line ---


def _f32(v):
    return struct.unpack("<f", struct.pack("<f", v))[0]


def _emit(directory):
    os.makedirs(directory, exist_ok=True)
    rng = random.Random(20260101)
    manifest = []

    def accept(name, data, times, rows, dtype):
        with open(os.path.join(directory, name), "wb") as f:
            f.write(data)
        got = decode_payload(data)  # this implementation must agree with itself
        assert got == (times, rows, dtype), name
        manifest.append({"file": name, "ok": True, "dtype": dtype, "times": times, "values": rows})

    def reject(name, data, reason):
        with open(os.path.join(directory, name), "wb") as f:
            f.write(data)
        try:
            decode_payload(data)
            raise AssertionError("%s was accepted" % name)
        except Rejected as r:
            assert r.reason == reason, (name, r.reason, reason)
        manifest.append({"file": name, "ok": False, "reason": reason})

    # Valid payloads: magnitudes from subnormal to near the double maximum, both zeros.
    t0 = 1767225600.0  # 2026-01-01T00:00:00Z
    times = [t0 + 10.0 * i + 0.125 for i in range(5)]
    rows = [[rng.uniform(-1e3, 1e3) for _ in range(6)] for _ in range(5)]
    rows[0][0], rows[1][1], rows[2][2], rows[3][3] = -0.0, 5e-324, 1.7976931348623157e308, -1e-300
    accept("f64_batch.bin", encode_binary(times, rows, DTYPE_F64), times, rows, "f64")
    rows32 = [[_f32(rng.uniform(-50, 50)) for _ in range(4)] for _ in range(3)]
    rows32[0][1] = _f32(3.4028234663852886e38)  # the largest float
    rows32[1][2] = _f32(1.401298464324817e-45)  # the smallest subnormal float
    accept("f32_batch.bin", encode_binary(times[:3], rows32, DTYPE_F32), times[:3], rows32, "f32")
    accept("f64_single.bin", encode_binary([t0], [[42.0]], DTYPE_F64), [t0], [[42.0]], "f64")
    accept("doc_example_6_4.bin", bytes.fromhex(
        "4E555742 01 02 0200 01000000 00000000 000010406E55DA41 000000000000F83F 00000000000000C0"
        .replace(" ", "")), [1767225600.25], [[1.5, -2.0]], "f64")
    accept("json_batch.json", encode_json(times, rows), times, rows, "json")
    accept("json_single_extras.json",
           b'\n {"seq": 17, "x": [1, -2.5e3, 0.1, -0], "source": {"host": "a", "tags": [1, [2]]},'
           b' "t": 1767225600.5}\r\n', [1767225600.5], [[1.0, -2500.0, 0.1, 0.0]], "json")
    accept("json_batch_one.json", encode_json([t0], [[1.0, 2.0]], batch=True), [t0], [[1.0, 2.0]],
           "json")

    # One defect each.
    good = encode_binary([t0, t0 + 1], [[1.0, 2.0], [3.0, 4.0]], DTYPE_F64)
    reject("empty.bin", b"", "empty_payload")
    pad = MAX_MESSAGE_BYTES + 1 - len(b'{"t":1,"x":[1],"pad":""}')
    reject("too_large.json", b'{"t":1,"x":[1],"pad":"' + b"a" * pad + b'"}', "message_too_large")
    reject("bom.json", b'\xef\xbb\xbf{"t":1,"x":[1]}', "unknown_format")
    reject("nan_literal.json", b'{"t":1,"x":[NaN]}', "bad_json")
    reject("trailing.json", b'{"t":1,"x":[1]} x', "bad_json")
    reject("duplicate_t.json", b'{"t":1,"x":[1],"t":2}', "bad_json")
    reject("top_array.json", b' [1]', "bad_json")
    reject("deep.json", b'{"t":1,"x":[1],"d":' + b"[" * 40 + b"]" * 40 + b"}", "bad_json")
    reject("surrogate.json", b'{"t":1,"x":[1],"s":"\\ud800"}', "bad_json")
    reject("missing_x.json", b'{"t":1}', "missing_field")
    reject("bool_value.json", b'{"t":1,"x":[true]}', "bad_field_type")
    reject("string_t.json", b'{"t":"1","x":[1]}', "bad_field_type")
    reject("rows_with_number_t.json", b'{"t":1,"x":[[1]]}', "bad_field_type")
    reject("length_mismatch.json", b'{"t":[1,2],"x":[[1]]}', "batch_length_mismatch")
    reject("ragged.json", b'{"t":[1,2],"x":[[1,2],[3]]}', "ragged_rows")
    reject("empty_x.json", b'{"t":1,"x":[]}', "empty_vector")
    reject("empty_batch.json", b'{"t":[],"x":[]}', "empty_batch")
    reject("overflow.json", b'{"t":1,"x":[1e999]}', "non_finite")
    reject("overflow_ignored_member.json", b'{"t":1,"x":[1],"y":-1e400}', "non_finite")
    reject("dims_limit.json", encode_json([t0], [[1.0] * (MAX_DIMS + 1)]), "dims_limit")
    reject("count_limit.json", encode_json([t0] * (MAX_VECTORS_PER_MESSAGE + 1),
                                           [[1.0]] * (MAX_VECTORS_PER_MESSAGE + 1)), "count_limit")
    reject("bad_magic.bin", b"NUWX" + good[4:], "bad_header")
    reject("short_header.bin", good[:12], "bad_header")
    reject("reserved.bin", good[:12] + b"\x01\x00\x00\x00" + good[16:], "bad_header")
    reject("version2.bin", good[:4] + b"\x02" + good[5:], "unsupported_version")
    reject("dtype3.bin", good[:5] + b"\x03" + good[6:], "bad_dtype")
    reject("trailing_byte.bin", good + b"\x00", "size_mismatch")
    reject("dims0.bin", HEADER.pack(MAGIC, 1, DTYPE_F64, 0, 1, 0) + struct.pack("<d", t0),
           "empty_vector")
    reject("count0.bin", HEADER.pack(MAGIC, 1, DTYPE_F64, 1, 0, 0), "empty_batch")
    reject("dims_limit.bin", HEADER.pack(MAGIC, 1, DTYPE_F32, MAX_DIMS + 1, 1, 0), "dims_limit")
    reject("count_limit.bin", HEADER.pack(MAGIC, 1, DTYPE_F64, 1, MAX_VECTORS_PER_MESSAGE + 1, 0),
           "count_limit")
    reject("nan.bin", good[:-8] + struct.pack("<d", float("nan")), "non_finite")
    reject("inf_time.bin", good[:16] + struct.pack("<d", float("inf")) + good[24:], "non_finite")
    f32_one = encode_binary([t0], [[1.0]], DTYPE_F32)
    reject("inf_f32.bin", f32_one[:-4] + struct.pack("<f", math.inf), "non_finite")

    keys = [("pump-01", True), ("plant/a:b_c.d-e", True), ("k" * MAX_KEY_BYTES, True),
            ("k" * (MAX_KEY_BYTES + 1), False), ("", False), ("pump 01", False),
            ("pump\u00e901", False), ("a*b", False)]
    with open(os.path.join(directory, "manifest.json"), "w") as f:
        json.dump({"payloads": manifest, "keys": [{"key": k, "ok": ok} for k, ok in keys]}, f)
    for k, ok in keys:
        assert key_ok(k.encode("utf-8")) == ok, k


def _decode_files(paths):
    for path in paths:
        with open(path, "rb") as f:
            data = f.read()
        try:
            times, rows, _ = decode_payload(data)
            line = {"file": os.path.basename(path), "reason": None, "times": times, "values": rows,
                    "dims": len(rows[0])}
        except Rejected as r:
            line = {"file": os.path.basename(path), "reason": r.reason}
        print(json.dumps(line))


def _check_keys(path):
    with open(path, encoding="utf-8") as f:
        for text in f:
            if text.strip():
                key = json.loads(text)
                print(json.dumps({"key": key, "ok": key_ok(key.encode("utf-8"))}))


def _check_results(path):
    with open(path, encoding="utf-8") as f:
        for number, text in enumerate(f, start=1):
            if not text.strip():
                continue
            try:
                print(json.dumps(parse_published(text)))
            except (ProtocolError, ValueError) as e:
                print("%s:%d: %s" % (path, number, e), file=sys.stderr)
                return 1
    return 0


def _decode_result_batch_file(path):
    with open(path, "rb") as f:
        frame = f.read()
    try:
        rows = decode_result_batch(frame)
    except ProtocolError as e:
        print("%s: %s" % (path, e), file=sys.stderr)
        return 1
    for row in rows:
        print(json.dumps(row))
    return 0


def _self_test():
    example = bytes.fromhex("4E55574201020200010000000000000000001040" "6E55DA41"
                            "000000000000F83F" "00000000000000C0")
    assert encode_binary([1767225600.25], [[1.5, -2.0]]) == example
    assert decode_payload(example) == ([1767225600.25], [[1.5, -2.0]], "f64")
    # §9.5.5: the binary result batch example and the JSON form it carries.
    batch = bytes.fromhex(
        "4E555752" "01" "00" "0000" "02000000" "02000000"
        "000010406E55DA41" "000000000000E03F" "000000000000D03F" "FFFFFFFFFFFFFFFF"
        "0400000000000000" "76000000" "02000000"
        "000090426E55DA41" "000000000000E0BF" "000000000000803F" "0700000000000000"
        "0400000000000000" "76000000" "02010200"
        "000000000000E83F" "0300000000000000" "000000000000D03F" "0400000000000000")
    assert len(batch) == 144
    as_json = parse_published_messages(
        '{"results":[{"t":1767225600.25,"state":"scoring","decision":0.5,"p_value":0.25,'
        '"anomaly":false,"incident":null,"model_version":4,"support_vectors":118},'
        '{"t":1767225610.25,"state":"scoring","decision":-0.5,"p_value":0.0078125,'
        '"anomaly":true,"incident":7,"model_version":4,"support_vectors":118,'
        '"top_features":[{"feature":"3","share":0.75},{"feature":"4","share":0.25}]}]}')
    assert decode_result_batch(batch) == as_json, decode_result_batch(batch)
    # §13.3: a weight and an owner from the tables.
    assert owner_weight("nuwatchd-1", "pump-01") == 0xe2be1b902c4f4aae
    assert owner_of("pump-03", ["nuwatchd-0", "nuwatchd-1", "nuwatchd-2", "nuwatchd-3"]) == \
        "nuwatchd-3"
    print("self-test passed")
    return 0


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    group = parser.add_mutually_exclusive_group(required=True)
    group.add_argument("--emit", metavar="DIR")
    group.add_argument("--decode", metavar="FILE", nargs="+")
    group.add_argument("--check-keys", metavar="FILE")
    group.add_argument("--check-results", metavar="FILE")
    group.add_argument("--decode-result-batch", metavar="FILE")
    group.add_argument("--self-test", action="store_true")
    args = parser.parse_args()
    if args.emit:
        _emit(args.emit)
        return 0
    if args.decode:
        _decode_files(args.decode)
        return 0
    if args.check_keys:
        _check_keys(args.check_keys)
        return 0
    if args.check_results:
        return _check_results(args.check_results)
    if args.decode_result_batch:
        return _decode_result_batch_file(args.decode_result_batch)
    return _self_test()


if __name__ == "__main__":
    sys.exit(main())
