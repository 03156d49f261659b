"""dicert as a library, notebook style: simulate, inspect, plan, certify, verify (INVENTED data).

Everything here is made up: the devices are simulated, the seed is a fixed demo value. Run

    python examples/library_quickstart.py [OUT_DIR]

or paste the cells (``# %%``) into a notebook, where each result renders as a small table.
The test suite runs this script (tests/test_api.py), so it stays in step with the library.
"""

# %% The whole public API is one import.
from __future__ import annotations

import json
import sys
import tempfile
from pathlib import Path

import numpy as np

import dicert

# A protocol is normally a TOML file fixed before the run (dicert.load_protocol("p.toml"));
# the same tables as a dict work too. This is protocols/chsh-uniform.toml.
PROTOCOL = {
    "format": "dicert-protocol/1",
    "name": "quickstart-uniform",
    "description": "INVENTED example: every round a test round, martingale CHSH test.",
    "bell": {"kind": "chsh"},
    "settings": {"gamma": 1.0, "generation": [0, 0]},
    "harvest": {"parties": "AB", "select": "all"},
    "analysis": {"method": "martingale", "chsh_threshold": 2.6, "eps_est": 1e-6,
                 "single_round": "analytic-A", "expected_chsh": 2.74},
    "design": {"significance": 1e-9},
    "extractor": {"kind": "toeplitz", "eps_ext": 1e-8, "output_rule": "lhl-conservative"},
}
TRIALS = 100_000


def isotropic_box(visibility: float) -> np.ndarray:
    """p[x, y, a, b] of the CHSH-optimal quantum box mixed with noise: S = 2 sqrt(2) v."""
    p = np.empty((2, 2, 2, 2))
    for x, y, a, b in np.ndindex(2, 2, 2, 2):
        sign = 1.0 if (a ^ b) == (x & y) else -1.0
        p[x, y, a, b] = (1.0 + sign * visibility / np.sqrt(2.0)) / 4.0
    return p


def main(out: Path) -> int:
    out.mkdir(parents=True, exist_ok=True)
    print("INVENTED data: simulated devices, demo seed")

    # %% Load and look at the protocol (repr: the headline; summary(): a few more lines).
    protocol = dicert.load_protocol(PROTOCOL)
    print(protocol)

    # %% Plan: what do TRIALS trials of devices at S = 2.74 give under this protocol?
    plan = dicert.plan(protocol, chsh=2.74, trials=TRIALS, n_points=8, gamma_points=4)
    print(plan.summary())

    # %% Simulate a run and write it as a log (a dict of 0/1 columns works as well).
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(2024)))
    trials = dicert.simulate_trials(TRIALS, isotropic_box(0.97), rng=rng)
    log = out / "run.btl"
    dicert.write_log(log, {"x": trials.x, "y": trials.y, "a": trials.a, "b": trials.b})
    print(trials, "first codes:", trials.codes[:8])

    # %% Inspect the log: CHSH value, its lower bound valid with memory, design checks.
    look = dicert.inspect_log(log, protocol=protocol)
    print(look)

    # %% The extractor seed. DEMO ONLY: reproducible, not secret; a real run draws it from a
    #    trusted uniform source (n + m - 1 bits: raw bits + output bits - 1).
    seed = out / "seed.bin"
    seed.write_bytes(np.random.default_rng(7).bytes(2 * TRIALS * 2 // 8))

    # %% Certify: one streaming pass, the finite-size bound, Toeplitz extraction, a record.
    res = dicert.certify(log, protocol, seed, out / "certified")
    print(res)
    print(res.summary())
    if not res.certified:
        return 3

    # %% Verify from the raw inputs (unsigned here: integrity only, not authenticity).
    report = dicert.verify(res.record_file, log=log, seed=seed, bits=res.bits_file)
    print(report)

    # %% Every result is JSON-ready; the record itself stays an attribute.
    print("result as JSON:", len(json.dumps(res.to_dict())), "characters;",
          "record keys:", ", ".join(sorted(res.record)[:6]), "...")
    return 0


if __name__ == "__main__":
    target = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(tempfile.mkdtemp(prefix="dicert-"))
    sys.exit(main(target))
