#!/usr/bin/env bash
# Regenerate the generated seeds of the fuzz corpora (tests/fuzz/corpus/).
#
#   BUILD=build/x tests/fuzz/make_seeds.sh
#
# Needs $BUILD/oddsky (make BUILD=...).  Real demo packets come from
# `oddsky simulate` (JSON lines, split one per file, and one-packet Avro
# containers); bare-Avro and schema-id packets, model snapshots and a
# checkpoint come from tests/fuzz/seedgen.c, built here against the real
# encoders.  Hand-written seeds (small edge cases, minimised crash inputs)
# live beside them and are left alone: only files named sim-*, model-*,
# checkpoint-* and gen-* are rewritten.  Output is deterministic.
set -euo pipefail
top=$(cd "$(dirname "$0")/../.." && pwd)
cd "$top"
BUILD=${BUILD:-build}
oddsky="$BUILD/oddsky"
[ -x "$oddsky" ] || { echo "make_seeds: build $oddsky first" >&2; exit 1; }
c=tests/fuzz/corpus
mkdir -p "$c/decode" "$c/checkpoint" "$c/featmap" "$c/config"
rm -f "$c"/decode/sim-* "$c"/decode/gen-* "$c"/checkpoint/model-* \
      "$c"/checkpoint/checkpoint-* "$c"/featmap/gen-* "$c"/config/gen-*
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT

# --- decode: demo packets in every framing -----------------------------
sim=(--seed 11 --fields 4 --burst 2 --history 6)
"$oddsky" simulate "${sim[@]}" --count 40 --output "$tmp/p.jsonl" 2>/dev/null
# Packets 1, 20 and 40 (the later ones carry history).
for i in 1 20 40; do
    sed -n "${i}p" "$tmp/p.jsonl" | tr -d '\n' > "$c/decode/sim-json-$i.json"
done
for n in 1 2; do
    "$oddsky" simulate "${sim[@]}" --count "$n" --format avro-container \
        --output "$tmp/c.avro" 2>/dev/null
    cp "$tmp/c.avro" "$c/decode/sim-container-$n.avro"  # n=2: multi_record
done
cc -std=c11 -D_DEFAULT_SOURCE -I. -O1 -o "$tmp/seedgen" tests/fuzz/seedgen.c \
    daemon/sim.c daemon/state.c core/*.c -lm
"$tmp/seedgen" "$c/decode" "$c/checkpoint"

# A schema-id packet for the variant schema 2.avsc of fuzz_decode.c, and
# the demo packet as a deflate-compressed container (avro-c's file reader
# path), both encoded by hand from the Avro 1.11 specification.
python3 - "$c/decode" "$c/decode/sim-container-1.avro" <<'EOF'
import struct, sys, zlib
out, container = sys.argv[1], sys.argv[2]
def zz(n):
    n = (n << 1) ^ (n >> 63)
    b = bytearray()
    while True:
        if n > 0x7f:
            b.append((n & 0x7f) | 0x80); n >>= 7
        else:
            b.append(n); return bytes(b)
def s(x):
    x = x.encode() if isinstance(x, str) else x
    return zz(len(x)) + x
d = lambda v: struct.pack('<d', v)
f = lambda v: struct.pack('<f', v)
body = (zz(1) + s('pkt-1') +                        # packet_id: string
        zz(1) + zz(0) + zz(42) + b'abcd' +          # source: Src{id: long, tag}
        zz(1) + d(60000.5) + zz(2) + s(b'g') +      # obs.mjd, obs.band: bytes
        zz(1) + f(20.5) + zz(1) + f(0.05) + b'\x01' +   # mag: float, mag_err, quality
        zz(1) + s('k') + s(b'vv') + zz(0) +         # extra map
        zz(1) + zz(2) +                             # history: 2 items
        d(59990.0) + zz(1) + zz(1) + d(20.9) + f(0.1) +
        d(59995.0) + zz(2) + zz(0) + f(0.2) +
        zz(0) +                                     # end of array
        zz(0) +                                     # again: null
        zz(1) + zz(1) + zz(2) + zz(0))              # chain: 1 -> 2 -> null
open(out + '/gen-variant-schema-id.bin', 'wb').write(b'\0\0\0\0\2' + body)

# Deflate container: rebuild the simulate container with codec deflate.
raw = open(container, 'rb').read()
pos = 4
def rd(p):
    v = sh = 0
    while True:
        b = raw[p]; p += 1
        v |= (b & 0x7f) << sh; sh += 7
        if not b & 0x80:
            return (v >> 1) ^ -(v & 1), p
meta = {}
n, pos = rd(pos)
while n:
    for _ in range(abs(n)):
        kl, pos = rd(pos); k = raw[pos:pos+kl]; pos += kl
        vl, pos = rd(pos); v = raw[pos:pos+vl]; pos += vl
        meta[k] = v
    n, pos = rd(pos)
sync = raw[pos:pos+16]; pos += 16
cnt, pos = rd(pos); size, pos = rd(pos); datum = raw[pos:pos+size]
def container(codec, block):
    hdr = b'Obj\x01' + zz(2) + s(b'avro.schema') + s(meta[b'avro.schema']) + \
          s(b'avro.codec') + s(codec) + zz(0) + sync
    return hdr + zz(1) + zz(len(block)) + block + sync
co = zlib.compressobj(9, zlib.DEFLATED, -15)
open(out + '/gen-deflate-container.avro', 'wb').write(
    container(b'deflate', co.compress(datum) + co.flush()))
EOF

# --- featmap: the demo map, and small maps using every feature kind ----
python3 - "$c/featmap" config/demo-featmap.json <<'EOF'
import json, sys
out, demo = sys.argv[1], json.load(open(sys.argv[2]))
open(out + '/gen-demo.json', 'w').write(json.dumps(demo))
small = {"id": "packet_id", "source": "source.id", "time": "obs.mjd",
         "history": {"path": "history", "time": "mjd", "value": "mag",
                     "err": "mag_err", "band": "band", "max_points": 4},
         "current": {"time": "obs.mjd", "value": "obs.mag",
                     "err": "obs.mag_err", "band": "obs.band"},
         "features": [
             {"name": "a", "field": "obs.mag", "err": "obs.mag_err", "transform": "asinh"},
             {"name": "b", "field": "obs.quality", "transform": "negate"},
             {"name": "c", "series": "stetson_k", "band": "all", "min_points": 3},
             {"name": "d", "series": "kurtosis", "band": "r", "include_current": True},
             {"name": "e", "color": ["g", "r"], "mode": "mean", "window_days": 30},
             {"name": "f", "ratio": ["a", "b"]},
             {"name": "g", "diff": ["f", "c"]}]}
open(out + '/gen-small.json', 'w').write(json.dumps(small))
stats = ["count", "span", "amplitude", "wmean", "std", "skew", "kurtosis",
         "von_neumann", "stetson_j", "stetson_k", "slope", "rise_rate",
         "fade_rate", "chi2_red", "beyond_1sigma", "mad", "latest_minus_mean"]
every = {"id": "packet_id", "history": small["history"],
         "features": [{"name": s, "series": s, "band": "all"} for s in stats]}
open(out + '/gen-every-stat.json', 'w').write(json.dumps(every))
EOF

# --- config: the shipped configs, one per file, with a --set line ------
for f in config/demo.json config/oddsky.example.json; do
    { echo "model.k=8"; cat "$f"; } > "$c/config/gen-$(basename "$f")"
done
echo "make_seeds: $(ls "$c/decode" | wc -l) decode, $(ls "$c/checkpoint" | wc -l) checkpoint," \
     "$(ls "$c/featmap" | wc -l) featmap, $(ls "$c/config" | wc -l) config seeds"
