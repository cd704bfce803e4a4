"""The check stage: diagnostics of one fit, predictive checks, and reading fits.

Holds :mod:`~allolaw.checks.convergence` (R-hat, ESS, divergences, BFMI, Pareto k),
:mod:`~allolaw.checks.predictive` (posterior and prior predictive checks),
:mod:`~allolaw.checks.reading` (reading ``posterior.nc``) and :mod:`~allolaw.checks.dataset` (the
``check`` stage: check, refit once on divergences, write ``checks/<model>.json``).

May import: the top-level support modules and :mod:`allolaw.model` (the one refit). Data flow one
way, intake → model → checks → answers → report: nothing here imports a later stage.
"""
