"""Config values as plain data and as sorted-key JSON: the one form of every rule param.

Reads and writes nothing; obeys no config key. Snakemake compares params by value, so key order must not
vary. Kept apart from pipeline.config (Hydra, the schema) so that the Snakefile and `shiftgrid status`
use it on a cached plan without loading Hydra or the schema's modules.
"""

from __future__ import annotations

import json
from typing import Any

from omegaconf import OmegaConf


def to_container(node: Any) -> Any:
    """A composed config node as plain dicts and lists (interpolations resolved); anything else as is."""
    return OmegaConf.to_container(node, resolve=True) if OmegaConf.is_config(node) else node


def canonical_json(value: Any) -> str:
    """Sorted-key JSON: Snakemake compares params by value, so key order must not vary."""
    return json.dumps(to_container(value), sort_keys=True, separators=(",", ":"))
