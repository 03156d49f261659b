"""``dicert demo``: the whole job on an INVENTED scenario, end to end, in seconds.

The scenario (``dicert/data/demo/scenario.toml``) is made up: a fictional campus beacon fed by
two detector stations. The demo simulates its pulses, certifies each one into a signed,
hash-chained audit record, verifies everything from the raw inputs, and then tampers with a
log, a record and a bits file to show that verification fails. It writes only inside ``--out``.
"""

from __future__ import annotations

import contextlib
import hashlib
import shutil
from pathlib import Path
from typing import Annotated, Any

import typer

from dicert.cli._common import (
    CAUTION,
    JsonFlag,
    emit_json,
    handle_errors,
    stdout_console,
)

DEFAULT_OUT = "dicert-demo"



def _site_title(title: str) -> str:
    """The site's title, marked invented once (the scenario's own title may already say so)."""
    return title if "invented" in title.lower() else f"{title} (invented demo)"

def register(app: typer.Typer) -> None:
    app.command("demo")(demo_cmd)


def _data_dir() -> Path:
    return Path(__file__).resolve().parents[1] / "data" / "demo"


def load_scenario(path: Path | None = None) -> dict:
    """The invented demo scenario (TOML)."""
    import tomllib

    from dicert.errors import ParameterError

    p = path or (_data_dir() / "scenario.toml")
    try:
        return tomllib.loads(p.read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise ParameterError(f"{p}: cannot read the demo scenario ({exc})") from None


def _fresh_out(out: Path | None) -> Path:
    from dicert.errors import ParameterError

    if out is not None:
        if out.exists() and (not out.is_dir() or any(out.iterdir())):
            raise ParameterError(f"{out}: --out must be a new or empty directory")
        out.mkdir(parents=True, exist_ok=True)
        return out
    base = Path.cwd() / DEFAULT_OUT
    cand, i = base, 1
    while cand.exists() and (not cand.is_dir() or any(cand.iterdir())):
        i += 1
        cand = Path(f"{base}-{i}")
    cand.mkdir(parents=True, exist_ok=True)
    return cand


def _simulate(n: int, model: str, visibility: float, rng: Any):
    from dicert.simulate import device_model, simulate_trials

    if model == "classical":
        return simulate_trials(n, device_model("classical"), rng=rng)
    return simulate_trials(n, device_model("quantum", visibility=visibility), rng=rng)


def _demo_seed(rng_stream: int, pulse: int, nbytes: int) -> bytes:
    """Demo-only extractor seed: reproducible, NOT secret. Real beacons use a true random source."""
    import numpy as np

    g = np.random.Generator(np.random.PCG64(np.random.SeedSequence([rng_stream, 7, pulse])))
    return g.bytes(nbytes)


def _flip_byte(src: Path, dst: Path, offset_from_end: int = 1) -> int:
    data = bytearray(src.read_bytes())
    pos = len(data) - offset_from_end
    data[pos] ^= 0x01
    from dicert._io import atomic_write_bytes

    atomic_write_bytes(dst, bytes(data))
    return pos


def _resign(path: Path) -> None:
    """Re-seal a pulse with a freshly made (foreign) key: valid signature, wrong signer."""
    from dicert.audit.record import read_record, record_bytes, seal_record
    from dicert.audit.signing import generate_keypair

    body = {k: v for k, v in read_record(path).items() if k not in ("record_sha256", "signature")}
    path.write_bytes(record_bytes(seal_record(body, generate_keypair())))


def _truncated(chain: Path, dst: Path) -> Path:
    shutil.copytree(chain, dst)
    sorted(dst.glob("pulse-*.json"))[-1].unlink()
    return dst


def run_demo(out: Path | None = None, *, scenario: dict | None = None,
             say=lambda msg: None) -> dict:
    """Run the invented scenario; returns a JSON-able summary. Raises if a check misbehaves."""
    sc = scenario if scenario is not None else load_scenario()
    existed = out is not None and out.exists()
    out = _fresh_out(out)
    try:
        return _run_demo(out, sc, existed, say)
    except BaseException:
        # --out was new or empty: a failed demo (disk full, ...) leaves it as it was.
        with contextlib.suppress(OSError):
            for child in out.iterdir():
                if child.is_dir() and not child.is_symlink():
                    shutil.rmtree(child)
                else:
                    child.unlink()
            if not existed:
                out.rmdir()
        raise


def _certify_pulses(out: Path, sc: dict, rng_stream: int, protocol: Any, keys: Any, chain: Path,
                    say) -> list[dict]:
    """Simulate, certify (into the chain) and verify each pulse of the scenario."""
    import numpy as np

    from dicert._io import atomic_write_bytes
    from dicert.certification import certify
    from dicert.errors import VerificationError
    from dicert.logs import write_log
    from dicert.verification import verify

    pulses = []
    for i, p in enumerate(sc["pulse"], start=1):
        pdir = out / f"pulse-{i}"
        pdir.mkdir()
        rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence([rng_stream, i])))
        trials = _simulate(int(p["trials"]), p["model"], float(p.get("visibility", 1.0)), rng)
        log_path = pdir / "trials.btl"
        write_log(log_path, trials)
        seed_path = pdir / "seed.bin"
        atomic_write_bytes(seed_path, _demo_seed(rng_stream, i, (4 * int(p["trials"])) // 8 + 8))
        res = certify(log_path, protocol, seed_path, pdir / "certified", key=keys.private_key_file,
                      chain=chain)
        from dicert._format import fmt

        say(f"{p['label']}: {res.status.upper()}, {fmt(res.output_bits, 'count')} output bits "
            f"(certified min-entropy {fmt(res.certified_min_entropy_bits, 'bits')} bits, "
            f"soundness error {fmt(res.soundness_error, 'error')})")
        rep = verify(res.record_file, log=log_path, seed=seed_path,
                     public_key=keys.public_key_file)
        if rep.result != "VERIFIED":  # pragma: no cover - the demo's own check
            raise VerificationError(f"demo pulse {i} verified only as {rep.result}", "demo")
        say(f"  {rep.result} against the operator's public key, every number re-derived "
            f"from the raw inputs")
        pulses.append({
            "pulse": i, "label": p["label"], "model": p["model"], "trials": res.trials,
            "status": res.status, "output_bits": res.output_bits,
            "certified_min_entropy_bits": res.certified_min_entropy_bits,
            "soundness_error": res.soundness_error,
            "chsh_estimate": _weighted_estimate(res.record),
            "log_file": str(log_path), "seed_file": str(seed_path),
            "bits_file": str(res.bits_file) if res.bits_file else None,
            "record_file": str(res.record_file), "record_sha256": res.record_sha256,
            "verified": rep.scope, "result": rep.result,
        })
    return pulses


def _weighted_estimate(record: dict) -> float | None:
    """The record's CHSH estimate (the weighted one, in every record format)."""
    from dicert.cli._rows import get_path, weighted_estimate_path

    return get_path(record, weighted_estimate_path(record))


def demo_rows(summary: dict) -> list:
    """The demo's numbers as rows (the table and the --json object share them)."""
    from dicert.cli._rows import Row

    rows = []
    for i, p in enumerate(summary["pulses"]):
        k = f"pulses.{i}."
        head = f"pulse {p['pulse']} ({p['model']})"
        rows += [Row(f"{head}: status", k + "status", p["status"]),
                 Row(f"{head}: trials", k + "trials", p["trials"], "count"),
                 Row(f"{head}: CHSH estimate", k + "chsh_estimate", p["chsh_estimate"], "chsh"),
                 Row(f"{head}: certified min-entropy (bits)", k + "certified_min_entropy_bits",
                     p["certified_min_entropy_bits"], "bits"),
                 Row(f"{head}: output bits", k + "output_bits", p["output_bits"], "count"),
                 Row(f"{head}: soundness error", k + "soundness_error", p["soundness_error"],
                     "error"),
                 Row(f"{head}: record SHA-256", k + "record_sha256", p["record_sha256"],
                     "digest")]
    rows += [Row("key fingerprint", "key_fingerprint", summary["key_fingerprint"], "digest"),
             Row("chain head SHA-256", "chain.head_sha256", summary["chain"]["head_sha256"],
                 "digest")]
    for i, c in enumerate(summary["tamper_checks"]):
        rows.append(Row(f"tampered {c['tampered']}", None,
                        f"detected ({c['field'] or 'error'})"))
    rows.append(Row("outputs", "out_dir", summary["out_dir"]))
    return rows


def _tamper_checks(out: Path, first: dict, chain: Path, head: str, keys: Any, say) -> list[dict]:
    """Tamper with copies of the first pulse's files and of the chain; each must make
    verification fail (the demo stops if one does not)."""
    from dicert._io import atomic_write_bytes
    from dicert.errors import DicertError, VerificationError
    from dicert.verification import verify, verify_chain

    tdir = out / "tampered"
    tdir.mkdir()
    checks = []

    def expect_failure(what: str, fn) -> None:
        try:
            fn()
        except VerificationError as exc:
            checks.append({"tampered": what, "verification": "failed as expected",
                           "field": exc.field, "message": " ".join(str(exc).split())})
            say(f"tampered {what}: verification FAILED as expected ({exc.field})")
            return
        except DicertError as exc:
            checks.append({"tampered": what, "verification": "failed as expected",
                           "field": None, "message": " ".join(str(exc).split())})
            say(f"tampered {what}: verification FAILED as expected")
            return
        raise VerificationError(f"tampering with {what} was NOT detected", "demo")

    bad_log = tdir / "trials.btl"
    pos = _flip_byte(Path(first["log_file"]), bad_log, offset_from_end=1000)
    expect_failure(f"log (one bit of byte {pos})", lambda: verify(
        first["record_file"], log=bad_log, seed=first["seed_file"], bits=first["bits_file"],
        public_key=keys.public_key_file))
    bad_seed = tdir / "seed.bin"
    _flip_byte(Path(first["seed_file"]), bad_seed, offset_from_end=len(
        Path(first["seed_file"]).read_bytes()))
    expect_failure("seed (first byte)", lambda: verify(
        first["record_file"], log=first["log_file"], seed=bad_seed, public_key=keys.public_key_file))
    bad_bits = tdir / "random.bits"
    _flip_byte(Path(first["bits_file"]), bad_bits)
    expect_failure("bits (last byte)", lambda: verify(
        first["record_file"], bits=bad_bits, public_key=keys.public_key_file))
    bad_rec = tdir / "record.json"
    text = Path(first["record_file"]).read_text(encoding="utf-8")
    old = f'"output_bits":{first["output_bits"]}'
    atomic_write_bytes(bad_rec, text.replace(
        old, f'"output_bits":{first["output_bits"] + 1000}', 1).encode("utf-8"))
    expect_failure("record (claims 1000 more output bits)", lambda: verify(
        bad_rec, public_key=keys.public_key_file))
    bad_chain = tdir / "chain"
    shutil.copytree(chain, bad_chain)
    victims = sorted(bad_chain.glob("pulse-*.json"))
    if len(victims) >= 2:
        victims[1].unlink()
        expect_failure("chain (a pulse removed)", lambda: verify_chain(
            bad_chain, public_key=keys.public_key_file))
        forged_chain = tdir / "chain-resigned"
        shutil.copytree(chain, forged_chain)
        _resign(sorted(forged_chain.glob("pulse-*.json"))[-1])
        expect_failure("chain (newest pulse re-signed with a foreign key)", lambda: verify_chain(
            forged_chain, public_key=keys.public_key_file))
        expect_failure("chain (newest pulse removed, head published)", lambda: verify_chain(
            _truncated(chain, tdir / "chain-truncated"),
            public_key=keys.public_key_file, head=head))
    return checks


def _run_demo(out: Path, sc: dict, existed: bool, say) -> dict:
    from dicert.audit.signing import write_keypair
    from dicert.protocol import load_protocol, shipped_protocol_path
    from dicert.verification import verify, verify_chain

    protocol = load_protocol(shipped_protocol_path(sc["protocol"]))
    rng_stream = int(sc["rng_stream"])
    say(f"[invented scenario] {sc['title']}")
    say(f"writing into {out}")

    keys = write_keypair(out / "operator-key.pem")
    say(f"operator key pair: {keys.public_key_file} (fingerprint {keys.fingerprint})")
    chain = out / "chain"
    pulses = _certify_pulses(out, sc, rng_stream, protocol, keys, chain, say)
    chain_report = verify_chain(chain, public_key=keys.public_key_file)
    head = chain_report.head_sha256
    verify_chain(chain, public_key=keys.public_key_file, head=head)
    say(f"chain of {len(pulses)} pulses: {chain_report.result} against the operator's key "
        f"(head {head}): {chain}")
    # Without a trusted key a record's integrity can be checked, not who made it.
    anon = verify(pulses[0]["record_file"])
    say(f"the same record checked without the operator's key: {anon.result} (authenticity "
        "not established)")

    # The beacon's public face: a static site built from the chain, then re-checked.
    from dicert.beacon import build_site, check_site

    site = build_site(chain, out / "site", public_key=keys.public_key_file,
                      title=_site_title(sc["title"]))
    site_check = check_site(site.site_dir, keys.public_key_file)
    say(f"beacon site built and checked ({site_check.pulses} pulses, head "
        f"{site_check.head_sha256}): {site.index_file}")

    # Tampering: each must make verification fail.
    checks = _tamper_checks(out, pulses[0], chain, head, keys, say)

    from dicert.cli._common import to_jsonable

    return {
        "scenario": sc["title"],
        "invented": True,
        "site": {"dir": site.site_dir, "index_file": site.index_file,
                 "head_sha256": site.head_sha256, "checked": to_jsonable(site_check),
                 "serve": _serve_hint(site.site_dir)},
        "out_dir": str(out),
        "protocol": {"name": protocol.name, "sha256": protocol.sha256},
        "public_key_file": keys.public_key_file,
        "key_fingerprint": keys.fingerprint,
        "pulses": pulses,
        "chain": {"dir": str(chain), "head_sha256": head, "result": chain_report.result,
                  "report": to_jsonable(chain_report)},
        "without_key": anon.result,
        "tamper_checks": checks,
        "ok": True,
        "caution": CAUTION,
        "demo_note": ("invented scenario with simulated data; demo seeds are reproducible and "
                      "NOT secret; real use needs a true random seed and real devices"),
    }


@handle_errors
def demo_cmd(
    out: Annotated[Path | None, typer.Option("--out", help=f"New or empty output directory (default: ./{DEFAULT_OUT}, or ./{DEFAULT_OUT}-N if taken).")] = None,
    as_json: JsonFlag = False,
) -> None:
    """Run an INVENTED beacon scenario end to end: simulate -> certify -> verify -> tamper
    (verification must fail). Writes only inside --out."""
    if as_json:
        from dicert.cli._rows import to_json

        summary = run_demo(out)
        emit_json(to_json(demo_rows(summary), summary))
        return
    console = stdout_console()
    summary = run_demo(out, say=lambda m: console.print(m, highlight=False, markup=False))
    from dicert.cli._rows import render

    render(console, f"dicert demo: {summary['scenario']}", demo_rows(summary))
    console.print("Open the beacon site (its pages re-check the chain in your browser):\n"
                  f"  {summary['site']['serve']}\n  then visit http://127.0.0.1:8000/",
                  highlight=False, soft_wrap=True, markup=False)
    first = summary["pulses"][0]
    console.print("Re-check a pulse yourself:\n"
                  f"  dicert verify {first['record_file']} --log {first['log_file']} "
                  f"--seed {first['seed_file']} --bits {first['bits_file']} "
                  f"--pubkey {summary['public_key_file']}\n"
                  f"  dicert verify --chain {summary['chain']['dir']} "
                  f"--pubkey {summary['public_key_file']} --head {summary['chain']['head_sha256']}",
                  highlight=False, soft_wrap=True)
    console.print(f"INVENTED scenario, simulated data. CAUTION: {CAUTION}", style="dim")


def _serve_hint(site_dir: str) -> str:
    import shlex

    return f"python3 -m http.server 8000 --bind 127.0.0.1 --directory {shlex.quote(site_dir)}"


def _sha256(path: Path) -> str:  # pragma: no cover - small helper kept for scripts
    return hashlib.sha256(path.read_bytes()).hexdigest()
