"""lotline's SPC engine: pure, vectorised statistics over polars/numpy frames.

Modules (one noun each): ``frames`` (the column contract), ``factors`` (Shewhart constants),
``subgroups`` (nested subgroup statistics), ``variance`` (nested variance components), ``shewhart``
(Phase I limits), ``rules`` (Western Electric / Nelson run rules), ``ewma``, ``cusum``, ``attributes``
(defect and proportion charts), ``capability``, ``arl`` (average run length design) and ``signals``
(one driver that runs rules, EWMA and CUSUM together).

Nothing here does I/O, reads a clock or draws random numbers without a caller-supplied seed.
Signals advise; the fab's out-of-control action plan (OCAP) and qualified engineers decide.
"""
