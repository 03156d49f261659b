"""Stage 6, chaining: the operator's trusted keys, the checks that a beacon chain may be
extended by this run (:func:`check_chain`), and linking a pulse into the chain (the commit
point).

Part of the certify and verify recipes (:mod:`dicert.certification`,
:mod:`dicert.verification`).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import TYPE_CHECKING, Any

from dicert.errors import ParameterError, SeedError
from dicert.stages.record import _now

if TYPE_CHECKING:
    from dicert.protocol import Protocol


def _operator_trust(signer: Any, trusted_keys: Any, chain_dir: Path | None,
                    protocol_change: str | None) -> Any:
    """The keys an operator trusts for the existing chain: its own and a trusted-keys file."""
    if protocol_change is not None:
        if chain_dir is None:
            raise ParameterError("--protocol-change applies only with --chain")
        if not isinstance(protocol_change, str) or not protocol_change.strip():
            raise ParameterError("--protocol-change: give the reason for the change")
    if chain_dir is None:
        if trusted_keys is not None:
            raise ParameterError("--trusted-keys applies only with --chain")
        return None
    if chain_dir.exists() and not chain_dir.is_dir():
        raise ParameterError(f"{chain_dir}: --chain must be a directory")
    if signer is None:
        raise ParameterError("--chain needs --key: a beacon chain is extended only with "
                             "records signed by its operator")
    from dicert.audit.signing import public_key_bytes
    from dicert.audit.trust import trust_from

    public = public_key_bytes(signer.public_key() if hasattr(signer, "public_key")
                              and callable(signer.public_key) else signer)
    return trust_from(public, trusted_keys)


def _check_chain(chain_dir: Path, trust: Any, signer: Any, seed_sha: str, seed_label: str,
                 proto: Protocol, protocol_change: str | None) -> Any:
    """Verify the whole chain against the operator's trusted keys; refuse what cannot extend it."""
    from dicert.audit.chain import ChainVerificationError, chain_state
    from dicert.audit.signing import fingerprint
    from dicert.errors import VerificationError

    try:
        state = chain_state(chain_dir, trust)
    except ChainVerificationError as exc:
        raise VerificationError(f"{chain_dir}: refusing to extend a chain that does not "
                                f"verify against the operator's keys: {exc}",
                                "chain") from None
    link = state.next_link()
    fp = fingerprint(signer.public_key() if hasattr(signer, "public_key")
                     and callable(signer.public_key) else signer)
    try:
        trust.authorise(fp, link["pulse_index"], _now(None))
    except VerificationError as exc:
        raise ParameterError(f"--key: not trusted for pulse {link['pulse_index']} "
                             f"({exc})") from None
    if seed_sha in state.seeds_used:
        raise SeedError(f"{seed_label}: this extractor seed (SHA-256 {seed_sha}) was "
                        f"already used by pulse {state.seeds_used[seed_sha]} of {chain_dir}; "
                        "use a fresh seed for every pulse (an aborted pulse's seed included)")
    prev = state.protocol_sha256
    if prev is not None and proto.sha256 != prev and protocol_change is None:
        raise ParameterError(
            f"{proto.name}: the protocol (SHA-256 {proto.sha256}) differs from the "
            f"chain's ({prev}); pass --protocol-change REASON to record a deliberate "
            "change in the signed record")
    if protocol_change is not None and (prev is None or proto.sha256 == prev):
        raise ParameterError("--protocol-change: the protocol is the same as the chain's "
                             "(or the chain is empty); nothing to declare")
    return state


def pulse_name(index: int) -> str:
    from dicert.audit.chain import pulse_file_name

    return pulse_file_name(index)


def _append_pulse(chain_dir: Path, record: dict, journal: Path) -> Path:
    """The commit point: link the pulse into the chain (the journal goes if this fails)."""
    from dicert import _outputs as outputs
    from dicert.audit.chain import append_to_chain

    try:
        return Path(append_to_chain(chain_dir, record))
    except OSError as exc:
        os.unlink(journal)
        raise outputs.output_error(chain_dir, exc) from None
    except BaseException:
        os.unlink(journal)
        raise
