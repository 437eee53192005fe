#!/usr/bin/env bash
# Are the outputs of this tree identical to those of an earlier commit?
#
#   bash benchmarks/same_outputs.sh REV        # e.g. fb2d8ae, the last commit before the subpackages
#
# Runs `slicefind demo`, `slicefind demo --text` and both walk-throughs in demo/ once with the
# earlier commit (a git worktree on PYTHONPATH, the same venv) and once with this tree, then
# compares every CSV written, the reports (without their "written" time stamp) and the printed
# output (without timings and folder names). Prints "same" or the differences; exit 1 on any.
set -euo pipefail
rev=${1:?usage: bash benchmarks/same_outputs.sh REV}
here=$(cd "$(dirname "$0")/.." && pwd)
work=$(mktemp -d)
git -C "$here" worktree add -q --detach "$work/old" "$rev"
trap 'git -C "$here" worktree remove --force "$work/old"; rm -rf "$work"' EXIT
run() {  # run ROOT OUT [PYTHONPATH]
  local root=$1 out=$2; mkdir -p "$out"
  (cd "$out" && export PYTHONPATH=${3:-}
   python -m slicefind.cli demo --out depot > depot.out 2>&1
   python -m slicefind.cli demo --text --out desk > desk.out 2>&1
   python "$root/demo/depot_walkthrough.py" --out wt > wt.out 2>&1
   if [ -f "$root/demo/randhie_walkthrough.py" ]; then python "$root/demo/randhie_walkthrough.py" --out rh > rh.out 2>&1; fi
   for f in *.out; do sed -E "s/[0-9]+\.[0-9] s\$/T s/; s/finished in [0-9.]+ s/finished in T s/; s#$out/##g" "$f" > "$f.norm"; rm "$f"; done
   find . -name report.html -exec sed -i -E 's/written [0-9-]+ [0-9:]+//' {} +
   find . -name "*.sqlite*" -delete; find . -name "*.npy" -delete)
}
run "$work/old" "$work/before" "$work/old"
run "$here" "$work/after"
if diff -r "$work/before" "$work/after"; then echo "same: demo, demo --text and the walk-throughs match $rev"; else exit 1; fi
