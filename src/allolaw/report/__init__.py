"""The report stage: one self-contained HTML page per dataset, and an index of the batch.

Holds :mod:`~allolaw.report.rendering` (the Jinja2 environment, ``render_dataset_report``,
``render_index``), :mod:`~allolaw.report.summary` and :mod:`~allolaw.report.sections`
(assembling each section's data), :mod:`~allolaw.report.text` (headline, methods, footer),
:mod:`~allolaw.report.figures` (the page's figures), :mod:`~allolaw.report.within`
(within- versus between-species exponents: words and scatter lines),
:mod:`~allolaw.report.charts` and
:mod:`~allolaw.report.svg` (the hand-built SVG layer), :mod:`~allolaw.report.formatting`
(number formatting), :mod:`~allolaw.report.benchmarks` (Snakemake benchmark files), and the
templates in ``templates/``.

May import: everything before it (support modules, :mod:`allolaw.model`, :mod:`allolaw.checks`,
:mod:`allolaw.answers`); it is the last stage, so nothing imports it but the CLI.
"""
