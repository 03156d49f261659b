"""dicert: device-independent certified randomness from Bell-test trial logs.

The package is organised by pipeline stage:

``logs`` (read and validate trial logs) -> ``estimate`` (CHSH value and confidence bounds)
-> ``entropy`` (single-round bounds) -> ``finite`` (finite-size certification)
-> ``extract`` (Toeplitz hashing) -> ``audit`` (signed, hash-chained records).

Import the package, not its modules::

    import dicert

    trials = dicert.read_log("run.btl")          # TrialArrays (x, y, a, b, t, codes)
    look = dicert.inspect_log("run.btl")         # counts, CHSH value and its lower bound
    proto = dicert.load_protocol("protocols/chsh-uniform.toml")   # or a dict of tables
    dicert.plan(proto, chsh=2.7)                 # trials, gamma, expected output bits
    res = dicert.certify("run.btl", proto, "seed.bin", "out/")
    dicert.verify("out/record.json", log="run.btl", seed="seed.bin")

Every name in :data:`__all__` is imported on first use (a module-level ``__getattr__``), so
``import dicert`` stays cheap: heavy libraries (scipy, cvxpy, matplotlib, cryptography) are
imported inside the functions that need them. The recipes live in modules named for what they
hold (:mod:`dicert.certification`, :mod:`dicert.verification`, :mod:`dicert.planning`); the
old module paths ``dicert.certify``, ``dicert.verify`` and ``dicert.plan`` still import (see
:mod:`dicert._compat`).
"""

from __future__ import annotations

from typing import Any

from dicert import _compat

__version__ = "0.1.0"

#: public name -> (module, attribute)
_EXPORTS: dict[str, tuple[str, str]] = {
    # reading, writing and inspecting logs
    "read_log": ("dicert.logs", "read_trials"),
    "write_log": ("dicert.logs", "write_log"),
    "inspect_log": ("dicert.inspection", "inspect_log"),
    "TrialArrays": ("dicert.logs", "TrialArrays"),
    "simulate_trials": ("dicert.simulate", "simulate_trials"),
    # protocols
    "load_protocol": ("dicert.protocol", "load_protocol"),
    "Protocol": ("dicert.protocol", "Protocol"),
    # the recipes
    "plan": ("dicert.planning", "plan"),
    "certify": ("dicert.certification", "certify"),
    "verify": ("dicert.verification", "verify"),
    "verify_chain": ("dicert.verification", "verify_chain"),
    # primitives for experts
    "estimate_chsh": ("dicert.estimate", "estimate_chsh"),
    "entropy_bound": ("dicert.entropy", "bound_entropy"),
    "certify_counts": ("dicert.finite", "certify_counts"),
    "extract_toeplitz": ("dicert.extract", "extract_toeplitz"),
    "run_health_checks": ("dicert.health", "run_health_checks"),
    # errors
    "DicertError": ("dicert.errors", "DicertError"),
    "VerificationError": ("dicert.errors", "VerificationError"),
}

__all__ = ["__version__", *_EXPORTS]

_compat.install()


def __getattr__(name: str) -> Any:
    try:
        module_name, attr = _EXPORTS[name]
    except KeyError:
        raise AttributeError(f"module 'dicert' has no attribute {name!r}") from None
    import importlib

    value = getattr(importlib.import_module(module_name), attr)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
