#!/usr/bin/env bash
# Extraction throughput, tamis against a Python pipeline (standard `email` package plus
# scikit-learn's HashingVectorizer), on the same messages in the same sitting.
#
# Usage: benches/compare.sh [COUNT]        (run from anywhere; COUNT defaults to 2000)
# Environment: TAMIS_PYTHON  interpreter with scikit-learn (default ./.venv/bin/python,
#                            created with `python3 -m venv .venv` when missing)
#              PASSES        timed passes for each side (default 5 for tamis, 3 for Python)
#
# The corpus is the invented demo corpus: it stands in for the size and MIME variety of real
# mail. Figures are for this machine only; rerun both sides together when comparing.
set -euo pipefail

cd "$(dirname "$0")/.."
count="${1:-2000}"
out=bench-out
corpus="$out/corpus"

cargo build --release --quiet --bin tamis --example extract_throughput

python="${TAMIS_PYTHON:-./.venv/bin/python}"
if [ ! -x "$python" ]; then
    if [ -n "${TAMIS_PYTHON:-}" ]; then
        echo "compare.sh: TAMIS_PYTHON=$TAMIS_PYTHON is not executable" >&2
        exit 2
    fi
    echo "compare.sh: creating .venv with scikit-learn" >&2
    python3 -m venv .venv
    .venv/bin/pip install --quiet scikit-learn
    python=./.venv/bin/python
fi

rm -rf "$corpus"
mkdir -p "$out"
target/release/tamis corpus --out "$corpus" --count "$count" >"$out/corpus-summary.txt"

rust_line="$(target/release/examples/extract_throughput "$corpus" "${PASSES:-5}")"
python_line="$("$python" benches/python_baseline.py "$corpus" "${PASSES:-3}")"

echo "$rust_line"
echo "$python_line"
{
    echo "$rust_line"
    echo "$python_line"
} >"$out/compare.jsonl"

"$python" - "$rust_line" "$python_line" <<'PY'
import json, sys
rust, py = (json.loads(a) for a in sys.argv[1:3])
print(f"ratio tamis/python: {rust['mb_per_s'] / py['mb_per_s']:.1f}x MB/s, "
      f"{rust['msgs_per_s'] / py['msgs_per_s']:.1f}x msgs/s "
      f"({rust['messages']} messages, {rust['bytes'] / 1e6:.1f} MB)")
PY
