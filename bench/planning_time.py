"""Planning time: what every Snakemake process (and `shiftgrid status`) pays to parse the Snakefile.

    .venv/bin/python bench/planning_time.py [--experiment full] [--rounds 3]

In a temporary project copy (tests/project_copy.py, so the plan cache is written there), each round runs,
in this order and each in a fresh Python process (as Snakemake starts one):

- cold: pipeline.workflow.plan_workflow with the plan cache off (imports excluded, as they are paid
  anyway; printed apart);
- cached: the same call with the cache filled by an earlier call;
- reference: one Hydra composition per model and per model x penalty pair, the way the plan composed
  before pipeline.config_variants.VariantComposer (compositions only: no splits, no digests).

Best of --rounds for each. Goals (issue): cold <= 3 s, cached <= 1 s; the reference is printed beside
cold as a ratio measured in the same run. Never fails on timings.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

REPO = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(REPO / "tests"))

# Each snippet prints one JSON line: {"seconds": ..., "imports": ...}; PLAN is a str.format template.
PLAN = """
import json, sys, time
started = time.perf_counter()
from pipeline.workflow import plan_workflow
import pipeline.config
imported = time.perf_counter()
plan = plan_workflow(sys.argv[2:], sys.argv[1], cache={cache})
print(json.dumps({{"seconds": time.perf_counter() - imported, "imports": imported - started,
                  "jobs": len(plan.jobs)}}))
"""
REFERENCE = """
import json, sys, time
started = time.perf_counter()
from pipeline.config import compose_config, expand_sweep_overrides
from pipeline.workflow import _is_trainable
from pipeline.canonical import to_container
imported = time.perf_counter()
root, overrides = sys.argv[1], expand_sweep_overrides(sys.argv[2:])
cfg = compose_config(overrides, root)
count = 1
for model in cfg.sweep.models:
    model_cfg = compose_config([*overrides, f"model={model}"], root)
    count += 1
    if _is_trainable(to_container(model_cfg.model)):
        for penalty in cfg.sweep.penalties:
            compose_config([*overrides, f"model={model}", f"penalty={penalty}"], root)
            count += 1
print(json.dumps({"seconds": time.perf_counter() - imported, "imports": imported - started,
                  "compositions": count}))
"""


def measure(snippet: str, project: Path, overrides: list[str]) -> dict:
    done = subprocess.run([sys.executable, "-c", snippet, str(project), *overrides], cwd=project,
                          capture_output=True, text=True, timeout=900,
                          env={**os.environ, "PYTHONPATH": str(REPO)})
    if done.returncode != 0:
        raise SystemExit(done.stderr[-3000:])
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--experiment", default="full")
    parser.add_argument("--rounds", type=int, default=3)
    args = parser.parse_args()
    overrides = [f"experiment={args.experiment}"]
    print(f"machine: {os.cpu_count()} cores, load {os.getloadavg()[0]:.1f}", flush=True)
    with tempfile.TemporaryDirectory() as scratch:
        from project_copy import make_project

        project = make_project(Path(scratch) / "project")
        measure(PLAN.format(cache=True), project, overrides)  # fills the plan cache
        best: dict[str, dict] = {}
        for _ in range(args.rounds):
            for side, snippet in (("cold", PLAN.format(cache=False)), ("cached", PLAN.format(cache=True)),
                                  ("reference", REFERENCE)):
                result = measure(snippet, project, overrides)
                if side not in best or result["seconds"] < best[side]["seconds"]:
                    best[side] = result
    cold, cached, reference = best["cold"], best["cached"], best["reference"]
    print(f"experiment={args.experiment}: {cold['jobs']} training jobs; best of {args.rounds}, imports apart")
    print(f"  plan, cold:   {cold['seconds']:6.2f} s  (imports {cold['imports']:.2f} s)   goal: <= 3 s")
    print(f"  plan, cached: {cached['seconds']:6.2f} s  (imports {cached['imports']:.2f} s)   goal: <= 1 s")
    print(f"  reference, one Hydra composition per model and pair ({reference['compositions']}): "
          f"{reference['seconds']:.2f} s; the cold plan takes {cold['seconds'] / reference['seconds']:.2f} x that")


if __name__ == "__main__":
    main()
