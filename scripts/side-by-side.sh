#!/usr/bin/env bash
# Every speed target of docs/performance.md beside its reference, in one run: the fit against
# scipy and a numpy importance sampler, the sweep against a vectorised numpy script, simulate
# against numpy.loadtxt, scipy.signal.lfilter and the formatting floor, and the demo report's
# wall time. Needs python3 with numpy and scipy (pip install numpy scipy). Prints the machine's
# load before and after: figures taken under load are not comparable with quiet ones.
set -euo pipefail
cd "$(dirname "${BASH_SOURCE[0]}")/.."

cargo build --release --bins --examples
echo "load before: $(uptime)"

echo "== fit (scripts/fit_side_by_side.py)"
python3 scripts/fit_side_by_side.py 200
echo "== sweep (scripts/sweep-vs-numpy.py)"
python3 scripts/sweep-vs-numpy.py --runs 3
echo "== simulate (scripts/simulate-vs-numpy.py)"
python3 scripts/simulate-vs-numpy.py --runs 3

echo "== the demo report (cistern report demo-regimens/p01.toml), wall time of 5 runs"
scratch="$(mktemp -d)"
trap 'rm -rf "$scratch"' EXIT
cp -R demo-regimens "$scratch/"
binary="$PWD/target/release/cistern"
TIMEFORMAT='%R s wall, %U s user, %S s system'
for _ in 1 2 3 4 5; do
    rm -f "$scratch/p01-report.pdf"
    time (cd "$scratch" && "$binary" report demo-regimens/p01.toml >/dev/null)
done

echo "load after: $(uptime)"
