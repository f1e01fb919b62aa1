"""Windows per second of the project's training loop against a bare PyTorch loop, side by side (never pass/fail).

    .venv/bin/python bench/trainer_vs_bare_torch.py [--steps 150] [--rounds 3] [--penalty-rounds 10]
        [--families linear lstm transformer] [--validation-windows non_overlapping|all]

Invented windows shaped like one leave-one-city-out split of the demo (bench/demo_shapes.py). Per family:

- trainer: pipeline.train_loop.train_network with the project's fit defaults (batch 128, Adam, gradient
  clipping, evaluation of both validation sets every 25 steps, snapshots; the validation sets as a training
  job hands them to the loop under `fit.validation_windows`, non_overlapping by default) and an ERM penalty with the
  shipped warm-up (100 steps), early stopping out of reach so both sides take the same steps; its time is
  the whole fit, evaluations included;
- bare: the same network, batch size, optimizer and clipping in a hand-written loop (random batch, forward,
  MSE, backward, step) that evaluates nothing.

Figures: trainer windows per CPU second over bare windows per CPU second (goal >= 0.8), the share of the trainer's time spent on
evaluations (goal < 20 %), and the time of one step of each penalty over an ERM step (goal <= 1.15; no
validation sets, penalties active from step 0, steps / 3 per fit, `--penalty-rounds` rounds over the
four penalties in turn). Both sides are timed in CPU seconds of the benchmark's thread (single-threaded
torch: the wall time on a quiet machine), so that other processes on a shared machine do not stretch one
side's steps; the evaluation share is the fit's own wall-clock split. Rounds alternate the sides so both see the same machine load; each figure takes
the fastest round. Single-threaded torch on both sides, as
the training jobs run.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
import torch

from demo_shapes import demo_split, network_builder  # noqa: E402 (bench/ is on the path of its scripts)

from pipeline.fit_config import FitConfig  # noqa: E402
from pipeline.penalties import build_penalty  # noqa: E402
from pipeline.train_loop import make_optimizer, train_network  # noqa: E402

WARMUP = 100  # the shipped penalties' warm-up (config/penalty/*.yaml)
PENALTIES = {"irm": 100.0, "vrex": 10.0, "groupdro": 1.0}  # shipped weights


def trainer_fit(build, train, val, cfg: FitConfig, penalty) -> tuple[float, float, int]:
    """(CPU seconds, share of the fit's wall time spent evaluating, windows trained on) of one fit of the
    project's loop."""
    started = time.thread_time()
    _, result = train_network(build, train, val=val, penalty=penalty, fit_config=cfg, seed=0)
    per_step = (cfg.batch_size // len(train.env_names)) * len(train.env_names)
    return time.thread_time() - started, result.eval_seconds / result.fit_seconds, result.final_step * per_step


def bare_fit(build, train, cfg: FitConfig) -> tuple[float, int]:
    """(CPU seconds, windows trained on) of a hand-written loop with the same network, batch and optimizer."""
    started = time.thread_time()
    torch.manual_seed(0)
    network = build()
    optimizer = make_optimizer(network, cfg)
    X, y = torch.from_numpy(train.X), torch.from_numpy(train.y)
    generator = torch.Generator().manual_seed(0)
    network.train()
    for _ in range(cfg.max_steps):
        index = torch.randint(len(X), (cfg.batch_size,), generator=generator)
        loss = torch.nn.functional.mse_loss(network(X[index]), y[index])
        optimizer.zero_grad(set_to_none=True)
        loss.backward()
        torch.nn.utils.clip_grad_norm_(network.parameters(), cfg.grad_clip)
        optimizer.step()
    return time.thread_time() - started, cfg.max_steps * cfg.batch_size


def measure_family(family: str, steps: int, rounds: int, penalty_rounds: int, train, val) -> dict[str, float]:
    build = network_builder(family)
    cfg = FitConfig(max_steps=steps, patience=10**6, threads=1)
    # Warm-up: the first optimizer of a process imports torch._dynamo (seconds, once); neither side pays it.
    trainer_fit(build, train, val, FitConfig(max_steps=2, threads=1), build_penalty("erm"))
    trainer, bare, eval_share = 0.0, 0.0, 1.0
    for _ in range(rounds):  # alternate the sides: both see the same load
        seconds, share, windows = trainer_fit(build, train, val, cfg, build_penalty("erm", 0.0, WARMUP))
        trainer, eval_share = max(trainer, windows / seconds), min(eval_share, share)
        seconds, windows = bare_fit(build, train, cfg)
        bare = max(bare, windows / seconds)
    step_seconds = {}
    penalty_cfg = FitConfig(max_steps=steps // 3, patience=10**6, threads=1, eval_every=steps)
    for _ in range(penalty_rounds):
        for name, weight in {"erm": 0.0, **PENALTIES}.items():
            seconds, _, _ = trainer_fit(build, train, {}, penalty_cfg, build_penalty(name, weight, 0))
            step_seconds[name] = min(step_seconds.get(name, np.inf), seconds / penalty_cfg.max_steps)
    figures = {"trainer": trainer, "bare": bare, "eval_share": eval_share}
    figures.update({name: step_seconds[name] / step_seconds["erm"] for name in PENALTIES})
    return figures


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--steps", type=int, default=150, help="optimizer steps per fit (fit.max_steps)")
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--penalty-rounds", type=int, default=10, help="rounds of the penalty step timing")
    parser.add_argument("--families", nargs="*", default=["linear", "lstm", "transformer"])
    parser.add_argument("--validation-windows", default="non_overlapping", choices=["non_overlapping", "all"],
                        help="fit.validation_windows: the validation sets the trainer evaluates")
    args = parser.parse_args()
    torch.set_num_threads(1)
    train, val = demo_split(args.validation_windows)
    print(f"cores: {os.cpu_count()}, load average: {' '.join(f'{x:.1f}' for x in os.getloadavg())}, "
          f"torch threads 1, {args.steps} steps, best of {args.rounds} alternating rounds "
          f"({args.penalty_rounds} for the penalty steps); windows {len(train.y)} train, "
          f"{len(val['source'].y)} + {len(val['target'].y)} validation ({args.validation_windows})")
    print(f"{'family':<12} {'trainer w/s':>11} {'bare w/s':>9} {'ratio':>6}  {'eval share':>10}  "
          + "  ".join(f"{name + '/erm':>12}" for name in PENALTIES))
    for family in args.families:
        f = measure_family(family, args.steps, args.rounds, args.penalty_rounds, train, val)
        print(f"{family:<12} {f['trainer']:>11.0f} {f['bare']:>9.0f} {f['trainer'] / f['bare']:>6.2f}  "
              f"{f['eval_share']:>10.1%}  " + "  ".join(f"{f[name]:>12.2f}" for name in PENALTIES))
    print("w/s: windows per CPU second of the benchmark's thread")
    print("goals: ratio >= 0.80 (trainer windows/s over bare, evaluations included); eval share < 20 %; "
          "each penalty step <= 1.15 x an ERM step")


if __name__ == "__main__":
    main()
