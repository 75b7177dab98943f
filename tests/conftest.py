"""Shared fixtures: one seeded random generator and the synthesized banks and model.

``rng``: a fresh ``numpy.random.Generator`` per test, seeded (``RNG_SEED``) so a
failure repeats exactly. ``small_banks(n)``: a bank of ``n`` parametric spectrograms
(:func:`synthbank.small_bank`, three categories), built once per session and shared
read-only. ``small_model``: a model file trained for three epochs on ``small_banks(36)``,
also built once; tests copy it before changing it.

Ctrl-C tests send SIGINT to child processes. A test run started in the background of a
non-interactive shell (``cmd &``, nohup) inherits SIGINT as ignored, and an ignored
signal stays ignored across exec, so Python in the child never raises
KeyboardInterrupt: the CLI would look deaf to Ctrl-C. Catching it here makes the
children start with the default disposition again, as under a terminal.
"""

from __future__ import annotations

import signal
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest

if signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
    signal.signal(signal.SIGINT, signal.default_int_handler)

RNG_SEED = 1770  # a module may set its own RNG_SEED


@pytest.fixture
def rng(request) -> np.random.Generator:
    """Seeded with the test module's ``RNG_SEED`` where it pins the draws its tolerances
    were set with, else with this file's."""
    return np.random.default_rng(getattr(request.module, "RNG_SEED", RNG_SEED))


@pytest.fixture(scope="session")
def small_banks(tmp_path_factory) -> Callable[[int], Path]:
    """``small_banks(n)``: the shared bank of ``n`` clips (made on first use)."""
    from synthbank import small_bank

    made: dict[int, Path] = {}

    def get(n: int) -> Path:
        if n not in made:
            made[n] = small_bank(tmp_path_factory.mktemp(f"bank{n}") / "bank", n=n)
        return made[n]

    return get


@pytest.fixture(scope="session")
def small_model(small_banks, tmp_path_factory) -> tuple[Path, Path]:
    """``(model file, bank)``: three epochs of ``small_settings`` on ``small_banks(36)``."""
    from synthbank import small_settings

    from pipeline.train import train_model

    bank = small_banks(36)
    model = tmp_path_factory.mktemp("small-model") / "m.pt"
    train_model(bank, model, small_settings(epochs=3))
    return model, bank
