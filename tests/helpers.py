"""Helpers shared by the certification tests (simulated logs, the shipped uniform protocol)."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def uniform_protocol(**analysis):
    """The shipped protocols/chsh-uniform.toml, with [analysis] keys overridden."""
    from dicert.protocol import protocol_from_dict

    d = tomllib.loads((ROOT / "protocols" / "chsh-uniform.toml").read_text())
    d["analysis"].update(analysis)
    return protocol_from_dict(d, "test-uniform")


def sim_trials(n: int, seed: int = 1, model: str = "quantum", visibility: float = 1.0,
               gamma: float = 1.0):
    """n simulated trials (TrialArrays) from a fixed seed."""
    from dicert.simulate import device_model, simulate_trials

    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed)))
    src = device_model(model) if model != "quantum" else device_model("quantum", visibility=visibility)
    return simulate_trials(n, src, gamma=gamma, rng=rng)
