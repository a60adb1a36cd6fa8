"""The electrostatics core: Ewald sums of periodic point charges, all run from one sum plan.

Import what you need from its modules (``madelung.sums.plan``, ``.direct``, ``.mesh``,
``.matrix``, ``.geometry``, ``.shortrange``); the package imports nothing itself, so the
structure checks (``madelung.structure.bounds``) can use the geometry without loading the engines.
"""
