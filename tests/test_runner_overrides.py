"""Overrides reach the Snakefile exactly as typed, brackets and quotes included (Snakemake's own parser)."""

import json
import subprocess

from pipeline.runner import snakemake_command
from pipeline.workflow import parse_overrides


def test_overrides_with_brackets_and_quotes_arrive_unchanged(tmp_path):
    # A stand-in Snakefile that prints what Snakemake hands over as config["overrides"].
    (tmp_path / "Snakefile").write_text('import json\nprint("OVERRIDES", json.dumps(config.get("overrides")))\n'
                                        'rule all:\n    shell: "true"\n')
    (tmp_path / "profile").mkdir()
    (tmp_path / "profile" / "config.yaml").write_text("cores: 1\n")
    typed = ["split.cities=[a,b]", "experiment=tiny", "report.title='it''s a test'", "model=lstm,gru"]
    command = snakemake_command(typed, root=tmp_path, profile=str(tmp_path / "profile"), extra=["-n"])
    done = subprocess.run(command, cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    line = next(text for text in done.stdout.splitlines() if text.startswith("OVERRIDES "))
    received = json.loads(line.split(" ", 1)[1])
    assert received == typed
    assert parse_overrides(received) == typed


def test_run_hands_every_snakemake_argument_on_in_order():
    """Options that start with "-" reach Snakemake one per --snakemake flag, in the order given."""
    import argparse

    from pipeline.commands import run

    parser = argparse.ArgumentParser()
    run.add_arguments(parser)
    args = parser.parse_args(["experiment=demo", "--snakemake=--forcerun", "--snakemake=results/a.json",
                              "--snakemake=-n"])
    assert args.overrides == ["experiment=demo"]
    assert args.snakemake == ["--forcerun", "results/a.json", "-n"]
