"""Single-round entropy bounds: from a Bell violation to entropy per round.

Public primitives for experts:

- :mod:`dicert.entropy.analytic`: closed-form CHSH bounds (min-entropy and von Neumann)
  and their derivatives.
"""
