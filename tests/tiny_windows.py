"""Just the WindowSet attributes the models and the training loop use (not a test module).

Duck typing keeps model tests independent of pipeline.windows.
"""

from dataclasses import dataclass

import numpy as np


@dataclass
class TinyWindows:
    X: np.ndarray
    y: np.ndarray
    env: np.ndarray
    env_names: list
    target_index: int = 0
