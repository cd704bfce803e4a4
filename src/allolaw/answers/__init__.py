"""The compare stage: answers to the questions a batch asks of each dataset's fits.

Holds :mod:`~allolaw.answers.dataset` (the ``compare`` stage: writes ``comparison.csv``,
``hypotheses.csv``, ``curvature_audit.json``, ``breakpoint.json``),
:mod:`~allolaw.answers.comparison` (the LOO table), :mod:`~allolaw.answers.hypotheses`,
:mod:`~allolaw.answers.node_tree` and :mod:`~allolaw.answers.density` (posterior probabilities of
named exponents), :mod:`~allolaw.answers.curvature` (curvature audit, local exponents),
:mod:`~allolaw.answers.breakpoint` (breakpoint summary), :mod:`~allolaw.answers.within`
(within- versus between-species exponents) and :mod:`~allolaw.answers.draws` (helpers on
draws).

May import: the top-level support modules, :mod:`allolaw.model` (specs, the NumPy law) and
:mod:`allolaw.checks` (reading fits, Pareto k threshold). Data flow one way, intake → model →
checks → answers → report: nothing here imports the report.
"""
