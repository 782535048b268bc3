"""Interacting loops: couplings between loops, groups of loops, and their figures together.

- :mod:`audit.multiloop.couplings`: the ``couplings`` sheet (one row per coupling) and the groups
  of loops it joins (connected components).
- :mod:`audit.multiloop.figures`: the exact multivariable figures of one group with its own
  decentralised controllers: relative gain arrays, Niederlinski index, stability by the generalised
  Nyquist criterion, peak of the sensitivity matrix, each loop with the others closed, and the
  biggest-log-modulus detuning.
- :mod:`audit.multiloop.stage`: the pipeline stage and the group findings.
"""
