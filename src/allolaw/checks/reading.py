"""Reading fits: a whole ``posterior.nc``, or only the groups a stage needs.
"""

from __future__ import annotations

from pathlib import Path

import arviz as az

__all__ = ["read_groups", "read_posterior"]


def read_posterior(path: str | Path) -> az.InferenceData:
    """Read a ``posterior.nc`` fully into memory and close the file (it may be rewritten)."""
    with az.rc_context({"data.load": "eager"}):
        return az.from_netcdf(path)


def read_groups(path: str | Path, groups: tuple[str, ...]) -> az.InferenceData:
    """Read only some groups of a ``posterior.nc`` (and its attributes) into memory.

    A stage that needs a few groups reads only those: the predictive draws are the largest
    groups of a fit, and reading every group costs about twice as long
    (benchmarks/report_build.py). A group missing from the file is left out, except
    ``posterior``, whose absence raises :class:`OSError`.
    """
    import xarray as xr

    with xr.open_dataset(path, engine="h5netcdf") as root:
        attrs = dict(root.attrs)
    data = {}
    for group in groups:
        try:
            data[group] = xr.load_dataset(path, group=group, engine="h5netcdf")
        except OSError:
            if group == "posterior":
                raise
    idata = az.InferenceData(**data)
    idata.attrs.update(attrs)
    return idata
