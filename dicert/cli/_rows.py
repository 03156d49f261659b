"""One row model for command output: the same rows make the table (people) and the
``--json`` object (machines).

A command builds a list of :class:`Row` (label, JSON key, value, kind). :func:`render` draws
them as a two-column rich table, every value written by :func:`dicert._format.fmt` for its
kind, with folding columns so that no digest is ever cut (also when the output is piped at
80 columns); :func:`to_json` puts every keyed row's value, unrounded, at its key in a JSON
object. Labels and keys are the README glossary's names.

A key is a dotted path (``error_budget.terms.0.value``: a digit is a list index). A row
without a key is table-only prose (a file name, a note); every number has a key.
"""

from __future__ import annotations

import dataclasses
from typing import Any

from dicert._format import fmt


@dataclasses.dataclass(frozen=True, slots=True)
class Row:
    """One line of a table and one member of the JSON object.

    ``record`` is the dotted path of the same value in the audit record (or None), so the
    tests can check table, JSON and record against each other; ``note`` is shown after the
    value in the table only (words, never a number the JSON lacks).
    """

    label: str
    key: str | None
    value: Any
    kind: str = "text"
    note: str = ""
    record: str | None = None

    @property
    def text(self) -> str:
        body = fmt(self.value, self.kind)
        return f"{body} ({self.note})" if self.note else body


def get_path(obj: Any, path: str) -> Any:
    """The value at a dotted path of a JSON object (digits index lists), or None."""
    cur = obj
    for part in path.split("."):
        if isinstance(cur, list) and part.isdigit() and int(part) < len(cur):
            cur = cur[int(part)]
        elif isinstance(cur, dict) and part in cur:
            cur = cur[part]
        else:
            return None
    return cur


def _set_path(obj: dict, path: str, value: Any) -> None:
    parts = path.split(".")
    cur: Any = obj
    for i, part in enumerate(parts):
        last = i == len(parts) - 1
        nxt: Any = None if last else ([] if parts[i + 1].isdigit() else {})
        if isinstance(cur, list):
            j = int(part)
            while len(cur) <= j:
                cur.append(None)
            if last:
                cur[j] = value
            else:
                if cur[j] is None:
                    cur[j] = nxt
                cur = cur[j]
        else:
            if last:
                cur[part] = value
            else:
                cur = cur.setdefault(part, nxt)


def to_json(rows: list[Row], extra: dict | None = None) -> dict:
    """The JSON object of ``rows`` (each keyed row's value at its key), plus ``extra``."""
    out: dict = dict(extra or {})
    for r in rows:
        if r.key is not None:
            _set_path(out, r.key, r.value)
    return out


def table(title: str, rows: list[Row]):
    """A two-column rich table of ``rows``; both columns fold, so nothing is cut. Cells are
    plain text (no markup, no highlighting): values verbatim."""
    from rich.table import Table
    from rich.text import Text

    tab = Table(title=Text(title), show_header=False, title_justify="left")
    tab.add_column("quantity", style="bold", overflow="fold")
    tab.add_column("value", overflow="fold")
    for r in rows:
        tab.add_row(Text(r.label, style="bold"), Text(r.text))
    return tab


def render(console: Any, title: str, rows: list[Row]) -> None:
    """Print ``rows`` as a table on ``console``."""
    console.print(table(title, rows))


# --------------------------------------------------------------------------- record rows

#: The acceptance test of each finite-size method, as the record's details name it:
#: (statistic, pre-declared limit, relation that accepts, what the statistic is).
_ACCEPTANCE = (
    ("chsh_estimate", "chsh_threshold", ">=", "weighted CHSH estimate"),
    ("losses", "count_limit", "<=", "lost CHSH games in test rounds"),
    ("log2_t", "threshold_log2", ">=", "log2 of the product of probability estimation factors"),
)

#: Per method: where the record keeps the single-round bound (bits per trial) it used.
_SINGLE_ROUND = ("entropy_per_round_bits", "min_tradeoff_h")


def _num(v: Any) -> float | None:
    import math

    if isinstance(v, bool) or not isinstance(v, (int, float)):
        return None
    return float(v) if math.isfinite(v) else None


def weighted_estimate_path(rec: dict) -> str:
    """Record path of the weighted (martingale) CHSH estimate, in every record format.

    Up to ``dicert-record/3`` ``estimate.chsh_estimate`` is the ratio estimate and the
    weighted one is ``estimate.chsh_martingale``; from ``/4`` on (where the ratio estimate
    is ``chsh_ratio_estimate``) ``estimate.chsh_estimate`` is the weighted one.
    """
    est = rec.get("estimate") or {}
    if "chsh_ratio_estimate" not in est and "chsh_martingale" in est:
        return "estimate.chsh_martingale"
    return "estimate.chsh_estimate"


def ratio_estimate_path(rec: dict) -> str:
    est = rec.get("estimate") or {}
    return ("estimate.chsh_ratio_estimate" if "chsh_ratio_estimate" in est
            else "estimate.chsh_estimate")


def acceptance(rec: dict) -> dict | None:
    """The acceptance test as the record states it: statistic, limit, relation, accepted."""
    fin = (rec.get("entropy") or {}).get("finite_size") or {}
    det = fin.get("details") or {}
    acc = fin.get("accepted")
    for stat, limit, rel, name in _ACCEPTANCE:
        s, lim = _num(det.get(stat)), _num(det.get(limit))
        if s is not None and lim is not None:
            return {"statistic": det[stat], "limit": det[limit], "relation": rel, "name": name,
                    "statistic_path": f"entropy.finite_size.details.{stat}",
                    "limit_path": f"entropy.finite_size.details.{limit}",
                    "accepted": acc if isinstance(acc, bool) else None}
    return None


def record_rows(rec: dict) -> list[Row]:
    """The numbers a paper quotes from a certification record (upgraded to today's names
    by ``record_compat``), in glossary names; ``Row.record`` names each one's record path."""
    est = rec.get("estimate") or {}
    log = rec.get("log") or {}
    fin = (rec.get("entropy") or {}).get("finite_size") or {}
    det = fin.get("details") or {}
    rows = [Row("status", "status", rec.get("status"), "text", record="status")]
    if fin.get("method"):
        rows.append(Row("method", "method", fin["method"], "text",
                        note=f"{fin.get('side_information')} side information"))
    trials = log.get("trials")
    rows += [Row("trials", "trials", trials, "count", record="log.trials"),
             Row("test rounds", "test_rounds", est.get("test_rounds"), "count",
                 record="estimate.test_rounds"),
             Row("gamma", "gamma", est.get("gamma"), "number", record="estimate.gamma")]
    wp = weighted_estimate_path(rec)
    rows.append(Row("CHSH estimate", "chsh_estimate", get_path(rec, wp), "chsh", record=wp,
                    note="weighted, martingale"))
    eps_est = est.get("eps_est")
    rows.append(Row("CHSH lower bound", "chsh_lower_bound", est.get("chsh_lower_bound"),
                    "lower", record="estimate.chsh_lower_bound",
                    note=f"at eps_est = {fmt(eps_est, 'error')}"))
    rows.append(Row("eps_est", "eps_est", eps_est, "error", record="estimate.eps_est"))
    p = est.get("p_value_local")
    if p == 0 and est.get("log10_p_value_local") is not None:
        rows.append(Row("p-value (local devices)", "p_value_local", p, "error",
                        record="estimate.p_value_local", note="below the smallest float"))
    else:
        rows.append(Row("p-value (local devices)", "p_value_local", p, "error",
                        record="estimate.p_value_local"))
    if est.get("log10_p_value_local") is not None:
        rows.append(Row("log10 p-value (local devices)", "log10_p_value_local",
                        est["log10_p_value_local"], "upper",
                        record="estimate.log10_p_value_local"))
    acc = acceptance(rec)
    if acc is not None:
        rows += [
            Row("acceptance statistic", "acceptance_statistic", acc["statistic"], "exact",
                record=acc["statistic_path"], note=acc["name"]),
            Row("acceptance limit", "acceptance_limit", acc["limit"], "exact",
                record=acc["limit_path"],
                note=f"pre-declared; accepted if statistic {acc['relation']} limit"),
            Row("accepted", "accepted", acc["accepted"], "flag",
                record="entropy.finite_size.accepted"),
        ]
    else:  # aborted before the acceptance test (e.g. a failed design check)
        rows += [Row("acceptance statistic", "acceptance_statistic", None, "exact",
                     note="acceptance test not reached"),
                 Row("acceptance limit", "acceptance_limit", None, "exact"),
                 Row("accepted", "accepted", fin.get("accepted")
                     if isinstance(fin.get("accepted"), bool) else None, "flag",
                     record="entropy.finite_size.accepted"
                     if isinstance(fin.get("accepted"), bool) else None)]
    single = next((k for k in _SINGLE_ROUND if _num(det.get(k)) is not None), None)
    rows.append(Row("single-round bound (bits)", "single_round_bound_bits",
                    det[single] if single else None, "bits",
                    record=f"entropy.finite_size.details.{single}" if single else None,
                    note="per trial" if single
                    else "not reached" if det.get("not_run") or not fin.get("method")
                    else "none: the method certifies without a single-round bound"))
    cme = rec.get("certified_min_entropy_bits")
    rows.append(Row("certified min-entropy (bits)", "certified_min_entropy_bits", cme, "bits",
                    record="certified_min_entropy_bits"))
    if _num(cme) is not None and isinstance(trials, int) and trials > 0:
        rows.append(Row("certified rate (bits per trial)", "certified_rate_bits_per_trial",
                        float(cme) / trials, "bits"))
    return rows + _output_rows(rec)


def _output_rows(rec: dict) -> list[Row]:
    """Raw, output and seed bits, the error budget term by term and every digest."""
    ext = rec.get("extractor") or {}
    rows = [Row("raw bits", "raw_bits", ext.get("raw_bits"), "count",
                record="extractor.raw_bits"),
            Row("output bits", "output_bits", ext.get("output_bits"), "count",
                record="extractor.output_bits"),
            Row("seed bits", "seed_bits", ext.get("seed_bits"), "count",
                record="extractor.seed_bits", note="raw bits + output bits - 1 used"
                if ext.get("output_bits") else "none: no output")]
    charge = get_path(rec, "log.spec.join.charge")
    if isinstance(charge, dict):  # a station join that dropped trials: what they cost
        c = "log.spec.join.charge."
        rows += [Row("dropped trials (station join)", "join_charge.dropped_trials",
                     charge.get("dropped_trials"), "count", record=c + "dropped_trials",
                     note="each counted as a lost test round in the estimate above"),
                 Row("raw bits subtracted", "join_charge.raw_bits_subtracted",
                     charge.get("raw_bits_subtracted"), "count",
                     record=c + "raw_bits_subtracted"),
                 Row("drop-pattern bits subtracted", "join_charge.pattern_bits",
                     charge.get("pattern_bits"), "upper", record=c + "pattern_bits")]
    budget = rec.get("error_budget") or {}
    for i, term in enumerate(budget.get("terms") or []):
        if isinstance(term, dict):
            rows.append(Row(f"error budget: {term.get('name')}",
                            f"error_budget.terms.{i}.value", term.get("value"), "error",
                            record=f"error_budget.terms.{i}.value",
                            note=str(term.get("meaning") or "")))
    rows.append(Row("soundness error", "soundness_error", rec.get("soundness_error"), "error",
                    record="soundness_error", note=str(budget.get("meaning") or "")))
    for label, key, path in (("log SHA-256", "log_sha256", "log.sha256"),
                             ("protocol SHA-256", "protocol_sha256", "protocol.sha256"),
                             ("raw bits SHA-256", "raw_sha256", "extractor.raw_sha256"),
                             ("output SHA-256", "output_sha256", "extractor.output_sha256"),
                             ("seed SHA-256", "seed_sha256", "extractor.seed_sha256"),
                             ("record SHA-256", "record_sha256", "record_sha256"),
                             ("key fingerprint", "key_fingerprint",
                              "signature.key_fingerprint")):
        rows.append(Row(label, key, get_path(rec, path), "digest", record=path))
    return rows


def record_json(rec: dict, rows: list[Row]) -> dict:
    """The JSON members that go with :func:`record_rows` besides the rows' numbers: the
    error budget whole and the acceptance test's words (what the table's notes say)."""
    import copy

    out: dict = {}
    budget = rec.get("error_budget")
    if isinstance(budget, dict):
        out["error_budget"] = copy.deepcopy(budget)
    acc = acceptance(rec)
    out["acceptance_test"] = None if acc is None else {
        "statistic_name": acc["name"], "relation": acc["relation"],
        "statistic_key": acc["statistic_path"], "limit_key": acc["limit_path"]}
    return out
