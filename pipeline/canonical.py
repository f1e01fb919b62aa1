"""Config values as plain data and as sorted-key JSON: the one form of every rule param.

Reads and writes nothing; obeys no config key. Snakemake compares params by value, so key order must not
vary. Kept apart from pipeline.config (Hydra, the schema) so that the Snakefile and `shiftgrid status`
use it on a cached plan without loading Hydra, OmegaConf or the schema's modules.
"""

from __future__ import annotations

import json
import sys
from typing import Any


class ConfigNode(dict):
    """A composed, validated configuration as plain data with attribute access (`cfg.data.clean_dir`): what
    the plan holds, so a plan read from the cache needs no OmegaConf. Read it, do not change it."""

    def __getattr__(self, name: str) -> Any:
        try:
            value = self[name]
        except KeyError:
            raise AttributeError(name) from None
        return ConfigNode(value) if isinstance(value, dict) else value


def to_container(node: Any) -> Any:
    """A composed config node as plain dicts and lists (interpolations resolved); anything else as is."""
    omegaconf = sys.modules.get("omegaconf")  # an OmegaConf node can only exist once omegaconf is loaded
    if omegaconf is not None and omegaconf.OmegaConf.is_config(node):
        return omegaconf.OmegaConf.to_container(node, resolve=True)
    return node


def canonical_json(value: Any) -> str:
    """Sorted-key JSON: Snakemake compares params by value, so key order must not vary."""
    return json.dumps(to_container(value), sort_keys=True, separators=(",", ":"))
