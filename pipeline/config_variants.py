"""The configuration of every sweep model x penalty from two Hydra compositions instead of one each.

Reads the group files under `config/model/` and `config/penalty/` and composes through
pipeline.config.compose_config; writes nothing but two probe options into Hydra's ConfigStore (in this
process). Config keys: every key of the `model` and `penalty` groups, and the command-line overrides.
Planning `experiment=full` composed 30 times (one per model and per model x penalty, 0.2-0.8 s each);
bench/planning_time.py measures both ways.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from hydra.core.config_store import ConfigStore
from omegaconf import DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException

from pipeline.config import PenaltyConfig, RootConfig, compose_config, config_dir
from pipeline.errors import InputError

PROBE = "_shiftgrid_probe"  # name of the probe options of the model and penalty groups (ConfigStore)
# A probe option sets every key a group file sets to a value no file or override uses, so that after
# composition a key still at its probe value was set by no later layer. (MISSING would not do: a merge
# keeps the value below a MISSING one, so the schema's defaults would show through.)
_PROBE_SCALARS = {"weight": -1.0e308, "warmup_steps": -(2 ** 62)}  # typed keys of PenaltyConfig
# Groups whose option changes per job; every other group is the same for every model x penalty.
VARIANT_GROUPS = ("model", "penalty")
_VARIANT_SCHEMA = {"model": lambda: OmegaConf.create(RootConfig().model),
                   "penalty": lambda: OmegaConf.structured(PenaltyConfig)}


class VariantComposer:
    """The configuration of each sweep model (x penalty) without one Hydra composition each.

    Hydra builds the `model` node as: the schema's default, then the chosen model/<name>.yaml, then the
    layers after it in the defaults list (config.yaml's own keys, the experiment file), then the
    command-line `model.*` overrides; no other node depends on the choice. So two compositions serve every
    variant: the base one, and one with the probe options (PROBE), whose `model` and `penalty` nodes,
    less the keys still at their probe value, hold exactly what the later layers set. A variant is the
    base with `model` = merge(schema default, group file, those layers), likewise `penalty`. Where that is
    not provably what Hydra does (a group file with its own defaults list or @package header, a `+`/`~`
    override of a model or penalty key, which Hydra checks against the group file's keys), or any error,
    the variant is composed by Hydra itself. tests/test_variant_composer.py checks equality for every
    shipped experiment, model and penalty.
    """

    def __init__(self, overrides: list[str], root: Path | str = "."):
        self.overrides, self.root = list(overrides), Path(root)
        self.base = compose_config(self.overrides, root)
        self._groups: dict[tuple[str, str], Any] = {}  # (group, option) -> its file's node, None: use Hydra
        self.later_layers = None if self._edits_group_keys() else self._later_layers()

    def _probe_values(self, group: str) -> dict:
        """The probe option of a group: every key (and key of `extra`) its files set, at a probe value."""
        keys, extra = {"family"} if group == "model" else set(_VARIANT_SCHEMA[group]()), set()
        for path in sorted((config_dir(self.root) / group).glob("*.yaml")):
            node = self._group_file(group, path.stem)
            if node is not None:
                keys |= set(node)
                extra |= set(node.get("extra") or {}) if group == "penalty" else set()
        values = {key: _PROBE_SCALARS.get(key, PROBE) for key in keys}
        return {**values, "extra": {key: PROBE for key in extra}} if group == "penalty" else values

    def _later_layers(self) -> dict | None:
        """group -> what the layers after its group file set in its node (a composition with the probes);
        None when that composition fails (a variant is then composed by Hydra, with Hydra's message)."""
        probes = {group: self._probe_values(group) for group in VARIANT_GROUPS}
        for group, values in probes.items():
            ConfigStore.instance().store(group=group, name=PROBE, node=values)
        try:
            probe = compose_config([*self.overrides, *(f"{group}={PROBE}" for group in VARIANT_GROUPS)], self.root)
        except InputError:
            return None
        return {group: OmegaConf.create(_unset_removed(OmegaConf.to_container(probe[group], resolve=False),
                                                       probes[group]))  # interpolations resolve in the variant
                for group in VARIANT_GROUPS}

    def _overridden_keys_exist(self, group: str, node) -> bool:
        """Hydra refuses a command-line `group.key=value` whose key the chosen file lacks: so must we."""
        for item in self.overrides:
            key = item.partition("=")[0]
            head, _, path = key.partition(".")
            if head == group and path and OmegaConf.select(node, path, default=_ABSENT) is _ABSENT:
                return False
        return True

    def _edits_group_keys(self) -> bool:
        keys = [item.partition("=")[0] for item in self.overrides]
        return any(key[:1] in "+~" and key.lstrip("+~").partition(".")[0].partition("@")[0] in VARIANT_GROUPS
                   for key in keys)

    def _group_file(self, group: str, option: str):
        """The group option's YAML as Hydra reads it, or None when Hydra would do more than merge it."""
        if (group, option) not in self._groups:
            path = config_dir(self.root) / group / f"{option}.yaml"
            node = None
            if path.is_file():
                text = path.read_text(encoding="utf-8")
                loaded = OmegaConf.load(path)
                if "@package" not in text[:512] and isinstance(loaded, DictConfig) and "defaults" not in loaded:
                    node = loaded
            self._groups[(group, option)] = node
        return self._groups[(group, option)]

    def compose(self, model: str, penalty: str | None = None) -> DictConfig:
        """The configuration of `model=<model>` (and `penalty=<penalty>`) on top of the overrides."""
        choices = {"model": model, **({"penalty": penalty} if penalty is not None else {})}
        hydra_overrides = [*self.overrides, *(f"{group}={option}" for group, option in choices.items())]
        files = {group: self._group_file(group, option) for group, option in choices.items()}
        if self.later_layers is None or any(node is None for node in files.values()):
            return compose_config(hydra_overrides, self.root)
        try:
            cfg = self.base.copy()
            for group, node in files.items():
                chosen = OmegaConf.merge(_VARIANT_SCHEMA[group](), node)
                if not self._overridden_keys_exist(group, chosen):
                    return compose_config(hydra_overrides, self.root)
                cfg[group] = OmegaConf.merge(chosen, self.later_layers[group])
            return cfg
        except (OmegaConfBaseException, ValueError):  # e.g. a bad key in the group file: Hydra's own message
            return compose_config(hydra_overrides, self.root)


_ABSENT = object()


def _unset_removed(node: dict, probe: dict) -> dict:
    """A probe composition's group node less the keys still at their probe value (no later layer set them)."""
    kept = {}
    for key, value in node.items():
        if isinstance(value, dict) and isinstance(probe.get(key), dict):
            kept[key] = _unset_removed(value, probe[key])
        elif key not in probe or value != probe[key]:
            kept[key] = value
    return kept
