"""pipeline.config_variants.VariantComposer gives each model (x penalty) exactly the configuration Hydra composes.

Hydra is the reference: every shipped experiment (and none), every shipped model and every shipped
penalty, compared as plain data with a real Hydra composition of the same overrides. The model node and
the penalty node depend on their own group choice only, so every model (with one penalty, and with none)
and every penalty (with one model) covers every pair.
"""

from pathlib import Path

import pytest

from pipeline.canonical import to_container
from pipeline.config import compose_config, expand_sweep_overrides
from pipeline.config_variants import VariantComposer
from pipeline.errors import InputError

REPO = Path(__file__).resolve().parents[1]
EXPERIMENTS = [None, *sorted(p.stem for p in (REPO / "config" / "experiment").glob("*.yaml"))]
MODELS = sorted(p.stem for p in (REPO / "config" / "model").glob("*.yaml"))
PENALTIES = sorted(p.stem for p in (REPO / "config" / "penalty").glob("*.yaml"))


def outcome(compose):
    """The composed config as data, or the one-line error it raised."""
    try:
        return to_container(compose())
    except InputError as error:
        return f"InputError: {error}"


def assert_same_as_hydra(overrides: list[str], choices: list[tuple[str, str | None]]) -> VariantComposer:
    overrides = expand_sweep_overrides(overrides)
    variants = VariantComposer(overrides, REPO)
    assert to_container(variants.base) == to_container(compose_config(overrides, REPO))
    for model, penalty in choices:
        hydra = [*overrides, f"model={model}", *([f"penalty={penalty}"] if penalty else [])]
        derived = outcome(lambda: variants.compose(model, penalty))
        assert derived == outcome(lambda: compose_config(hydra, REPO)), (model, penalty)
    return variants


@pytest.mark.parametrize("experiment", EXPERIMENTS)
def test_every_shipped_model_and_penalty_equals_hydra(experiment):
    choices = [(model, None) for model in MODELS] + [(model, PENALTIES[0]) for model in MODELS]
    choices += [("linear", penalty) for penalty in PENALTIES]
    variants = assert_same_as_hydra([f"experiment={experiment}"] if experiment else [], choices)
    assert variants.later_layers is not None  # derived, not composed again by Hydra


@pytest.mark.parametrize("overrides", [
    ["experiment=tiny", "model.level=revin", "penalty.weight=7", "fit.max_steps=5"],  # values of group keys
    ["model=gru", "model.hidden=8"],  # a key some models lack: Hydra refuses it for those, so must we
    ["penalty=irm", "penalty.extra.estimator=squared"],  # a key of one penalty's extra only
    ["+model.unknown_key=1"],  # appended keys: composed by Hydra (it checks them against each file)
    ["experiment=demo", "model.level=$" + "{model.family}"],  # an interpolation resolves in each variant
])
def test_command_line_overrides_of_group_keys_equal_hydra(overrides):
    choices = [(model, "irm") for model in MODELS] + [("lstm", penalty) for penalty in PENALTIES]
    assert_same_as_hydra(overrides, choices)


def test_the_plan_composes_twice_whatever_the_number_of_pairs(monkeypatch):
    """experiment=full: 9 models, 6 of them x 4 penalties; Hydra used to compose 34 times."""
    import pipeline.config
    from pipeline.workflow import compose_plan

    calls = []
    composed = pipeline.config.compose
    monkeypatch.setattr(pipeline.config, "compose", lambda **kw: calls.append(kw) or composed(**kw))
    plan = compose_plan(["experiment=full"], REPO)
    assert len(calls) == 2
    assert len(plan.trainable_models) * len(plan.cfg.sweep.penalties) > 2
