#!/usr/bin/env bash
# Seed the fuzz corpora: every shipped and bad patch for the patch targets, a few --set lines
# for patch_set, and small WAV files (16-bit, 24-bit, float, stereo) rendered by railsong.
set -euo pipefail
cd "$(dirname "$0")"
root=..
mkdir -p corpus/patch_text corpus/patch_set corpus/wav_load
cp "$root"/patches/*.toml "$root"/tests/bad/*.toml "$root"/tests/good/*.toml corpus/patch_text/
i=0
for s in "stages.hot.gain=-3" "sources.lead.amp=3 Vpk" "patch.rate=96 kHz" \
         "stages.mix.feedback.r=47k" "outputs.clean.file=x" "stages.mix.inputs[0].r=4k7" \
         "rails.neg=-15 V" "parts.x.based_on=ideal" "#stages.mix.feedback.c=33p"; do
    printf '%s\n' "$s" > "corpus/patch_set/seed$i"
    i=$((i + 1))
done
if [ ! -e corpus/.wav_seeded ]; then
    tmp="$(mktemp -d)"
    ( cd "$root" && cargo build --release --quiet )
    for d in 16 24 float; do
        "$root"/target/release/railsong render "$root"/patches/clean-mix.toml --depth "$d" \
            --set patch.length=0.01s --set patch.rate=8kHz --out "$tmp/$d" > /dev/null
        for f in "$tmp/$d"/*.wav; do cp "$f" "corpus/wav_load/$d-$(basename "$f")"; done
    done
    rm -rf "$tmp"
    if command -v python3 > /dev/null; then
        # 8-bit stereo and 16-bit stereo at 11025 Hz (Python's standard-library wave module).
        python3 - corpus/wav_load <<'PY'
import math, struct, sys, wave
for name, width, ch, rate in (("u8-stereo.wav", 1, 2, 11025), ("s16-stereo.wav", 2, 2, 11025)):
    with wave.open(f"{sys.argv[1]}/{name}", "wb") as w:
        w.setnchannels(ch); w.setsampwidth(width); w.setframerate(rate)
        frames = bytearray()
        for i in range(200):
            x = math.sin(2 * math.pi * 440 * i / rate)
            for _ in range(ch):
                frames += bytes([int(128 + 100 * x)]) if width == 1 else struct.pack("<h", int(20000 * x))
        w.writeframes(bytes(frames))
PY
    fi
    touch corpus/.wav_seeded
fi
