"""Beacon chains for the site tests, built with the library on small simulated logs (invented data)."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np

from helpers import sim_trials, uniform_protocol

# RFC 8032 section 7.1 TEST 1 / TEST 2 secret keys: published fixed keys keep the chains
# reproducible (the same keys tests/test_audit_chain.py uses).
OPERATOR_SECRET = bytes.fromhex("9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60")
OTHER_SECRET = bytes.fromhex("4ccd089b28ff96da9db6c346ec114e0f5b8a319f35aba624da8cf6ed4fb8a6fb")

#: (simulator seed, device model) per pulse: two honest pulses, then a classical one (aborts).
PULSES = ((11, "quantum"), (12, "quantum"), (13, "classical"))
TRIALS = 20_000


def operator_key():
    from dicert.audit import signing

    return signing.private_key_from_bytes(OPERATOR_SECRET)


def write_public_key(path: Path, secret: bytes = OPERATOR_SECRET) -> Path:
    """Write the PEM public key of ``secret`` to ``path``."""
    from cryptography.hazmat.primitives import serialization

    from dicert.audit import signing

    key = signing.private_key_from_bytes(secret).public_key()
    path.write_bytes(key.public_bytes(serialization.Encoding.PEM,
                                      serialization.PublicFormat.SubjectPublicKeyInfo))
    return path


def build_chain(root: Path) -> Path:
    """Certify the simulated pulses into ``root/chain`` (fresh log and seed per pulse)."""
    from dicert.certify import certify
    from dicert.logs import write_log

    chain = root / "chain"
    key = operator_key()
    for i, (sim_seed, model) in enumerate(PULSES, start=1):
        run = root / f"run-{i}"
        run.mkdir(parents=True)
        log = run / "log.btl"
        write_log(log, sim_trials(TRIALS, seed=sim_seed, model=model))
        seed = run / "seed.bin"
        seed.write_bytes(np.random.default_rng(100 + i).bytes(TRIALS))
        stamp = f"2026-01-0{i}T12:00:00Z"
        certify(log, uniform_protocol(), seed, run / "out", key=key, chain=chain,
                clock=lambda stamp=stamp: stamp)
    return chain


def synthetic_chain(root: Path, bodies: list[dict], secret: bytes | None = OPERATOR_SECRET) -> Path:
    """A chain of invented record bodies (sealed, linked, signed with ``secret``; unsigned
    with ``secret=None``)."""
    from dicert.audit import signing
    from dicert.audit.chain import append_to_chain, next_link
    from dicert.audit.record import seal_record

    chain = root / "chain"
    key = None if secret is None else signing.private_key_from_bytes(secret)
    for n, body in enumerate(bodies):
        full = {"format": "dicert-record/1",
                "extractor": {"seed_sha256": hashlib.sha256(f"seed-{n}".encode()).hexdigest(),
                              "seed_bits_used": 100, "output_bits": 10},
                **body, **next_link(chain)}
        append_to_chain(chain, seal_record(full, key))
    return chain


def build_pef_chain(root: Path) -> Path:
    """One pulse certified by probability estimation with adaptive calibration (per-block
    scores in the record): the shipped ch-photonic protocol with small, fast parameters."""
    import tomllib

    from dicert.certify import certify
    from dicert.logs import write_log
    from dicert.protocol import protocol_from_dict
    from helpers import ROOT

    d = tomllib.loads((ROOT / "protocols" / "ch-photonic.toml").read_text())
    d["analysis"].pop("calibration_trials", None)
    d["analysis"].update(calibration="adaptive", block_trials=1500, beta=0.05, eps_pe=1e-6,
                         sigma_target_bits=1024, n_max=10**6)
    d["extractor"]["eps_ext"] = 1e-6
    protocol = protocol_from_dict(d, "test-pef-adaptive")
    run = root / "pef-run"
    run.mkdir(parents=True)
    write_log(run / "log.btl", sim_trials(40_000, seed=3))
    (run / "seed.bin").write_bytes(np.random.default_rng(1).bytes(40_000))
    chain = root / "chain"
    certify(run / "log.btl", protocol, run / "seed.bin", run / "out", key=operator_key(),
            chain=chain, clock=lambda: "2026-01-05T12:00:00Z")
    return chain
