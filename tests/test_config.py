"""The committed configuration stays in step with its schema, and bad keys fail before any job runs."""

import dataclasses
from pathlib import Path

import pytest
import yaml

from pipeline.config import compose_config, expand_sweep_overrides, validate
from pipeline.errors import InputError
from pipeline.models import MODEL_FAMILIES
from pipeline.train_loop import FitConfig

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "config"


def _defaults(cls) -> dict:
    return {f.name: (f.default if f.default is not dataclasses.MISSING else f.default_factory())
            for f in dataclasses.fields(cls)}


@pytest.mark.parametrize("family", sorted(MODEL_FAMILIES))
def test_model_group_file_matches_the_family_params(family):
    committed = yaml.safe_load((CONFIG / "model" / f"{family}.yaml").read_text())
    assert committed.pop("family") == family
    assert committed == _defaults(MODEL_FAMILIES[family].Params)


def test_fit_defaults_match_the_schema():
    committed = yaml.safe_load((CONFIG / "fit" / "adam_early_stop.yaml").read_text())
    assert committed == _defaults(FitConfig)


def test_default_config_composes_and_validates():
    cfg = compose_config([], REPO)
    validate(cfg)
    assert cfg.forecast.target == "pm25"
    assert cfg.selection.rule == "source-holdout"


@pytest.mark.parametrize("experiment", sorted(p.stem for p in (CONFIG / "experiment").glob("*.yaml")))
def test_every_shipped_experiment_composes_and_validates(experiment):
    validate(compose_config([f"experiment={experiment}"], REPO))


def test_unknown_key_fails_in_one_line():
    with pytest.raises(InputError) as caught:
        compose_config(["fit.max_stepz=3"], REPO)
    assert "\n" not in str(caught.value) and "max_stepz" in str(caught.value)


def test_wrong_type_fails_in_one_line():
    with pytest.raises(InputError):
        compose_config(["fit.max_steps=many"], REPO)


def test_unknown_model_hyperparameter_fails_at_validation():
    cfg = compose_config(["model=lstm", "+model.hidden_sizes=3"], REPO)
    with pytest.raises(InputError, match="hidden_sizes"):
        validate(cfg)


def test_sweep_syntax_becomes_sweep_lists():
    assert expand_sweep_overrides(["model=lstm,gru", "penalty=irm", "seed=0,1,2", "penalty.weight=100"]) == [
        "sweep.models=[lstm,gru]", "model=lstm", "sweep.penalties=[irm]", "penalty=irm",
        "sweep.seeds=[0,1,2]", "penalty.weight=100"]


def test_bad_selection_rule_is_rejected():
    with pytest.raises(InputError, match="selection"):
        validate(compose_config(["selection.rule=peek-at-target"], REPO))
