"""Simulated Bell-test devices: box models and fast, reproducible trial sampling.

A *box* is a conditional distribution ``p[x, y, a, b] = p(ab|xy)`` (float64 array of shape
(2, 2, 2, 2)); every row ``p[x, y]`` sums to one. This module builds the boxes of honest quantum
devices (a maximally entangled pair with white noise and detector losses), of classical devices
(deterministic and random local strategies) and of a photonic Eberhard-type experiment
(non-maximally entangled state, one detector per side, outcome 1 = click), and samples trial
logs from them.

Sampling is vectorised and streams in chunks: every trial consumes a fixed number of 64-bit
words from ``rng.bit_generator`` (in trial order), so the same generator state gives the same
trials whatever the chunk size. A compiled (numba) kernel maps words to trial codes; a numpy
implementation of the same map is the reference oracle and the fallback.

Word-to-trial map (``u(w) = (w >> 11) * 2**-53``, a uniform double on [0, 1)):

- word 0: the outcome, by inverse CDF of ``u(w0)`` over the outcome categories of the setting
  pair; with uniform settings, bit 0 of ``w0`` is x and bit 1 is y (disjoint from the 53 bits
  of ``u``);
- word 1 (only when ``gamma < 1``): test round iff ``u(w1) < gamma``;
- words 2 and 3 (only with a settings bias): ``x = [u(w2) < P(x=1)]``, ``y = [u(w3) < P(y=1)]``.

Generation rounds (t = 0) use the fixed settings ``generation``; test rounds use uniform (or
biased) settings. Probabilities are therefore realised to within 2**-53.

The module's top level imports only numpy and the standard library; scipy (used to optimise
the photonic angles) and numba are imported when first needed.

All examples and demo data produced with this simulator are invented.

References
----------
.. [1] J. F. Clauser, M. A. Horne, A. Shimony, R. A. Holt, "Proposed experiment to test local
   hidden-variable theories", PRL 23, 880 (1969).
.. [2] B. S. Cirel'son, "Quantum generalizations of Bell's inequality", Lett. Math. Phys. 4,
   93-100 (1980).
.. [3] J. F. Clauser, M. A. Horne, "Experimental consequences of objective local theories",
   PRD 10, 526 (1974).
.. [4] P. H. Eberhard, "Background level and counter efficiencies required for a loophole-free
   Einstein-Podolsky-Rosen experiment", PRA 47, R747 (1993).
"""

from __future__ import annotations

# re-exported: every name that lived here keeps its import path
from dicert.simulate._boxes import (  # noqa: F401
    CHSH_OPTIMAL_ANGLES,
    DEFAULT_CHUNK_TRIALS,
    MODELS,
    PHOTONIC_EFFICIENCY,
    PHOTONIC_R,
    _U53,
    _bloch_effects,
    _canonical_angles,
    _check_angles,
    _check_design,
    _check_unit,
    _local_weights_with_noise,
    _photonic_box_raw,
    _photonic_rho,
    _polariser_effects,
    _strategy_boxes,
    box_classical,
    box_from_state,
    box_photonic,
    box_quantum,
    ch_eberhard_j,
    chsh_value,
    classical_strategy_weights,
    correlators,
    deterministic_strategy,
    optimal_classical_strategies,
    optimal_photonic_setup,
    settings_distribution,
    signalling_gap,
    validate_box,
    win_probability,
)
from dicert.simulate._devices import (  # noqa: F401
    DeviceModel,
    _model_from_box,
    device_model,
    local_model,
)
from dicert.simulate._sampling import (  # noqa: F401
    _Plan,
    _cdf,
    _check_n,
    _check_rng,
    _codes_from_words,
    _codes_numpy,
    _make_plan,
    _numba_sampler,
    _scaled53,
    iter_trial_chunks,
    make_rng,
    sampler_name,
    simulate_trials,
)
from dicert.simulate._files import (  # noqa: F401
    SimulationSummary,
    box_table,
    parse_setting_pair,
    parse_trial_count,
    simulate_to_file,
)


__all__ = [
    "CHSH_OPTIMAL_ANGLES",
    "DeviceModel",
    "MODELS",
    "SimulationSummary",
    "box_classical",
    "box_from_state",
    "box_photonic",
    "box_quantum",
    "box_table",
    "ch_eberhard_j",
    "chsh_value",
    "classical_strategy_weights",
    "correlators",
    "deterministic_strategy",
    "device_model",
    "iter_trial_chunks",
    "local_model",
    "make_rng",
    "optimal_classical_strategies",
    "optimal_photonic_setup",
    "parse_setting_pair",
    "parse_trial_count",
    "settings_distribution",
    "signalling_gap",
    "simulate_to_file",
    "simulate_trials",
    "validate_box",
    "win_probability",
]
