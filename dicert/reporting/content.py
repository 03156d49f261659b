"""Report content: the values a report shows, each tagged with its record key, and the
BibTeX entries of the references a record cites (pure functions of the parsed record)."""

from __future__ import annotations

import dataclasses
import hashlib
import re
from collections.abc import Mapping, Sequence
from decimal import ROUND_CEILING, Decimal
from typing import Any

from dicert._docview import _down, _exact, _fmt, _get, _num, _str
from dicert.errors import ParameterError

FORMATS = {"html": (".html", ".htm"), "md": (".md", ".markdown")}

#: No-signalling (algebraic) maximum of |CHSH| (Clauser, Horne, Shimony & Holt 1969).
CHSH_MAX = 4.0

_DASH = "\u2014"

#: What each error term bounds (the record names the terms; their meaning is the method's).
EPS_MEANING = {
    "eps_est": "estimation: probability that the CHSH confidence bound fails (Azuma-Hoeffding)",
    "eps_ext": "extraction: distance of the extractor's output from uniform given a source of "
               "that min-entropy (leftover hash lemma)",
    "eps_ea": "entropy accumulation: error of the finite-size entropy bound",
    "eps_s": "smoothing parameter of the min-entropy (purified distance)",
    "eps_pe": "probability estimation: error of the estimated probability bound",
    "eps_comp": "completeness: probability that honest devices are refused",
}


class ReportError(ParameterError):
    """A record that cannot be reported on, or an unsupported output format."""


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Fact:
    """One number or string of the report, with the record key it came from.

    ``kind``: ``digest`` / ``text`` (verbatim), ``int`` (exact integer), ``exact`` (float in
    full, shortest round-trip form), ``down`` (rounded down to ``decimals``), ``up`` (rounded
    up to ``decimals``), ``approx`` (a point estimate to 6 significant digits). ``key`` is a
    dotted record path, or two joined by `` / `` for a ratio.
    """

    label: str
    key: str
    kind: str
    value: Any
    text: str
    decimals: int = 0


# --------------------------------------------------------------------------- numbers


def _up(value: float | None, decimals: int) -> str:
    """A number written rounded UP (never optimistic for an error or a p-value)."""
    if value is None:
        return _DASH
    q = Decimal(value).quantize(Decimal(1).scaleb(-decimals), rounding=ROUND_CEILING)
    return f"{q:f}"


def _at(record: Any, path: str) -> Any:
    """The value at a dotted record path (list entries by index), or None."""
    cur = record
    for part in path.split("."):
        if isinstance(cur, list) and part.isdigit() and int(part) < len(cur):
            cur = cur[int(part)]
        elif isinstance(cur, Mapping) and part in cur:
            cur = cur[part]
        else:
            return None
    return cur


def _value(record: Mapping[str, Any], key: str) -> Any:
    if " / " in key:
        a, b = (_num(_at(record, k)) for k in key.split(" / "))
        return a / b if a is not None and b else None
    return _at(record, key)


def _fact(record: Mapping[str, Any], label: str, key: str, kind: str, decimals: int = 6) -> Fact:
    v = _value(record, key)
    if kind in ("digest", "text"):
        text = _DASH if v is None else ("yes" if v else "no") if isinstance(v, bool) else str(v)
    elif kind == "int":
        iv = v if isinstance(v, int) and not isinstance(v, bool) else None
        text = _fmt(iv)
    elif kind == "exact":
        text = str(v) if isinstance(v, int) and not isinstance(v, bool) else _exact(_num(v))
    elif kind == "down":
        text = _down(_num(v), decimals)
    elif kind == "up":
        text = _up(_num(v), decimals)
    elif kind == "approx":
        n = _num(v)
        text = _DASH if n is None else f"{n:.6g}"
    else:  # pragma: no cover - programming error
        raise ValueError(kind)
    return Fact(label=label, key=key, kind=kind, value=v, text=text, decimals=decimals)


# --------------------------------------------------------------------------- references


_REF = re.compile(
    r"^(?P<authors>.+?),\s+(?P<journal>[A-Z][A-Za-z.& ]*?)\s+(?P<volume>\d+),\s+"
    r"(?P<pages>[\w\-()]+)\s+\((?P<year>\d{4})\)(?P<rest>.*)$")


def _split_refs(text: str) -> list[str]:
    """One cited string may hold several works separated by '; ' (e.g. 'A ...; B ...')."""
    parts = re.split(r";\s+(?=[A-Z]\.\s)", text)
    return [p.strip() for p in parts if p.strip()]


def _bib_author(name: str) -> str:
    name = name.strip()
    if name == "et al.":
        return "others"
    m = re.match(r"^((?:[A-Z][a-z]?\.\s*-?)+)\s*(.+)$", name)
    return f"{m.group(2)}, {m.group(1).strip()}" if m else name


def _bib_escape(text: str) -> str:
    return text.replace("{", "").replace("}", "").replace("&", r"\&")


def bibtex_entries(references: Sequence[str]) -> list[tuple[str, str]]:
    """BibTeX entries for reference strings as records cite them ('A. B, C. D, Journal VOL,
    PAGES (YEAR)'): ``[(cited text, entry)]``. A string that does not parse becomes a
    ``@misc`` entry carrying it verbatim. Records cite no titles, so entries have none."""
    out: list[tuple[str, str]] = []
    keys: set[str] = set()
    for cited in references:
        for ref in _split_refs(str(cited)):
            m = _REF.match(ref)
            if m:
                raw = m.group("authors").replace(" et al.", ", et al.")
                names = [a for a in (x.strip() for x in raw.split(",")) if a]
                first = _bib_author(names[0]).split(",")[0]
                base = re.sub(r"[^a-z]", "", first.lower()) + m.group("year")
                fields = [("author", " and ".join(_bib_author(a) for a in names)),
                          ("journal", m.group("journal").strip()),
                          ("volume", m.group("volume")), ("pages", m.group("pages")),
                          ("year", m.group("year"))]
                rest = m.group("rest").strip(" ,;")
                if rest:
                    arxiv = re.search(r"arXiv:(\S+)", rest)
                    if arxiv:
                        fields.append(("eprint", arxiv.group(1).rstrip(".,")))
                        fields.append(("archivePrefix", "arXiv"))
                    fields.append(("note", rest))
                kind = "article"
            else:
                base = "ref" + hashlib.sha256(ref.encode()).hexdigest()[:8]
                fields = [("note", ref)]
                kind = "misc"
            key, n = base, 1
            while key in keys:
                n += 1
                key = f"{base}{chr(ord('a') + n - 1)}"
            keys.add(key)
            body = ",\n".join(f"  {k} = {{{_bib_escape(v)}}}" for k, v in fields)
            out.append((ref, f"@{kind}{{{key},\n{body}\n}}"))
    return out


def _references(record: Mapping[str, Any]) -> list[str]:
    refs: list[str] = []
    for path in ("references", "entropy.finite_size.references"):
        items = _get(record, path)
        if isinstance(items, list):
            refs.extend(str(x) for x in items if str(x) not in refs)
    sr = _get(record, "entropy.finite_size.details.single_round")
    if isinstance(sr, Mapping) and isinstance(sr.get("reference"), str):
        for r in _split_refs(sr["reference"]):
            if r not in refs and not any(r in x for x in refs):
                refs.append(r)
    return refs


# --------------------------------------------------------------------------- content


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class _Acceptance:
    statistic: Fact
    limit: Fact
    relation: str  # ">=" or "<="
    name: str
    passed: bool | None


def _acceptance(record: Mapping[str, Any]) -> _Acceptance | None:
    """The acceptance statistic of the finite-size method and its pre-declared limit."""
    d = "entropy.finite_size.details"
    accepted = _get(record, "entropy.finite_size.accepted")
    passed = accepted if isinstance(accepted, bool) else None
    for stat, limit, rel, name in (
            (f"{d}.chsh_estimate", f"{d}.chsh_threshold", ">=",
             "martingale estimate of the CHSH value"),
            (f"{d}.losses", f"{d}.count_limit", "<=", "number of lost CHSH games in test rounds"),
            (f"{d}.log2_t", f"{d}.threshold_log2", ">=",
             "log2 of the product of probability estimation factors")):
        if _num(_get(record, stat)) is not None and _num(_get(record, limit)) is not None:
            kind = "int" if rel == "<=" else "exact"
            return _Acceptance(statistic=_fact(record, "statistic", stat, kind),
                               limit=_fact(record, "limit (declared)", limit, kind),
                               relation=rel, name=name, passed=passed)
    return None


def _method_names(record: Mapping[str, Any]) -> tuple[str, str]:
    fin = _get(record, "entropy.finite_size") or {}
    method = _str(fin.get("method")) if isinstance(fin, Mapping) else None
    sr = _get(record, "entropy.finite_size.details.single_round")
    if isinstance(sr, Mapping):
        single = _str(sr.get("method")) or _DASH
    else:
        single = _str(sr) or _DASH
    return method or _DASH, single


def _summary(record: Mapping[str, Any]) -> str:
    """The job in one paragraph (plain text)."""
    status = _str(record.get("status")) or "unknown"
    proto = _str(_get(record, "protocol.name")) or "an unnamed protocol"
    method, single = _method_names(record)
    side = _str(_get(record, "entropy.finite_size.side_information")) or "unstated"
    files = _get(record, "log.files")
    nfiles = len(files) if isinstance(files, list) else 0
    trials = _get(record, "log.trials")
    tests = _get(record, "estimate.test_rounds")
    tool = _get(record, "tool") or {}
    parts = [
        f"{tool.get('name', 'dicert')} {tool.get('version', '')}".strip()
        + f" analysed a Bell-test log ({nfiles} file{'s' if nfiles != 1 else ''}, "
        f"{_fmt(trials)} trials, {_fmt(tests)} test rounds) under the protocol '{proto}', "
        f"with the finite-size method {method} (single-round bound {single}) against an "
        f"adversary holding {side} side information."]
    lower = _num(_get(record, "estimate.chsh_lower_bound"))
    if lower is not None:
        parts.append(f"The CHSH estimate is "
                     f"{_fmt(_num(_get(record, 'estimate.chsh_estimate')))} with a lower confidence "
                     f"bound of {_down(lower, 6)} (local bound 2).")
    if status == "certified":
        parts.append(
            f"The pre-declared acceptance test passed; the run certified "
            f"{_down(_num(record.get('certified_min_entropy_bits')), 3)} bits of certified "
            f"min-entropy and the Toeplitz extractor produced "
            f"{_fmt(_get(record, 'extractor.output_bits'))} output bits, with soundness "
            f"error {_exact(_num(_get(record, 'soundness_error')))}.")
    elif status == "aborted":
        parts.append(f"The protocol ABORTED: {_str(record.get('abort_reason')) or 'no reason'}"
                     ". No output bits are certified.")
    else:
        parts.append(f"Status: {status}"
                     + (f" ({_str(record.get('abort_reason'))})" if record.get('abort_reason')
                        else "") + ". The output was not released.")
    parts.append("The certificate holds only under the assumptions listed below.")
    return " ".join(parts)


def _sections(record: Mapping[str, Any]) -> list[tuple[str, list[Fact]]]:
    f = lambda *a, **k: _fact(record, *a, **k)  # noqa: E731
    data = [f("record (SHA-256 of the canonical body, RFC 8785)", "record_sha256", "digest"),
            f("record format", "format", "text"),
            f("status", "status", "text"),
            f("trial log (SHA-256 of the bytes analysed)", "log.sha256", "digest"),
            f("log coverage of the digest", "log.coverage", "text"),
            f("bytes analysed", "log.bytes_read", "int"),
            f("trials analysed", "log.trials", "int"),
            f("trials in the log", "log.trials_in_log", "int"),
            f("test rounds", "estimate.test_rounds", "int"),
            f("trials declared in the protocol", "design.trials.declared", "int"),
            f("where n came from", "design.trials.source", "text"),
            f("protocol", "protocol.name", "text"),
            f("protocol file (SHA-256)", "protocol.sha256", "digest"),
            f("previous record in the chain", "previous_record_sha256", "digest"),
            f("signing key fingerprint", "signature.key_fingerprint", "digest")]
    files = _get(record, "log.files")
    if isinstance(files, list):
        for i, item in enumerate(files):
            if isinstance(item, Mapping):
                data.append(f(f"file {i + 1}: name", f"log.files.{i}.name", "text"))
                data.append(f(f"file {i + 1}: bytes", f"log.files.{i}.bytes", "int"))
                data.append(f(f"file {i + 1}: SHA-256", f"log.files.{i}.sha256", "digest"))
    estimate = [f("CHSH estimate (point value)", "estimate.chsh_estimate", "approx"),
                f("its standard error", "estimate.chsh_stderr", "approx"),
                f("CHSH lower bound (rounded down)", "estimate.chsh_lower_bound", "down"),
                f("error of the confidence bound (eps_est)", "estimate.eps_est", "exact"),
                f("confidence bound method", "estimate.bound_method", "text"),
                f("CHSH-game win probability", "estimate.win_probability", "approx"),
                f("p-value of local realism (in full)", "estimate.p_value_local", "exact"),
                f("log10 of that p-value (rounded up)", "estimate.log10_p_value_local", "up",
                  decimals=2),
                f("p-value method", "estimate.p_value_method", "text"),
                f("test-round probability gamma", "estimate.gamma", "exact")]
    fin = "entropy.finite_size"
    sr = "entropy.single_round"
    entropy = [f("finite-size method", f"{fin}.method", "text"),
               f("single-round method", f"{fin}.details.single_round", "text"),
               f("single-round method", f"{fin}.details.single_round.method", "text"),
               f("single-round reference", f"{fin}.details.single_round.reference", "text"),
               f("side information", f"{fin}.side_information", "text"),
               f("certified min-entropy, bits (rounded down)",
                 "certified_min_entropy_bits", "down", decimals=3),
               f("certified rate, bits per trial (rounded down)",
                 "certified_min_entropy_bits / log.trials", "down", decimals=6),
               f("min-entropy if accepted, bits (rounded down)",
                 f"{fin}.details.min_entropy_if_accepted_bits", "down", decimals=3),
               *_charge_facts(f),
               f("entropy error", f"{fin}.entropy_error", "exact"),
               f("smoothing parameter", f"{fin}.smoothing_eps", "exact"),
               f("single-round min-entropy bound", f"{sr}.bound_min_entropy", "text"),
               f("single-round von Neumann bound", f"{sr}.bound_von_neumann", "text"),
               f("single-round bound at the CHSH lower bound, bits (rounded down)",
                 f"{sr}.single_round_bound_bits_at_chsh_lower_bound", "down"),
               f("single-round von Neumann bound at the CHSH lower bound, bits (rounded down)",
                 f"{sr}.von_neumann_bound_bits_at_chsh_lower_bound", "down")]
    output = [f("output bits", "extractor.output_bits", "int"),
              f("output file", "bits_file", "text"),
              f("output (SHA-256)", "extractor.output_sha256", "digest"),
              f("extractor", "extractor.kind", "text"),
              f("output rule", "extractor.output_rule", "text"),
              f("extractor error", "extractor.eps_ext", "exact"),
              f("raw bits harvested", "extractor.raw_bits", "int"),
              f("raw bits (SHA-256)", "extractor.raw_sha256", "digest"),
              f("harvested parties", "harvest.parties", "text"),
              f("harvest selection", "harvest.select", "text"),
              f("seed bytes supplied", "extractor.seed_bytes", "int"),
              f("seed bits used (n + m - 1)", "extractor.seed_bits", "int"),
              f("seed (SHA-256)", "extractor.seed_sha256", "digest"),
              f("output screens passed", "output_screens.passed", "text")]
    return [("data", [x for x in data if x.value is not None or x.kind == "digest"]),
            # a p-value of 0 is an underflow: its log10 (next row) is the number to quote
            ("estimate", [x for x in estimate if x.value is not None
                          and not (x.key == "estimate.p_value_local" and x.value == 0)]),
            ("entropy", [x for x in entropy if x.value is not None
                         and not isinstance(x.value, Mapping)]),
            ("output", [x for x in output if x.value is not None])]


def _charge_facts(f: Any) -> list[Fact]:
    """What trials dropped by a station join cost (record ``log.spec.join.charge``)."""
    ch = "log.spec.join.charge"
    return [f("trials dropped by the station join, each charged as a lost test round",
              f"{ch}.dropped_trials", "int"),
            f("raw bits of the dropped trials, subtracted", f"{ch}.raw_bits_subtracted", "int"),
            f("drop-pattern bits, subtracted (rounded up)", f"{ch}.pattern_bits", "up",
              decimals=3),
            f("station-join charge in total, bits (rounded up)", f"{ch}.total_bits", "up",
              decimals=3),
            f("CHSH lower bound of the trials kept, before the charge (rounded down)",
              f"{ch}.uncharged_estimate.chsh_lower_bound", "down")]


def _eps_facts(record: Mapping[str, Any]) -> tuple[list[tuple[Fact, str]], Fact | None, str]:
    """The error budget's terms (each with its meaning), the soundness error and what it
    means (records of earlier formats are read through record_compat)."""
    terms = _get(record, "error_budget.terms")
    rows = []
    if isinstance(terms, list):
        for i, term in enumerate(terms):
            if not isinstance(term, Mapping):
                continue
            name = str(term.get("name", _DASH))
            meaning = term.get("meaning")
            rows.append((_fact(record, name, f"error_budget.terms.{i}.value", "exact"),
                         str(meaning) if isinstance(meaning, str)
                         else EPS_MEANING.get(name, "as named in the record")))
    total = _fact(record, "soundness error", "soundness_error", "exact") \
        if _num(_get(record, "soundness_error")) is not None else None
    return rows, total, _str(_get(record, "error_budget.meaning")) or ""


def _assumption_groups(record: Mapping[str, Any]) -> list[tuple[str, list[str]]]:
    groups, seen = [], set()
    for path, title in (("assumptions", "Assumptions of the certificate"),
                        ("entropy.finite_size.assumptions",
                         "Further assumptions of the finite-size method"),
                        ("design.assumed", "Assumed, not checkable on the data (design)")):
        items = _get(record, path)
        if isinstance(items, list):
            fresh = [str(x) for x in items if str(x) not in seen]
            seen.update(fresh)
            if fresh:
                groups.append((title, fresh))
    return groups


def _design_rows(record: Mapping[str, Any]) -> list[dict[str, str]] | None:
    design = record.get("design")
    if not isinstance(design, Mapping):
        return None
    rows = []
    for i, c in enumerate(design.get("checks") or []):
        if not isinstance(c, Mapping):
            continue
        passed = c.get("passed")
        verdict = "passed" if passed is True else "FAILED" if passed is False else _DASH
        if c.get("applicable") is False:
            verdict = "not applicable"
        p = _num(c.get("p_value"))
        rows.append({"name": str(c.get("name", _DASH)), "key": f"design.checks.{i}",
                     "statistic": _fmt(c.get("statistic") if isinstance(c.get("statistic"), int)
                                       else _num(c.get("statistic"))),
                     "p_value": _DASH if p is None else _exact(p),
                     "threshold": _exact(_num(c.get("threshold"))), "result": verdict,
                     "meaning": str(c.get("meaning", "")),
                     "reference": str(c.get("reference", ""))})
    return rows


