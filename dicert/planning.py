"""Planning before an experiment: how many trials, which test-round probability, what output.

:func:`plan` takes a protocol (or the same pieces as plain objects) and the expected quality
of honest devices, and reports for each finite-size method that applies: the certified
min-entropy and extractable output on acceptance, the seed the protocol consumes, the net
expansion, the probability that honest devices abort, the smallest number of trials with a
positive output and with a positive net expansion, and the test-round probability gamma that
maximises the net output at the given number of trials.

Conventions
-----------
- The protocol's own method is evaluated with its declared thresholds ("declared"). The other
  methods are evaluated with thresholds DERIVED for the same honest quality and a
  completeness target (the protocol's eps_comp, else 1e-6), labelled "derived": martingale
  S_th = S_honest - (8/gamma) sqrt(ln(1/eps_comp)/(2n)) (Hoeffding); entropy accumulation with
  the tolerance from the exact binomial tail. Error parameters are taken from the protocol.
- Output on acceptance m = floor(k - 2 log2(1/eps_ext)) (leftover hash lemma, conservative).
- Seed consumed by the protocol: n (h2(gamma) + 2 gamma) bits for spot-checking (interval
  algorithm for the test flags, two uniform bits per test round; Han & Hoshi 1997), 2n bits
  when every round is a test round with uniform settings. The strong extractor's seed is
  returned, so it is not counted. Net = m - seed.
- Abort probability of honest i.i.d. devices: exact binomial tail for entropy accumulation
  (scipy.stats.binom); an optimised Chernoff upper bound for the martingale estimator and for
  probability estimation.

Probability estimation factors (PEFs, method "pef", classical side information)
--------------------------------------------------------------------------------
- Device quality: with --chsh / --win-probability / --visibility, the isotropic box (the
  Tsirelson box mixed with white noise) of that CHSH value; otherwise, for a PEF protocol, the
  anticipated box it declares (calibration "isotropic" or "table"), else the photonic
  Eberhard-type model of :func:`dicert.simulate.device_model` ("photonic": r = 2.918,
  detector efficiency 0.76, outcome 1 = click). ``PlanResult.device`` says which.
- A PEF run stops at the first trial where log2 T >= beta sigma_target + log2(1/eps_pe); the
  output on success is floor(k - 2 log2(1/eps_ext)) with k = sigma_target - 1. ``trials`` is
  the cap on analysis trials (the protocol's n_max by default). The trials consumed are the
  calibration prefix plus min(expected stopping trial, cap), with the expected stopping trial
  (beta sigma_target + log2(1/eps_pe)) / E[log2 F] (Wald's identity, up to the overshoot of the
  last factor); seed and ``output_bits_per_trial`` are per trial consumed.
- The protocol's own PEF row ("declared") uses its beta and target; ``pef.beta_chosen`` is the
  beta minimising the expected trials for that target (:func:`dicert.finite.pef.plan_pef`), with
  its expected trials and the trials for 99% completeness (normal approximation;
  Knill, Zhang & Bierhorst, Phys. Rev. Research 2, 033465 (2020)). For CHSH protocols a PEF row is added with DERIVED parameters: model "ns", the
  protocol's settings distribution, and the largest target whose honest abort probability
  within ``trials`` is at most eps_comp (Chernoff bound), beta chosen for it on a log grid.
  The plotted curve, the smallest numbers of trials and the best gamma of every PEF row use
  that derived target.
- The anticipated box fixes the PEF here; a "prefix" protocol fits it from its calibration
  trials instead, which can only cost rate.
- A local box (no PEF has positive expected log2 F) certifies nothing: by the PEF inequality at
  the local vertices T is a test supermartingale, so such devices succeed with probability at
  most 2^-(beta sigma_target) eps_pe, which is a soundness failure and not an output.

References
----------
.. [1] P. J. Brown, S. Ragy, R. Colbeck, IEEE Trans. Inf. Theory 66, 2964 (2020) (seed
   accounting of spot-checking protocols).
.. [2] T. S. Han, M. Hoshi, "Interval algorithm for random number generation", IEEE Trans.
   Inf. Theory 43, 599 (1997).
.. [3] H. Chernoff, Ann. Math. Stat. 23, 493 (1952).
.. [4] E. Knill, Y. Zhang, P. Bierhorst, "Generation of quantum randomness by probability
   estimation with classical side information", Phys. Rev. Research 2, 033465 (2020).
.. [5] Y. Zhang, E. Knill, P. Bierhorst, "Certifying quantum randomness by probability
   estimation", Phys. Rev. A 98, 040304(R) (2018).
.. [6] A. Wald, "On cumulative sums of random variables", Ann. Math. Stat. 15, 283 (1944).
"""

from __future__ import annotations

import dataclasses
import math
import os
import types
from collections.abc import Mapping
from typing import Any

import numpy as np

from dicert._display import displayed
from dicert.entropy.analytic import W_QUANTUM
from dicert.errors import ParameterError
from dicert.finite.params import EatParams, MartingaleParams
from dicert.plan_models import (  # noqa: F401 (also re-exported: the old import path)
    N_SWEEP,
    PEF_BETAS,
    PEF_COMPLETENESS,
    PEF_DERIVED_LAM,
    PEF_GAMMA_POINTS,
    PEF_THETAS,
    PefPlanDetails,
    _Eval,
    _MethodModel,
    _PefModel,
    _log_mgf,
    _min_trials,
    _output_bits,
    _pef_default_box,
    _pef_stats,
    _plan_pef_cached,
    _settings,
    _unscored_trials,
    chernoff_reachable_threshold,
    chernoff_shortfall_bound,
    honest_quality,
    martingale_abort_bound,
    seed_bits_consumed,
)
from dicert.protocol import MAX_INTEGER, MIN_GAMMA

DEFAULT_TRIALS = 10**7
DEFAULT_EPS_COMP = 1e-6
GAMMA_SWEEP = (1e-4, 1.0)


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PlanMethod:
    """One method's plan at the given number of trials and gamma.

    ``pef`` carries the PEF specifics for method "pef" rows (None for the others). Field names
    follow the README glossary: ``seed_bits`` is the extractor seed to provision (raw bits +
    output bits - 1), ``settings_randomness_bits`` the random bits spent on choosing settings
    (called ``seed_bits`` before version 0.2 of this class; the other former names remain as
    read-only aliases).
    """

    name: str
    side_information: str
    thresholds: str  # "declared" | "derived"
    parameters: dict[str, Any]
    certified_min_entropy_bits: float
    output_bits: int  # extractable output on acceptance
    output_bits_per_trial: float  # output_bits / trials
    settings_randomness_bits: float  # random bits spent on choosing settings
    net_bits: float
    abort_probability: float
    abort_probability_kind: str
    min_trials_positive: int | None
    min_trials_net_positive: int | None
    best_gamma: float | None
    best_gamma_net_bits: float | None
    curve_trials: tuple[float, ...]
    curve_output_bits: tuple[float, ...]
    pef: PefPlanDetails | None = None
    # Extractor input at these trials (at most; the raw bits the extractor may read) and the
    # Toeplitz seed it needs, n_raw + m - 1 bits (0 when m = 0); a beacon provisions this.
    raw_bits: int = 0
    seed_bits: int = 0
    seed_bytes: int = 0
    # The output at best_gamma (same trials), and the gamma trade-off sweep behind it.
    best_gamma_output_bits: int | None = None
    best_gamma_abort_probability: float | None = None
    best_gamma_seed_bits: int | None = None
    gamma_sweep: tuple[float, ...] = ()
    gamma_sweep_output_bits: tuple[int, ...] = ()
    gamma_sweep_net_bits: tuple[float, ...] = ()
    gamma_sweep_abort_probability: tuple[float, ...] = ()

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("name", self.name), ("output_bits", self.output_bits),
                ("net_bits", self.net_bits), ("abort_probability", self.abort_probability)]
        if full:
            rows += [("side_information", self.side_information),
                     ("certified_min_entropy_bits", self.certified_min_entropy_bits),
                     ("output_bits_per_trial", self.output_bits_per_trial),
                     ("settings_randomness_bits", self.settings_randomness_bits),
                     ("min_trials_positive", self.min_trials_positive),
                     ("min_trials_net_positive", self.min_trials_net_positive),
                     ("best_gamma", self.best_gamma)]
        return rows

    # Names of earlier versions (read-only); ``seed_bits`` changed meaning (see above).
    min_entropy_bits = property(lambda self: self.certified_min_entropy_bits)
    certified_bits = property(lambda self: self.output_bits)
    rate_per_trial = property(lambda self: self.output_bits_per_trial)
    extractor_seed_bits = property(lambda self: self.seed_bits)
    extractor_seed_bytes = property(lambda self: self.seed_bytes)
    best_gamma_certified_bits = property(lambda self: self.best_gamma_output_bits)
    best_gamma_extractor_seed_bits = property(lambda self: self.best_gamma_seed_bits)
    curve_certified_bits = property(lambda self: self.curve_output_bits)
    gamma_sweep_certified_bits = property(lambda self: self.gamma_sweep_output_bits)


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PlanResult:
    """What :func:`plan` reports. JSON keys follow the field names."""

    protocol: str
    trials: int
    trials_source: str
    gamma: float
    device: str
    win_probability: float
    chsh: float
    eps_ext: float
    eps_comp: float
    methods: tuple[PlanMethod, ...]
    min_trials_positive: dict[str, int | None]
    min_trials_net_positive: dict[str, int | None]
    best_gamma: dict[str, float | None]
    notes: tuple[str, ...]

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("protocol", self.protocol), ("trials", self.trials), ("gamma", self.gamma),
                ("chsh", self.chsh),
                ("output_bits", {m.name: m.output_bits for m in self.methods})]
        if full:
            rows[-1:] = [("device", self.device), ("trials_source", self.trials_source),
                         ("eps_ext", self.eps_ext)]
            for m in self.methods:
                rows += [(f"{m.name}: output_bits", m.output_bits),
                         (f"{m.name}: net bits (after seed)", m.net_bits),
                         (f"{m.name}: abort probability", m.abort_probability),
                         (f"{m.name}: min trials, net positive", m.min_trials_net_positive)]
        return rows


def _models(protocol: Any, win: float, eps_comp: float,
            box: np.ndarray) -> list[_MethodModel | _PefModel]:
    method = getattr(protocol, "method", None)
    analysis = getattr(protocol, "analysis", None)
    eps_ext = float(protocol.extractor.eps_ext)
    harvest = getattr(protocol, "harvest", None)
    # Error parameters shared with derived methods: the declared method's entropy error.
    if isinstance(analysis, MartingaleParams):
        err = analysis.eps_est
        eps_s = eps_ea = analysis.eps_est
    elif isinstance(analysis, EatParams):
        err = analysis.eps_ea
        eps_s, eps_ea = analysis.eps_s, analysis.eps_ea
    else:
        err = float(getattr(analysis, "eps_pe", None) or getattr(analysis, "eps_PE", None)
                    or 1e-8)
        eps_s = eps_ea = err
    models: list[_MethodModel | _PefModel] = []
    if method == "martingale" and isinstance(analysis, MartingaleParams):
        models.append(_MethodModel("martingale-azuma", "classical", "declared", win, eps_ext,
                                   eps_comp, mart=analysis, harvest=harvest))
    else:
        models.append(_MethodModel("martingale-azuma", "classical", "derived", win, eps_ext,
                                   eps_comp, mart=MartingaleParams(chsh_threshold=2.5,
                                                                   eps_est=err),
                                   harvest=types.SimpleNamespace(parties="AB", select="all")))
    for variant in ("df-conservative", "dfr"):
        if method == "eat" and isinstance(analysis, EatParams) and analysis.variant == variant:
            p = dataclasses.replace(analysis, rounds=None)
            models.append(_MethodModel(p.method_name, "quantum", "declared", win, eps_ext,
                                       eps_comp, eat=p))
            continue
        if method == "eat" and isinstance(analysis, EatParams):
            p = dataclasses.replace(analysis, variant=variant, rounds=None)
            models.append(_MethodModel(p.method_name, "quantum", "declared-switched", win,
                                       eps_ext, eps_comp, eat=p))
            continue
        if win <= 0.75:
            continue
        p = EatParams(variant=variant, expected_win_probability=win, eps_comp=eps_comp,
                      eps_s=eps_s, eps_ea=eps_ea)
        models.append(_MethodModel(p.method_name, "quantum", "derived", win, eps_ext,
                                   eps_comp, eat=p))
    # The same EAT engines with the other single-round bound: the certified Gauss-Radau
    # quadrature lines on H(AB|X,Y,E) (Brown, Fawzi & Fawzi 2024), or back to the analytic G.
    declared_eat = method == "eat" and isinstance(analysis, EatParams)
    other = ("analytic-vn-A" if declared_eat and analysis.single_round == "radau-vn-AB"
             else "radau-vn-AB")
    for variant in ("df-conservative", "dfr"):
        if declared_eat:
            p = dataclasses.replace(analysis, variant=variant, rounds=None, single_round=other)
            how = "declared" if variant == analysis.variant else "declared-switched"
        elif win <= 0.75:
            continue
        else:
            p = EatParams(variant=variant, expected_win_probability=win, eps_comp=eps_comp,
                          eps_s=eps_s, eps_ea=eps_ea, single_round=other)
            how = "derived"
        models.append(_MethodModel(p.method_name, "quantum", how, win, eps_ext, eps_comp,
                                   eat=p))
    design = getattr(protocol, "design", None)
    generation = tuple(getattr(design, "generation", (0, 0)))
    if method == "pef":
        models.append(_PefModel(box, eps_ext, eps_comp, declared=analysis,
                                generation=generation))
    else:
        # Derived PEF row: classical side information, no-signalling model, the protocol's
        # settings distribution, the declared method's error as eps_pe.
        models.append(_PefModel(box, eps_ext, eps_comp, eps_pe=err, generation=generation))
    return models


# long: about 120 lines, 30 of them docstring: the defaults taken from the
# protocol, the models (dicert.plan_models), then one row per model; no numerics of its own.
def plan(protocol: Any, *, chsh: float | None = None, win_probability: float | None = None,
         visibility: float | None = None, trials: int | None = None,
         gamma: float | None = None, n_points: int = 30, gamma_points: int = 30,
         eps_comp: float | None = None) -> PlanResult:
    """Plan an experiment under ``protocol`` for honest devices of the given quality.

    Parameters
    ----------
    protocol : Protocol or object with ``name``, ``method``, ``analysis``, ``design``,
        ``harvest``, ``extractor`` (``eps_ext``)
        The protocol to plan for.
    chsh, win_probability, visibility : float, optional
        At most one: the honest devices' quality, i.e. the isotropic box of that CHSH value
        (default: the protocol's expectation; for a PEF protocol its anticipated box, else the
        photonic model of :func:`dicert.simulate.device_model`).
    trials : int, optional
        Number of trials (default: the protocol's ``[design] trials``, for a PEF protocol its
        ``n_max``, else 1e7). For PEF rows, the cap on analysis trials.
    gamma : float, optional
        Test-round probability (default: the protocol's).
    eps_comp : float, optional
        Completeness target of the derived thresholds (default: the protocol's, else 1e-6).
        The protocol's own error parameters: :func:`with_error_parameters`.
    n_points, gamma_points : int
        Sizes of the trial-number sweep (plotted curve) and of the gamma sweep (at most
        :data:`PEF_GAMMA_POINTS` for PEF rows, which need new PEFs per gamma).

    Returns
    -------
    PlanResult

    References
    ----------
    Brown, Ragy & Colbeck (2020); Han & Hoshi (1997); Chernoff (1952); Knill, Zhang & Bierhorst
    (2020); Zhang, Knill & Bierhorst (2018). See the module docstring.
    """
    from dicert.finite.pef import box_from_chsh

    if isinstance(protocol, (str, os.PathLike, Mapping)):  # a file or the tables, as certify
        from dicert.protocol import load_protocol

        protocol = load_protocol(protocol)
    analysis = getattr(protocol, "analysis", None)
    is_pef = getattr(protocol, "method", None) == "pef"
    default_win = None
    if isinstance(analysis, EatParams):
        default_win = analysis.expected_win_probability
    elif isinstance(analysis, MartingaleParams) and analysis.expected_chsh is not None:
        default_win = 0.5 + analysis.expected_chsh / 8.0
    if is_pef and chsh is None and win_probability is None and visibility is None:
        box, device = _pef_default_box(analysis)
        # CHSH-game win probability with uniform settings: sum_z (1/4) P(a xor b = xy | z).
        # Clamped to the quantum maximum (float rounding, or a super-quantum declared box).
        win = min(W_QUANTUM, float(sum(0.25 * box[z, c] for z in range(4) for c in range(4)
                                       if ((c >> 1) ^ (c & 1)) == ((z >> 1) & (z & 1)))))
    else:
        win = honest_quality(chsh=chsh, win_probability=win_probability,
                             visibility=visibility, default_win=default_win)
        box = box_from_chsh(8.0 * win - 4.0)
        device = (f"isotropic box (Tsirelson box mixed with white noise), CHSH "
                  f"{8.0 * win - 4.0:.6g}")
    design = getattr(protocol, "design", None)
    g = float(gamma if gamma is not None else getattr(design, "gamma", 1.0))
    if not (math.isfinite(g) and MIN_GAMMA <= g <= 1.0):
        raise ParameterError(f"--gamma must lie in [{MIN_GAMMA:g}, 1], got {gamma!r}")
    source = "given"
    if trials is None:
        from dicert.design import declared_trials

        declared = (getattr(analysis, "n_max", None) if is_pef
                    else declared_trials(protocol))
        trials, source = (declared, "protocol") if declared else (DEFAULT_TRIALS, "default")
    if (isinstance(trials, bool) or not math.isfinite(trials) or int(trials) != trials
            or not 1 <= trials <= MAX_INTEGER):
        # Bounded so that every count stays exact in double precision and in the record.
        raise ParameterError(f"--trials must be an integer in [1, 2**53 - 1], got {trials!r}")
    n = int(trials)
    if eps_comp is not None and not (math.isfinite(eps_comp) and 0.0 < eps_comp < 1.0):
        raise ParameterError(f"--eps-comp must lie in (0, 1), got {eps_comp!r}")
    eps_comp = float(eps_comp if eps_comp is not None
                     else getattr(analysis, "eps_comp", None) or DEFAULT_EPS_COMP)
    models = _models(protocol, win, eps_comp, box)
    ns = np.geomspace(*N_SWEEP, n_points)
    out = []
    for mdl in models:
        details = None
        consumed = float(n)
        if isinstance(mdl, _PefModel):
            ev, details, consumed = mdl.row(n, g)
            gammas = np.geomspace(*GAMMA_SWEEP, min(gamma_points, PEF_GAMMA_POINTS))
        else:
            ev = mdl.evaluate(n, g)
            gammas = np.geomspace(*GAMMA_SWEEP, gamma_points)
        curve = tuple(float(mdl.evaluate(x, g).m) for x in ns)
        sweep = [mdl.evaluate(n, float(gg)) for gg in gammas]
        nets = [e.net for e in sweep]
        j = int(np.argmax(nets))
        best_g = float(gammas[j]) if nets[j] > 0 else None
        raw = _raw_bits(mdl, n)
        out.append(PlanMethod(
            name=mdl.name, side_information=mdl.side, thresholds=mdl.thresholds,
            parameters=ev.params, certified_min_entropy_bits=ev.k, output_bits=ev.m,
            output_bits_per_trial=ev.m / consumed if consumed > 0 else 0.0, settings_randomness_bits=ev.seed,
            net_bits=ev.net, abort_probability=ev.abort, abort_probability_kind=mdl.abort_kind,
            min_trials_positive=_min_trials(mdl, g, "m"),
            min_trials_net_positive=_min_trials(mdl, g, "net"),
            best_gamma=best_g, best_gamma_net_bits=float(nets[j]) if best_g else None,
            curve_trials=tuple(float(x) for x in ns), curve_output_bits=curve,
            pef=details, raw_bits=raw, seed_bits=_toeplitz_seed(raw, ev.m),
            seed_bytes=(_toeplitz_seed(raw, ev.m) + 7) // 8,
            best_gamma_output_bits=int(sweep[j].m) if best_g else None,
            best_gamma_abort_probability=float(sweep[j].abort) if best_g else None,
            best_gamma_seed_bits=_toeplitz_seed(raw, sweep[j].m) if best_g else None,
            gamma_sweep=tuple(float(x) for x in gammas),
            gamma_sweep_output_bits=tuple(int(e.m) for e in sweep),
            gamma_sweep_net_bits=tuple(float(e.net) for e in sweep),
            gamma_sweep_abort_probability=tuple(float(e.abort) for e in sweep)))
    notes = (
        ("output_bits is the extractable output on acceptance, "
         "floor(k - 2 log2(1/eps_ext)); multiply by 1 - abort_probability for the mean"),
        ("settings_randomness_bits: n (h2(gamma) + 2 gamma) for spot-checking, 2n for uniform settings; the "
         "extractor seed is returned and not counted"),
        ("'derived' methods use thresholds set for this device quality and eps_comp "
         f"= {eps_comp:g}; 'declared' ones use the protocol's"),
        "best_gamma maximises net_bits over a log grid of gamma in [1e-4, 1] at the given trials",
        f"device: {device}",
        ("pef rows (classical side information): trials is the cap on analysis trials; the "
         "run stops at the target, so seed and output per trial count the calibration prefix "
         "plus the expected stopping trial; curves, smallest n and best gamma use the largest "
         "target reachable with honest abort <= eps_comp"),
    )
    return PlanResult(
        protocol=str(getattr(protocol, "name", "<protocol>")), trials=n, trials_source=source,
        gamma=g, device=device, win_probability=win, chsh=8.0 * win - 4.0,
        eps_ext=float(protocol.extractor.eps_ext), eps_comp=eps_comp, methods=tuple(out),
        min_trials_positive={m.name: m.min_trials_positive for m in out},
        min_trials_net_positive={m.name: m.min_trials_net_positive for m in out},
        best_gamma={m.name: m.best_gamma for m in out}, notes=notes)


def _raw_bits(mdl: Any, n: int) -> int:
    """Most raw bits the extractor reads at n trials: the harvested parties' outcomes of every
    (analysed) trial; an upper bound when only generation rounds are harvested or a PEF run
    stops early, so the seed below is never under-provisioned."""
    if getattr(mdl, "mart", None) is not None:
        return len(getattr(mdl.harvest, "parties", "AB")) * int(n)
    return 2 * int(n)


def _toeplitz_seed(raw: int, m: int) -> int:
    """Seed bits of a Toeplitz extractor from raw to m bits: raw + m - 1 (0 when m = 0)."""
    from dicert.extract import seed_bits_required

    return int(seed_bits_required(raw, m)) if m > 0 and raw > 0 else 0


#: Options of `dicert plan` that override a protocol's error parameters: option -> (table, key,
#: methods it applies to).
ERROR_OPTIONS = {
    "eps_ext": ("extractor", "eps_ext", ("martingale", "eat", "pef")),
    "eps_est": ("analysis", "eps_est", ("martingale",)),
    "eps_s": ("analysis", "eps_s", ("eat",)),
    "eps_ea": ("analysis", "eps_ea", ("eat",)),
    "eps_pe": ("analysis", "eps_pe", ("pef",)),
}


def with_error_parameters(protocol: Any, **values: float | None) -> Any:
    """The protocol with some error parameters replaced (keys of :data:`ERROR_OPTIONS`), validated
    exactly like a protocol file (the message names the key). For planning only: a certificate
    uses the protocol file fixed before the run."""
    import tomllib

    from dicert.protocol import protocol_from_dict

    given = {k: v for k, v in values.items() if v is not None}
    if not given:
        return protocol
    for key in given:
        if key not in ERROR_OPTIONS:
            raise ParameterError(f"unknown error parameter {key!r}")
        _, _, methods = ERROR_OPTIONS[key]
        if protocol.method not in methods:
            fit = [f"--{k.replace('_', '-')}" for k, (_, _, ms) in ERROR_OPTIONS.items()
                   if protocol.method in ms]
            raise ParameterError(f"--{key.replace('_', '-')} does not apply to a "
                                 f"{protocol.method} protocol; it takes {', '.join(fit)}")
    if not protocol.text:
        raise ParameterError("error parameters can be overridden only for a protocol read "
                             "from a file")
    d = tomllib.loads(protocol.text)
    for key, v in given.items():
        table, name, _ = ERROR_OPTIONS[key]
        d.setdefault(table, {})[name] = float(v)
    return protocol_from_dict(d, f"{protocol.name} (with --{', --'.join(k.replace('_', '-') for k in given)})")


def plan_plot_range(result: PlanResult) -> tuple[float, float]:
    """x range of the plan plot: from half the smallest n with any output to five times the
    largest of the planned n and the smallest n with a positive net expansion (the region where
    the methods start to pay), inside the computed sweep."""
    starts = [v for m in result.methods for v in (m.min_trials_positive,) if v]
    nets = [v for m in result.methods for v in (m.min_trials_net_positive,) if v]
    xs = [x for m in result.methods for x in m.curve_trials]
    lo_all, hi_all = (min(xs), max(xs)) if xs else (N_SWEEP[0], N_SWEEP[1])
    lo = min([*starts, result.trials]) / 2.0
    hi = max([*nets, result.trials, *starts]) * 5.0
    lo, hi = max(lo_all, lo), min(hi_all, hi)
    if not hi > lo * 10:
        lo, hi = max(lo_all, result.trials / 100.0), min(hi_all, result.trials * 100.0)
    return lo, hi


def plot_plan(result: PlanResult, path: Any) -> None:
    """Two panels, written atomically: certified output bits against the number of trials for
    each method (x range around where the methods start to pay, :func:`plan_plot_range`), and
    the gamma trade-off (net bits against gamma at the planned n, best gamma starred)."""
    from dicert.plotting import _figure, save_figure

    plt = _figure()
    fig, (ax, bx) = plt.subplots(1, 2, figsize=(11, 4.6))
    x_lo, x_hi = plan_plot_range(result)
    y_vals: list[float] = []
    for m in result.methods:
        xs = np.asarray(m.curve_trials)
        ys = np.asarray(m.curve_output_bits, dtype=float)
        ok = ys > 0
        if m.pef is not None:
            label = f"{m.name} ({m.side_information}, best target per n)"
        else:
            label = f"{m.name} ({m.side_information}, {m.thresholds})"
        if ok.any():
            (line,) = ax.loglog(xs[ok], ys[ok], marker="o", ms=3, label=label)
            color = line.get_color()
            inside = ok & (xs >= x_lo) & (xs <= x_hi)
            y_vals += list(ys[inside])
        else:
            (line,) = ax.loglog([], [], marker="o", ms=3, label=label + ": no output")
            color = line.get_color()
        d = m.pef
        if d is not None and m.output_bits > 0 and math.isfinite(d.expected_trials):
            ax.loglog([d.expected_trials], [m.output_bits], marker="*", ms=11, ls="none",
                      color=color, label=f"{m.name}: {d.target_source} target, expected trials")
        if m.gamma_sweep:
            gs = np.asarray(m.gamma_sweep)
            net = np.asarray(m.gamma_sweep_net_bits, dtype=float)
            cert = np.asarray(m.gamma_sweep_output_bits)
            show = cert > 0
            if show.any():
                bx.semilogx(gs[show], net[show], marker="o", ms=3, color=color)
            if m.best_gamma is not None and m.best_gamma_net_bits is not None:
                bx.semilogx([m.best_gamma], [m.best_gamma_net_bits], marker="*", ms=11,
                            ls="none", color=color)
    ax.axvline(result.trials, color="grey", ls=":", lw=1, label=f"n = {result.trials:.3g}")
    ax.set_xlim(x_lo, x_hi)
    if y_vals:
        ax.set_ylim(max(1.0, min(y_vals) / 2.0), max(y_vals) * 2.0)
    ax.set_xlabel("number of trials n")
    ax.set_ylabel("certified output bits on acceptance")
    ax.set_title(f"gamma = {result.gamma:g}", fontsize=10)
    ax.grid(True, which="both", alpha=0.3)
    bx.axhline(0.0, color="grey", lw=1)
    bx.axvline(result.gamma, color="grey", ls=":", lw=1)
    pos = [v for m in result.methods for v, c in zip(m.gamma_sweep_net_bits,
                                                       m.gamma_sweep_output_bits) if c > 0]
    if pos:
        top = max(max(pos), 1.0)
        bx.set_ylim(max(min(pos), -top) * 1.1 if min(pos) < 0 else -0.05 * top, top * 1.15)
    bx.set_xlabel("test-round probability gamma")
    bx.set_ylabel("net bits (output - protocol seed)")
    bx.set_title(f"gamma trade-off at n = {result.trials:.3g} (* best)", fontsize=10)
    bx.grid(True, which="both", alpha=0.3)
    fig.suptitle(f"{result.protocol}: win probability {result.win_probability:.4f} "
                 f"(CHSH {result.chsh:.4f})")
    ax.legend(fontsize=8, loc="upper center", bbox_to_anchor=(1.1, -0.14), ncol=2,
              frameon=False)
    save_figure(fig, path)
    plt.close(fig)


__all__ = [
    "PefPlanDetails",
    "PlanMethod",
    "PlanResult",
    "chernoff_reachable_threshold",
    "chernoff_shortfall_bound",
    "honest_quality",
    "martingale_abort_bound",
    "plan",
    "plan_plot_range",
    "plot_plan",
    "seed_bits_consumed",
    "with_error_parameters",
]
