"""The model stage: model specs, the PyMC model of a spec, the posterior law, and fitting.

Holds :mod:`~allolaw.model.spec` (model specs) and :mod:`~allolaw.model.describing` (their
methods paragraph), :mod:`~allolaw.model.inputs`, :mod:`~allolaw.model.terms` and
:mod:`~allolaw.model.builder` (the PyMC model) with its parts :mod:`~allolaw.model.correlated`
(taxon covariance), :mod:`~allolaw.model.scatter` (residual SD by taxon),
:mod:`~allolaw.model.within` (within/between split), :mod:`~allolaw.model.error_sd` and
:mod:`~allolaw.model.error_correlation` (measurement errors from replicates),
:mod:`~allolaw.model.phylo_terms` (shared ancestry), :mod:`~allolaw.model.treemsg` (Gaussian
messages on a layered tree: the whitened taxon terms), :mod:`~allolaw.model.law` (the
posterior law, NumPy only), :mod:`~allolaw.model.sampling`,
:mod:`~allolaw.model.extending` and :mod:`~allolaw.model.mass_matrix` (chain extension),
:mod:`~allolaw.model.compiling` and :mod:`~allolaw.model.fitting` (sampling and the fit
stage).

May import: the top-level support modules (config, paths, errors, io, runtime) and the intake
stage's readers. Data flow one way, intake → model → checks → answers → report: nothing here
imports a later stage.
"""
