"""Shared test fixtures. Random arms come from tests/arm_factory.py (import it directly in a test
module: `from arm_factory import random_arm`); the fixtures here hand out seeded generators so every
run is the same."""

from __future__ import annotations

import numpy as np
import pytest
from arm_factory import arm_cases

#: Seed of the `rng` fixture; change it only on purpose (every test using it is deterministic).
TEST_SEED = 20_240_611


@pytest.fixture
def rng() -> np.random.Generator:
    """A fresh numpy Generator with the fixed TEST_SEED for each test."""
    return np.random.default_rng(TEST_SEED)


@pytest.fixture
def random_arms() -> list:
    """24 seeded random arms: every description style with every joint count 2..9, prismatic joints
    mixed in (see arm_factory.arm_cases)."""
    return [arm for arm, _ in arm_cases(24, seed=TEST_SEED)]
