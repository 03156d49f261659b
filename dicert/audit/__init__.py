"""Audit layer: canonical JSON, Ed25519 signatures, sealed records and beacon chains.

* :mod:`dicert.audit.canonical` -- RFC 8785 canonical bytes (what is hashed and signed);
* :mod:`dicert.audit.signing` -- Ed25519 keys, PEM files, signatures, key fingerprints;
* :mod:`dicert.audit.record` -- sealing, checking, writing and reading audit records;
* :mod:`dicert.audit.chain` -- hash-chained record directories for beacons.

Only this layer writes and reads audit files; the ``cryptography`` package is imported lazily,
inside the functions that sign or verify.
"""

from __future__ import annotations
