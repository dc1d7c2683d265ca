#!/usr/bin/env python3
"""Writes the seed corpora under fuzz/corpus/<target>/ from the repository's own files (standard library only).

model_load: every model file in the repository (reference fixtures, demo models, the broken-file cases, the annotated
examples with their comments stripped, the fuzz models) plus a cut-down demo ensemble small enough for the fuzzer's
input size limit. request_decode: hand-encoded protobuf messages (first byte: the target's selector). csv_cell:
typical and awkward CSV cells. Re-running gives the same files; `cargo fuzz cmin` may later add or drop entries.
"""
import hashlib
import json
import pathlib
import re
import struct

ROOT = pathlib.Path(__file__).resolve().parent.parent
CORPUS = ROOT / "fuzz" / "corpus"


def put(target, data):
    d = CORPUS / target
    d.mkdir(parents=True, exist_ok=True)
    if isinstance(data, str):
        data = data.encode()
    (d / hashlib.sha1(data).hexdigest()).write_bytes(data)


def strip_jsonc(text):
    """Drops // comments outside strings."""
    out = []
    for line in text.splitlines():
        in_string, escaped, cut = False, False, len(line)
        for i, c in enumerate(line):
            if in_string:
                if escaped:
                    escaped = False
                elif c == "\\":
                    escaped = True
                elif c == '"':
                    in_string = False
            elif c == '"':
                in_string = True
            elif line.startswith("//", i):
                cut = i
                break
        out.append(line[:cut].rstrip())
    return "\n".join(out) + "\n"


def model_seeds():
    files = sorted((ROOT / "tests/fixtures/models").glob("*.json"))
    files += sorted((ROOT / "models/tests/broken").glob("*.json"))
    files += sorted((ROOT / "fuzz/models").glob("*.json"))
    files.append(ROOT / "service/demo/harbourline-fraud-scorecard.json")
    for f in files:
        put("model_load", f.read_bytes())
    for f in sorted((ROOT / "examples").glob("*.jsonc")):
        text = strip_jsonc(f.read_text())
        json.loads(text)
        put("model_load", text)
    # The demo ensemble is 0.5 MB; its first ten trees make a valid model of fuzzer size.
    demo = json.loads((ROOT / "service/demo/harbourline-fraud-trees.json").read_text())
    demo["ensemble"]["trees"] = demo["ensemble"]["trees"][:10]
    demo.pop("reference_distribution", None)
    put("model_load", json.dumps(demo, separators=(",", ":")))


# --- protobuf wire format (https://protobuf.dev/programming-guides/encoding/) ---
def varint(n):
    out = bytearray()
    while True:
        b = n & 0x7F
        n >>= 7
        if n:
            out.append(b | 0x80)
        else:
            out.append(b)
            return bytes(out)


def field_bytes(number, payload):
    if isinstance(payload, str):
        payload = payload.encode()
    return varint(number << 3 | 2) + varint(len(payload)) + payload


def field_double(number, x):
    return varint(number << 3 | 1) + struct.pack("<d", x)


def feature_value(v):
    return field_double(1, v) if isinstance(v, float) else field_bytes(2, v)


def row(named=None, dense=None, prediction_id="", subject_key="", tags=None):
    out = b""
    if prediction_id:
        out += field_bytes(1, prediction_id)
    if subject_key:
        out += field_bytes(2, subject_key)
    for k, v in (tags or {}).items():
        out += field_bytes(3, field_bytes(1, k) + field_bytes(2, v))
    if named is not None:
        entries = b"".join(
            field_bytes(1, field_bytes(1, k) + field_bytes(2, feature_value(v))) for k, v in named.items()
        )
        out += field_bytes(4, entries)
    if dense is not None:
        out += field_bytes(5, field_bytes(1, b"".join(struct.pack("<d", x) for x in dense)))
    return out


def request_seeds():
    nan, inf = float("nan"), float("inf")
    rows = [
        row(named={"amount": 250.0, "channel": "online", "hour": 3.0}, prediction_id="p-1", subject_key="card-9",
            tags={"shop": "web"}),
        row(named={"amount": 12.5, "channel": "chip", "card_age_days": 400.0}),
        row(named={"amount": nan, "channel": "kiosk", "extra": 1.0}),
        row(named={"amount": "250", "channel": 2.0}),
        row(named={}),
        row(dense=[250.0, 2.0, 3.0]),
        row(dense=[inf, 7.0, -0.0]),
        row(dense=[nan, nan, nan]),
        row(dense=[1e308, 1.5, -1e308]),
        row(dense=[1.0]),
        row(prediction_id="has space"),
    ]
    for i, r in enumerate(rows):
        for selector in (0, 4 * (8 + i % 8)):
            put("request_decode", bytes([selector]) + field_bytes(2, r))
    batch = b"".join(field_bytes(2, r) for r in rows[:9])
    put("request_decode", bytes([1]) + batch)
    put("request_decode", bytes([1 + 4 * 9]) + field_bytes(2, rows[5]) * 20)
    put("request_decode", bytes([0x80]) + field_bytes(1, "r00") + field_bytes(2, rows[0]))
    put("request_decode", bytes([0x81]) + field_bytes(1, "no-such-route") + batch)
    put("request_decode", bytes([2]) + field_bytes(1, "fuzz-trees"))
    put("request_decode", bytes([2]) + field_bytes(2, "r10"))
    put("request_decode", bytes([2]) + field_bytes(2, ""))


def cell_seeds():
    for cell in ["", " ", "NA", "NaN", "nan", "null", "12.5", " -3e2 ", "1e400", "-0", "inf", "+Infinity", "0x10",
                 "12,5", "chip", " chip ", "online", "NA ", " spaced ", "\u00e9t\u00e9", "\t7\n", "1_000", ".5",
                 "5.", "e5", "--1"]:
        put("csv_cell", cell)


if __name__ == "__main__":
    model_seeds()
    request_seeds()
    cell_seeds()
    for d in sorted(CORPUS.iterdir()):
        print(d.name, len(list(d.iterdir())))
