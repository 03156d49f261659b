"""``dicert extract``: Toeplitz-hash raw bits with a seed into nearly uniform output bits."""

from __future__ import annotations

import time
from pathlib import Path
from typing import Annotated

import typer

from dicert.cli._common import (
    JsonFlag,
    emit_json,
    handle_errors,
    progress_bar,
    stdout_console,
)


def register(app: typer.Typer) -> None:
    app.command("extract")(extract_cmd)


@handle_errors
def extract_cmd(
    input_path: Annotated[Path, typer.Option("--input", help="Raw bits, packed big-endian within bytes.")],
    seed_path: Annotated[Path, typer.Option("--seed", help="Uniform seed file; its first n + m - 1 bits are used.")],
    m_bits: Annotated[int, typer.Option("--bits", help="Output length m in bits.")],
    out: Annotated[Path, typer.Option("--out", help="Output file (ceil(m/8) bytes, zero-padded), written atomically.")],
    n_bits: Annotated[int | None, typer.Option("--input-bits", help="Use only the first N input bits (default: 8 x file size).")] = None,
    memory_mib: Annotated[int | None, typer.Option("--memory-mib", help="Memory budget for the working arrays in MiB (default 512, whatever the input size).")] = None,
    work_dir: Annotated[Path | None, typer.Option("--work-dir", help="Directory for the private temporary work files of large extractions, about 16 (n + m) bytes (default: the system temporary directory). On a disk they move by direct I/O, outside the page cache; a RAM-backed tmpfs would hold them in memory.")] = None,
    scheduler: Annotated[str | None, typer.Option("--scheduler", envvar="DICERT_SCHEDULER", help="dask.distributed scheduler address: run the pieces of a large extraction on its workers (needs dicert[cluster]; --work-dir must be shared by all workers).")] = None,
    as_json: JsonFlag = False,
) -> None:
    """Hash N raw bits to M bits with the Toeplitz matrix T[i][j] = s[i - j + N - 1] over GF(2).

    The output length should come from the certified min-entropy (see `dicert certify`, which
    sizes it by the leftover hash lemma); this command hashes whatever length it is given.
    """
    from dicert._io import atomic_write_bytes
    from dicert.errors import ParameterError
    from dicert.extract import extract_toeplitz

    if m_bits < 1:
        raise ParameterError(f"--bits must be a positive integer, got {m_bits}")
    if n_bits is not None and n_bits < 1:
        raise ParameterError(f"--input-bits must be a positive integer, got {n_bits}")
    if memory_mib is not None and memory_mib < 1:
        raise ParameterError(f"--memory-mib must be a positive integer, got {memory_mib}")
    if work_dir is not None and not work_dir.is_dir():
        raise ParameterError(f"{work_dir}: not a directory (--work-dir)")
    for p, opt in ((input_path, "--input"), (seed_path, "--seed")):
        if not p.exists():
            raise ParameterError(f"{p}: no such file ({opt})")
        if p.is_dir():
            raise ParameterError(f"{p}: is a directory, expected a file of raw bytes ({opt})")
    if out.exists() and any(out.resolve() == p.resolve() for p in (input_path, seed_path)):
        raise ParameterError(f"{out}: --out must not be the --input or --seed file")
    size = input_path.stat().st_size
    if n_bits is not None and n_bits > 8 * size:
        raise ParameterError(f"--input-bits {n_bits} exceeds the {8 * size} bits in {input_path} "
                             f"({size} bytes)")

    t0 = time.perf_counter()
    with progress_bar() as bar:
        task = bar.add_task("extracting", total=None)
        res = extract_toeplitz(input_path, seed_path, m_bits, n_bits=n_bits,
                               progress=lambda d, t: bar.update(task, completed=d, total=t),
                               memory_budget=None if memory_mib is None else memory_mib << 20,
                               temp_dir=work_dir, scheduler=scheduler or None)
    elapsed = time.perf_counter() - t0
    atomic_write_bytes(out, res.output)
    summary = res.summary()
    summary.update(
        input=str(input_path), seed=str(seed_path), out=str(out), output_bytes=len(res.output),
        elapsed_s=round(elapsed, 6), throughput_mbit_s=round(res.n_bits / elapsed / 1e6, 3),
    )
    if as_json:
        emit_json(summary)
        return
    from rich.markup import escape
    from rich.table import Table

    table = Table(title="Toeplitz extraction", show_header=False, title_justify="left")
    table.add_column("quantity", style="bold", no_wrap=True)
    table.add_column("value", overflow="fold")
    for key, value in (
        ("input bits n", f"{res.n_bits:,}"),
        ("output bits m", f"{res.m_bits:,}"),
        ("seed bits (used of given)", f"{res.seed_bits:,} of {8 * res.seed_bytes:,}"),
        ("input SHA-256", res.input_sha256),
        ("seed SHA-256", res.seed_sha256),
        ("output SHA-256", res.output_sha256),
        ("output file", f"{out} ({len(res.output)} bytes)"),
        ("method", res.method),
        ("max rounding error", f"{res.max_rounding_error:.3g} (guard {res.rounding_threshold})"),
        ("time", f"{elapsed:.3f} s ({summary['throughput_mbit_s']} Mbit/s)"),
        ("convention", res.convention),
    ):
        table.add_row(key, escape(value))
    stdout_console().print(table)
