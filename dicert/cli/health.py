"""``dicert health``: statistical screen of output bits (NIST SP 800-22 / SP 800-90B)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, stdout_console


def register(app: typer.Typer) -> None:
    app.command("health")(health_cmd)


@handle_errors
def health_cmd(
    bits_path: Annotated[Path, typer.Argument(help="Bits file, packed big-endian within bytes.")],
    n_bits: Annotated[int | None, typer.Option("--input-bits", help="Test only the first N bits (e.g. the exact output length m).")] = None,
    alpha: Annotated[float, typer.Option("--alpha", help="Significance level of each test.")] = 0.01,
    as_json: JsonFlag = False,
) -> None:
    """Screen output bits with NIST SP 800-22 (revision 1a) tests 2.1-2.4 and the SP 800-90B 6.3.1
    most-common-value estimate.

    Exit code 1 if an applicable test fails (ideal bits fail each test with probability
    alpha). Passing proves nothing about unpredictability.
    """
    from dicert.errors import ParameterError
    from dicert.health import run_health_checks

    if n_bits is not None and n_bits < 1:
        raise ParameterError(f"--input-bits must be a positive integer, got {n_bits}")
    if not 0.0 < alpha < 1.0:
        raise ParameterError(f"--alpha must be in (0, 1), got {alpha}")
    rep = run_health_checks(bits_path, n_bits=n_bits, alpha=alpha)
    failed = any(t.applicable and not t.passed for t in rep.tests)
    if as_json:
        emit_json({"file": str(bits_path), **{k: getattr(rep, k) for k in rep.__dataclass_fields__}})
    else:
        from rich.table import Table

        from dicert._format import fmt

        con = stdout_console()
        table = Table(title=f"Health screen of {bits_path} ({rep.n_bits} bits)", title_justify="left")
        for col in ("test", "section", "statistic", "P-value", "result"):
            table.add_column(col)
        for t in rep.tests:
            result = ("n/a (too short)" if not t.applicable else "pass" if t.passed else "FAIL")
            # p-values round up (dicert._format): a small one never looks smaller
            table.add_row(t.name, t.section, f"{t.statistic:.6g}", fmt(t.p_value, "error"), result)
        con.print(table)
        mcv = rep.mcv_per_bit
        con.print(f"SP 800-90B 6.3.1 MCV estimate: {fmt(mcv.min_entropy_per_sample, 'bits')} bits "
                  f"per bit (p_hat {mcv.p_hat:.6f}, upper bound {fmt(mcv.p_upper, 'error')})")
        if rep.mcv_per_byte is not None:
            con.print(f"  over bytes: {fmt(rep.mcv_per_byte.min_entropy_per_sample, 'bits')} bits "
                      "per byte")
        con.print(f"alpha = {rep.alpha}: " + ("an applicable test FAILED" if failed else
                  "no applicable test failed" if any(t.applicable for t in rep.tests) else
                  "sequence too short for every test"))
        con.print(rep.statement)
    if failed:
        raise typer.Exit(code=1)
