#!/usr/bin/env bash
# The figures of docs/falsify.md ("What it found"): run from an empty folder with coreach installed.
# 1. the planted weakness: the default recipe on demonstrations with the drawer knob under-sampled 10:1, searched in
#    a gentle space (falsify-gentle.yaml) by TPE and by random search, 5 search seeds, batches of 50;
# 2. the default recipe, 3 training seeds, 2,000 scenarios each in the shipped space (conf/falsify/bedside_shelf.yaml).
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
run_id() { python3 -c "import json,sys; print(json.load(open(sys.argv[1]))['runs'][0]['run_id'])" "$1"; }

coreach --json train +experiment=cvae_goal_entropy seed=0 "dataset.goal_weights=[1,1,1,0.1]" dataset.min_arrival=0.9 \
    label=planted-knob-10to1 > planted.json
planted=$(run_id planted.json)
for suite in nominal goal-switch held-out; do
    coreach --json vet "candidates=[$planted]" suite=$suite log=false report_dir=vet-planted-$suite > vet-planted-$suite.json
done
for seed in 0 1 2 3 4; do
    coreach --json falsify decoder="$planted" falsify="$here/falsify-gentle.yaml" budget=300 batch=50 seed=$seed \
        log=false report_dir=planted-$seed > planted-$seed.json
done

for seed in 0 1 2; do
    coreach --json train +experiment=cvae_goal_entropy seed=$seed > default-$seed.json
    coreach --json falsify decoder="$(run_id default-$seed.json)" budget=2000 batch=100 log=false \
        report_dir=default-$seed-search > default-$seed-search.json
done
python3 - <<'PY'
import json
print("planted weakness: evaluations to the first failure (and failures in 300), per search seed")
for seed in range(5):
    s = json.load(open(f"planted-{seed}.json"))["searches"]
    print(seed, {k: (v["first_failure"], v["failures"]) for k, v in s.items()})
print("default recipe, 2,000 scenarios per search")
for seed in range(3):
    d = json.load(open(f"default-{seed}-search.json"))
    print(seed, {k: (v["failures"], round(v["lowest_robustness"], 3), v["worst_cause"]) for k, v in d["searches"].items()},
          d["worst"]["case"], d["scenarios_per_minute"])
PY
