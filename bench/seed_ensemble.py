"""Seeds together against one after the other: all seeds of a fit as one ensemble (pipeline.ensemble)
against train_network once per seed, side by side (never pass/fail).

    .venv/bin/python bench/seed_ensemble.py [--seeds 8] [--steps 150] [--rounds 2] [--validation-windows all]

Invented windows shaped like one leave-one-city-out split of the demo (bench/demo_shapes.py), the
project's fit defaults (batch 128, evaluation of both validation sets every 25 steps, thinned as
`fit.validation_windows` says: non_overlapping by default, `--validation-windows all` for every window) and the shipped
IRMv1 penalty (weight 100 after a 100-step warm-up), early stopping out of reach. For the `linear` and
`mlp` families (defaults: no dropout), the figure is the sequential wall time over the ensemble's; goal
>= 1.5 at 8 seeds. Each round also checks that every seed's weights come out bit-identical both ways.
Rounds alternate the two ways so both see the same machine load; the figure takes the fastest of each,
in CPU seconds of the benchmark's thread (single-threaded torch: the wall time on a quiet machine).
"""

from __future__ import annotations

import argparse
import os
import time

import torch

from demo_shapes import demo_split, network_builder  # bench/ is on the path of its scripts

from pipeline.ensemble import train_ensemble  # noqa: E402
from pipeline.fit_config import FitConfig  # noqa: E402
from pipeline.penalties import build_penalty  # noqa: E402
from pipeline.train_loop import train_network  # noqa: E402


def timed(fit) -> tuple[float, list]:
    """(CPU seconds of this thread, result): other processes on a shared machine do not stretch either way."""
    started = time.thread_time()
    networks = fit()
    return time.thread_time() - started, networks


def identical(first: list[torch.nn.Module], second: list[torch.nn.Module]) -> bool:
    return all(torch.equal(a, b) for n1, n2 in zip(first, second)
               for a, b in zip(n1.state_dict().values(), n2.state_dict().values()))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=8)
    parser.add_argument("--steps", type=int, default=150, help="optimizer steps per fit (fit.max_steps)")
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--validation-windows", default="non_overlapping", choices=["non_overlapping", "all"])
    args = parser.parse_args()
    torch.set_num_threads(1)
    train, val = demo_split(args.validation_windows)
    seeds = list(range(args.seeds))
    cfg = FitConfig(max_steps=args.steps, patience=10**6, threads=1)
    print(f"cores: {os.cpu_count()}, load average: {' '.join(f'{x:.1f}' for x in os.getloadavg())}, "
          f"torch threads 1, {args.seeds} seeds x {args.steps} steps, irm, best of {args.rounds} alternating rounds; "
          f"validation windows {len(val['source'].y)} + {len(val['target'].y)} ({args.validation_windows})")
    print(f"{'family':<8} {'one by one s':>12} {'together s':>10} {'speed-up':>8}  bit-identical  (CPU seconds)")
    for family in ("linear", "mlp"):
        build = network_builder(family)
        train_network(build, train, val, fit_config=FitConfig(max_steps=2))  # first optimizer imports dynamo

        def penalty():
            return build_penalty("irm", 100.0, 100)

        sequential = together = float("inf")
        same = True
        for _ in range(args.rounds):
            seconds, one_by_one = timed(lambda: [train_network(build, train, val, penalty(), cfg, seed=s)[0]
                                                 for s in seeds])
            sequential = min(sequential, seconds)
            seconds, ensemble = timed(lambda: [n for n, _ in train_ensemble(build, train, val, penalty(), cfg, seeds)])
            together = min(together, seconds)
            same = same and identical(one_by_one, ensemble)
        print(f"{family:<8} {sequential:>12.2f} {together:>10.2f} {sequential / together:>8.2f}  "
              f"{'yes' if same else 'NO'}")
    print("goal: speed-up >= 1.5 at 8 seeds, every seed bit-identical")


if __name__ == "__main__":
    main()
