#!/usr/bin/env bash
# A short stateshift demo on a copy of the demo checkpoints: inspect, plan a conversion (dry run),
# convert, and verify the result against the source. The checkpoints in this folder are never
# written. Exits non-zero as soon as any step fails.
#
# Usage: demo_checkpoints/run_demo.sh
#   STATESHIFT="..."  command to run (default: the `stateshift` console script if installed,
#                     else "$PYTHON -m migrate" from this repository)
#   PYTHON=...        interpreter for the fallback (default: python3)
#   KEEP_DEMO_DIR=1   keep the temporary directory for a look afterwards
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
repo="$(dirname "$here")"

if [[ -n "${STATESHIFT:-}" ]]; then
    read -r -a tool <<<"$STATESHIFT"
elif command -v stateshift >/dev/null 2>&1; then
    tool=(stateshift)
else
    tool=("${PYTHON:-python3}" -m migrate)
    export PYTHONPATH="$repo${PYTHONPATH:+:$PYTHONPATH}"
fi

work="$(mktemp -d "${TMPDIR:-/tmp}/stateshift-demo.XXXXXX")"
cleanup() {
    if [[ -n "${KEEP_DEMO_DIR:-}" ]]; then
        echo "demo files kept in $work"
    else
        rm -rf "$work"
    fi
}
trap cleanup EXIT

# Copy the checkpoints (and the input files beside them) with every hidden checksum file.
cp -a "$here/." "$work/"
rm -f "$work/generate.py" "$work/run_demo.sh" "$work/README.md"

steps=0
summary=()

step() {  # step "description" command...
    local what="$1"
    shift
    steps=$((steps + 1))
    printf '\n=== [%d] %s\n$ %s\n' "$steps" "$what" "$*"
    local started=$SECONDS
    if ! "$@"; then
        printf '\nFAILED at step %d: %s\n' "$steps" "$what" >&2
        exit 1
    fi
    summary+=("ok  $(printf '%-72s' "$what") $((SECONDS - started))s")
}

expect_absent() {  # expect_absent PATH : fails if a dry run left anything behind
    if [[ -e "$1" ]]; then
        echo "dry run created $1" >&2
        return 1
    fi
}

tree_hash() {  # tree_hash DIR : one hash over every file's path and bytes
    (cd "$1" && find . -type f -print0 | LC_ALL=C sort -z | xargs -0 sha256sum | sha256sum)
}

# hdfs -> rocksdb for each HDFS-backed demo checkpoint, then one rocksdb -> hdfs.
pairs=(
    "greenhouse_totals_hdfs:rocksdb"
    "sensor_pings_dedup_hdfs:rocksdb"
    "greenhouse_totals_rocksdb:hdfs"
)

for pair in "${pairs[@]}"; do
    name="${pair%%:*}"
    to="${pair##*:}"
    src="$work/$name"
    dst="$work/${name}_as_${to}"
    before="$(tree_hash "$src")"

    step "inspect $name" "${tool[@]}" inspect "$src"
    step "convert $name --to $to --dry-run" "${tool[@]}" convert "$src" "$dst" --to "$to" --dry-run
    step "dry run of $name left no target" expect_absent "$dst"
    step "convert $name --to $to" "${tool[@]}" convert "$src" "$dst" --to "$to"
    step "inspect ${name}_as_${to}" "${tool[@]}" inspect "$dst"
    step "verify $name against ${name}_as_${to}" "${tool[@]}" verify "$src" "$dst"
    step "source $name unchanged" test "$before" = "$(tree_hash "$src")"
done

printf '\n=== summary (%s)\n' "${tool[*]}"
printf '%s\n' "${summary[@]}"
printf '%d steps passed\n' "$steps"
