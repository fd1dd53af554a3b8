#!/usr/bin/env bash
# Peak memory of a long render: a one-hour, four-output patch (with a looped WAV input)
# rendered to 16-bit WAVs, timed
# with /usr/bin/time -v (GNU time). Target: under 64 MiB peak RSS. Writes about 1.4 GB into a
# temporary folder, removed afterwards.
#   bash benches/long_render.sh [SECONDS]      (default 3600)
set -euo pipefail
cd "$(dirname "$0")/.."
len="${1:-3600}"
if [ ! -x /usr/bin/time ]; then
    apt-get update && DEBIAN_FRONTEND=noninteractive apt-get install -y time
fi
cargo build --release --quiet
dir="$(mktemp -d)"
trap 'rm -rf "$dir"' EXIT
# A 10 s, 44.1 kHz stereo recording (written with Python's standard library), looped for the
# whole render and resampled on the fly: file inputs stream too.
python3 - "$dir/take.wav" <<'PY'
import math, struct, sys, wave
with wave.open(sys.argv[1], "wb") as w:
    w.setnchannels(2); w.setsampwidth(2); w.setframerate(44100)
    frames = bytearray()
    for n in range(441000):
        v = int(12000 * math.sin(2 * math.pi * 330 * n / 44100))
        frames += struct.pack("<hh", v, -v)
    w.writeframes(bytes(frames))
PY
cat > "$dir/long.toml" <<TOML
# One hour of a two-voice mixer with four outputs, for the memory benchmark.
[patch]
title = "long-render memory check"
length = "$len s"

[rails]
pos = "12 V"
neg = "-12 V"

[sources.a]
wave = "sine"
freq = "220 Hz"
amp = "3 Vpk"

[sources.take]
wave = "file"
path = "take.wav"
channel = 0
full_scale = "5 V"

[sources.b]
wave = "saw"
freq = "55 Hz"
amp = "2 Vpk"

[stages.mix]
type = "inverting-sum"
part = "jfet-general"
inputs = [{ from = "a", r = "100k" }, { from = "b", r = "100k" }]
feedback = { r = "100k" }

[stages.restore]
type = "inverting"
part = "jfet-general"
from = "mix"
r_in = "100k"
r_fb = "100k"

[outputs.main]
from = "restore"
series = "1k"
load = "100k"

[outputs.send]
from = "mix"
load = "10k"

[outputs.dry]
from = "take"

[outputs.bass]
from = "b"
TOML
/usr/bin/time -v ./target/release/railsong render "$dir/long.toml" --out "$dir/out" --depth 16 --long \
    2> "$dir/time.txt" > "$dir/render.txt"
cat "$dir/render.txt"
grep -E "Maximum resident set size|Elapsed \(wall clock\)" "$dir/time.txt"
kib=$(awk -F: '/Maximum resident set size/ {gsub(/ /, "", $2); print $2}' "$dir/time.txt")
echo "peak RSS: $((kib / 1024)) MiB for $len s x 4 outputs (target: under 64 MiB)"
