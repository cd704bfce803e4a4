"""The model stage: model specs, the PyMC model of a spec, the posterior law, and fitting.

Holds :mod:`~allolaw.model.spec` (model specs), :mod:`~allolaw.model.inputs`,
:mod:`~allolaw.model.terms` and :mod:`~allolaw.model.builder` (the PyMC model),
:mod:`~allolaw.model.treemsg` (Gaussian messages on a layered tree: the whitened taxon terms),
:mod:`~allolaw.model.law` (the posterior law, NumPy only), :mod:`~allolaw.model.sampling` and
:mod:`~allolaw.model.fitting` (sampling and the fit stage).

May import: the top-level support modules (config, paths, errors, io, runtime) and the intake
stage's readers. Data flow one way, intake → model → checks → answers → report: nothing here
imports a later stage.
"""
