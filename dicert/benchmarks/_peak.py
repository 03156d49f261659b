"""Run a Python module or snippet and report its own peak resident memory (VmHWM).

``python -m dicert.benchmarks._peak OUTFILE -m MODULE ARGS...`` or ``... OUTFILE -c CODE``.
``ru_maxrss`` of a child is unreliable on Linux (it keeps the parent's high-water mark across
``exec`` after ``vfork``), so the child reads ``VmHWM`` of its own address space at exit.
"""

from __future__ import annotations

import atexit
import runpy
import sys


def _report(path: str) -> None:
    try:
        with open("/proc/self/status") as fh:
            kb = next(int(line.split()[1]) for line in fh if line.startswith("VmHWM:"))
    except (OSError, StopIteration):  # pragma: no cover - non-Linux
        import resource

        kb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    with open(path, "w") as fh:
        fh.write(str(kb))


def main() -> None:
    out, mode, target, *rest = sys.argv[1:]
    atexit.register(_report, out)
    if mode == "-m":
        sys.argv = [target, *rest]
        runpy.run_module(target, run_name="__main__", alter_sys=True)
    else:
        sys.argv = ["-c", *rest]
        exec(compile(target, "<bench>", "exec"), {"__name__": "__main__"})


if __name__ == "__main__":
    main()
