"""Documented size limits (README, "Limits"): data beyond them are refused up front, with
the limit named, rather than allocated until the machine runs out of memory.

- ``MAX_STEPS_PER_TRIAL``: successful draws in one trial (a decision's ``step``, a trial's
  ``draws``). At the largest survival chance the models size for (0.999), reaching 20,000
  draws has probability 0.999^20000 = 2e-9; every table of a stopping model grows with it.
- ``MAX_DECISION_ROWS``: decisions after expanding trial-level data (about 80 bytes each).
- ``MAX_SIMULATED_TRIALS``: trials (stopping) or choices (lottery) in one simulation, i.e.
  rows of its design (``simulate --subjects N --trials T``: N x T).
- ``MAX_TYPES``: types of a finite mixture (each adds a copy of the model's parameters and
  one more likelihood per row; types must also be fewer than subjects).
- ``MAX_TARGET``: the cap on planned draws a model may be given (``max_target``,
  ``--max-target``); the largest table of a stopping model is estimated as well
  (``models.table_size``) and refused beyond ``MAX_TABLE_BYTES``.
- ``MAX_LOTTERY_OUTCOMES``: outcomes per lottery option (the k of ``a_xk``); options are
  padded to the widest, so one column ``a_x50000000`` would ask for 50 million slots a row.
"""

from __future__ import annotations

MAX_STEPS_PER_TRIAL = 20_000
MAX_DECISION_ROWS = 20_000_000
MAX_LOTTERY_OUTCOMES = 1_000
MAX_SIMULATED_TRIALS = 2_000_000
MAX_TYPES = 20
MAX_TARGET = 100_000
MAX_TABLE_BYTES = 2 * 1024**3
