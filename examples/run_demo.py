"""The Brackenmoor campus beacon, step by step, with the dicert library (INVENTED scenario).

Everything here is made up: the campus, the stations, the data (simulated). Run it with

    python examples/run_demo.py [OUT_DIR]

It simulates one pulse of the beacon, certifies it under the shipped `chsh-uniform` protocol,
verifies it from the raw inputs, then tampers with the log, the record and the bits and shows
that verification fails each time. `dicert demo` does the same for a chain of three pulses.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from dicert.audit.signing import write_keypair
from dicert.certification import certify
from dicert.errors import VerificationError
from dicert.protocol import load_protocol, shipped_protocol_path
from dicert.simulate import device_model, simulate_to_file
from dicert.verification import verify


def main(out: Path) -> int:
    out.mkdir(parents=True, exist_ok=True)
    print("INVENTED scenario: the Brackenmoor campus beacon, North Hall and South Hall stations")

    # 1. The operator fixed the protocol before the run (a copy of protocols/chsh-uniform.toml).
    protocol = load_protocol(shipped_protocol_path("chsh-uniform"))
    print(f"protocol {protocol.name} (sha256 {protocol.sha256[:16]}...)")

    # 2. One pulse: one million trials from honest devices with visibility 0.97 (simulated).
    log = out / "pulse.btl"
    simulate_to_file(log, 1_000_000, device_model("quantum", visibility=0.97), rng_stream=1201)

    # 3. The extractor seed. DEMO ONLY: reproducible, not secret. A real beacon draws it from a
    #    trusted uniform source; it must hold n + m - 1 bits (raw bits + output bits - 1).
    seed = out / "seed.bin"
    seed.write_bytes(np.random.default_rng(77).bytes(500_000))

    # 4. The operator's signing key (Ed25519); the public half goes to everyone who checks.
    keys = write_keypair(out / "operator-key.pem", force=True)

    # 5. Certify: one streaming pass, the protocol's finite-size bound, Toeplitz extraction,
    #    a signed record. Exit code semantics in the CLI: 0 certified, 3 aborted.
    res = certify(log, protocol, seed, out / "certified", key=keys.private_key_file)
    print(f"certify: {res.status}, {res.output_bits} bits, min-entropy "
          f"{res.certified_min_entropy_bits:.1f} bits, soundness error {res.soundness_error:.3g}")
    if not res.certified:
        return 3

    # 6. Anyone with the log, the seed and the public key re-derives every number.
    rep = verify(res.record_file, log=log, seed=seed, bits=res.bits_file,
                 public_key=keys.public_key_file)
    print(f"verify: {rep.message}")

    # 7. Tampering: flip one bit in the log, the bits, the record; each must fail.
    failures = 0
    for name, target, kwargs in (
        ("log", log, lambda p: {"log": p, "seed": seed}),
        ("bits", res.bits_file, lambda p: {"bits": p}),
    ):
        bad = out / f"tampered-{target.name}"
        data = bytearray(target.read_bytes())
        data[len(data) // 2] ^= 0x01
        bad.write_bytes(bytes(data))
        try:
            verify(res.record_file, public_key=keys.public_key_file, **kwargs(bad))
        except VerificationError as exc:
            print(f"tampered {name}: verification failed as expected ({exc.field})")
            failures += 1
    bad_record = out / "tampered-record.json"
    text = res.record_file.read_text()
    bad_record.write_text(text.replace(f'"output_bits":{res.output_bits}',
                                       f'"output_bits":{res.output_bits + 8}', 1))
    try:
        verify(bad_record, public_key=keys.public_key_file)
    except VerificationError as exc:
        print(f"tampered record: verification failed as expected ({exc.field})")
        failures += 1
    return 0 if failures == 3 else 1


if __name__ == "__main__":
    sys.exit(main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path("brackenmoor-demo")))
