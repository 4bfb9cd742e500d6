"""Seeded random generators: the project's only source of randomness.

Every draw comes from a :class:`numpy.random.Generator` spawned from a seed
and a key (for example participant, purpose, epoch), never from the global
state, so a draw depends only on what names it.
"""

from __future__ import annotations

import numpy as np


def seeded_rng(seed: int, *key: int) -> np.random.Generator:
    """Independent generator for ``key`` (e.g. participant, purpose, visit) under ``seed``."""
    return np.random.default_rng(np.random.SeedSequence(seed, spawn_key=key))
