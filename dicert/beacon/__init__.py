"""A published beacon: a static web site built from a chain folder, with in-browser checks.

``dicert publish CHAIN_DIR --out SITE_DIR --pubkey KEY`` (and :func:`build_site`) turns a beacon
chain (:mod:`dicert.audit.chain`) into a folder any web server can serve as it is:

* ``index.html``: every pulse (index, time, status, output bits, CHSH estimate, certified
  min-entropy, digests written out in full), the chain's head digest and the operator's key
  fingerprint;
* ``pulses/pulse-NNNNNN.html``: one page per pulse with its numbers, assumptions, error budget
  term by term, a block-by-block plot when the record holds per-block data (inline SVG), and
  the whole record;
* ``chain/pulse-NNNNNN.json``: the exact bytes of every pulse record (the folder is itself a
  chain: ``dicert verify --chain SITE_DIR/chain --pubkey KEY`` checks it);
* ``manifest.json``: the chain in machine-readable form (RFC 8785), the only file whose bytes
  depend on the time of the build (its ``volatile`` member);
* ``operator-key.pub``: the operator's Ed25519 public key (PEM), if given;
* ``assets/check.js``, ``assets/style.css``: the in-browser checks and the style sheet. The
  pages load nothing from anywhere else (a Content-Security-Policy says so to the browser).

The in-browser checks are a convenience for the public; the authoritative check is
``dicert verify --chain`` with a key the verifier trusts.
"""

from __future__ import annotations

from typing import Any

__all__ = ["SiteBuild", "SiteCheck", "build_site", "check_site"]


def __getattr__(name: str) -> Any:
    if name in __all__:
        from dicert.beacon import build

        return getattr(build, name)
    raise AttributeError(f"module 'dicert.beacon' has no attribute {name!r}")
