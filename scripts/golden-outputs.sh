#!/usr/bin/env bash
# Runs the documented commands on the demo files and writes every output (stdout, stderr, exit
# code, files) under OUT_DIR, so that two builds can be compared byte for byte:
#   scripts/golden-outputs.sh BIN OUT_DIR
# The architecture refactor was checked with it (diff -r of the two directories).
set -u
src_bin="$(cd "$(dirname "$1")" && pwd)/$(basename "$1")"
out="$2"
root="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
rm -rf "$out"; mkdir -p "$out"
out="$(cd "$out" && pwd)"
work="$(mktemp -d)"
cp -R "$root/demo-regimens" "$work/"
cd "$work"
# The report prints the command line: run the binary from one fixed relative path.
cp "$src_bin" ./cistern
bin=./cistern
export SOURCE_DATE_EPOCH=1700000000
d=demo-regimens
n=0
run() {
    n=$((n + 1))
    local tag; tag=$(printf '%02d' "$n")
    "$bin" "$@" >"$out/$tag.stdout" 2>"$out/$tag.stderr"
    echo "$?" >"$out/$tag.code"
    printf '%s\n' "$*" >"$out/$tag.cmd"
}
run simulate --dose 1g --route infusion --duration 1h --every 12h --count 6 --cl 4.2 --v 48 --times 0:72h:30min --format csv
run simulate --doses $d/doses.csv --cl 70ml/min --v 48l --ka 1.1 --f 0.8 --at 1,6,11.5 --format json
run simulate --dose 1g --route infusion --duration 1h --every 12h --count 6 --cl 4.2 --v 48 --times 0:72h:1h --format table -o sim.csv --svg sim.svg
run exposure --dose 1g --every 12h --route infusion --duration 1h --cl 4.2 --v 48 --format table
run exposure --dose 500mg --every 8h --route oral --ka 1.1 --f 0.8 --k 0.0875/h --v 48l --format json
run fit --model $d/model.toml --doses $d/doses.csv --levels $d/levels.csv --covariates $d/covariates.csv --format table
run fit --model $d/model.toml --doses $d/doses.csv --levels $d/levels.csv --covariates $d/covariates.csv --format json
run fit --model $d/model.toml --doses $d/doses.csv --levels $d/levels.csv --covariates $d/covariates.csv --format csv --method wls
run fit --model $d/model.toml --doses $d/doses.csv --levels $d/levels.csv --covariates $d/covariates.csv --format json --keep-draws 500 -o fit.json
run plan --model $d/model.toml --doses $d/doses.csv --levels $d/levels.csv --covariates $d/covariates.csv --subject P01 --target auc24=400..600 --target trough=..15 --amounts 500..2000/250 --every 8h,12h,24h --durations 1h --max-dose 2g --format table
run plan --model $d/model.toml --doses $d/doses.csv --levels $d/levels.csv --covariates $d/covariates.csv --subject P01 --target auc24=400..600 --target trough=..15 --amounts 500..2000/250 --every 8h,12h,24h --durations 1h --max-dose 2g --format json
run plan --case $d/p01.toml --format json
run plan --fit fit.json --doses $d/doses.csv --subject P02 --target trough=10..20 --amounts 500..1500/250 --every 12h --max-rate 10mg/min --format csv
run sweep --case $d/p01.toml --subjects 500 --format csv
run sweep --case $d/p01.toml --subjects 500 --format table
run sweep --case $d/p01.toml --subjects 500 --shard 1/2 -o s1.json --per-subject r1.csv
run sweep --case $d/p01.toml --subjects 500 --shard 2/2 -o s2.json --per-subject r2.csv
run merge s1.json s2.json --format csv
run check $d/doses.csv $d/doses-with-mistakes.csv
run check $d/model.toml $d/levels.csv $d/covariates.csv
run verify --format csv
run report $d/p01.toml -o p01.pdf --svg p01.svg
run report $d/p01.toml --subject P02 -o p02.pdf
run fit --model $d/model.toml --doses $d/doses-with-mistakes.csv --levels $d/levels.csv
run plan --case $d/p01.toml --max-dose -2.5g
run exposure --dose 1g --every -12h --cl 4 --v 40 --duration 1h
for f in sim.csv sim.svg fit.json s1.json s2.json r1.csv r2.csv p01.pdf p01.svg p02.pdf; do
    [ -f "$f" ] && cp "$f" "$out/file-$f"
done
rm -rf "$work"
