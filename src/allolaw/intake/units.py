"""Units: one pint registry, the quantity kinds of the config, and conversions to canonical units.

Any quantity pint can measure is accepted: the canonical unit of a column fixes its
dimensionality, and every source unit must have the same one (``km/h`` for a ``m/s`` column,
``1/min`` for ``Hz``). The config's ``quantity`` is free text; when it names one of the kinds in
:data:`QUANTITY_DIMENSIONS` the canonical unit is checked against that kind too.

Every conversion is affine, ``canonical = value * factor + offset``; only temperatures (degC → K)
have an offset. Oxygen consumption (``mL O2/h``, ``L O2/min`` …) is a volume per time of O2; it
becomes power through an energy equivalent in J per mL O2. The ``O2`` token is read here (pint
knows no oxygen); pint converts the volume per time that is left.

Only the short symbols listed in :data:`ABBREVIATIONS` are accepted; any other unit must be
written as a full name pint knows (``grain``, ``megagram``, ``cubic_centimeter``). pint reads
``gr`` as grain and ``Mg`` as megagram, which a table almost never means.

Problems with a unit (unknown name, a symbol outside the list, wrong kind of quantity, an
offset unit where a factor is needed) raise :class:`allolaw.errors.UserError`; the caller
passes ``where`` (file, line, column) so the message points at the cell.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

import numpy as np
import pint

from allolaw.errors import UserError

__all__ = [
    "ABBREVIATIONS",
    "DEFAULT_ENERGY_PER_ML_O2_JOULE",
    "QUANTITY_DIMENSIONS",
    "Conversion",
    "check_unit",
    "conversion",
    "conversion_factor",
    "convert",
    "ureg",
]

# The one registry of the package (pint quantities from two registries cannot be mixed).
ureg = pint.UnitRegistry()

# Energy released per mL of O2 consumed by an animal on a mixed diet: about 20.1 J/mL
# (common practice, no single source; values between 19.7 J/mL for carbohydrate-free and
# 21.1 J/mL for pure carbohydrate oxidation are quoted — from memory).
DEFAULT_ENERGY_PER_ML_O2_JOULE = 20.1

# The named quantity kinds, as pint dimensionalities, with a reference unit of each. A
# `quantity` outside this list is a plain description: the canonical unit alone then fixes
# the dimensionality.
QUANTITY_DIMENSIONS: dict[str, str] = {
    "mass": "[mass]",
    "power": "[mass] * [length] ** 2 / [time] ** 3",
    "length": "[length]",
    "volume": "[length] ** 3",
    "rate": "[substance] / [time]",
    "dimensionless": "[]",
    "count": "[]",
    "speed": "[length] / [time]",
    "frequency": "1 / [time]",
    "time": "[time]",
    "area": "[length] ** 2",
    "energy": "[mass] * [length] ** 2 / [time] ** 2",
    "concentration": "[substance] / [length] ** 3",
    "temperature": "[temperature]",
}
_REFERENCE_UNITS: dict[str, str] = {
    "mass": "g",
    "power": "W",
    "length": "m",
    "volume": "m**3",
    "rate": "mol/s",
    "dimensionless": "dimensionless",
    "count": "dimensionless",
    "speed": "m/s",
    "frequency": "Hz",
    "time": "s",
    "area": "m**2",
    "energy": "J",
    "concentration": "mol/L",
    "temperature": "K",
}

# The short unit symbols accepted, by the kind of quantity they measure (config/README.md
# lists them). Any other unit is written as a full name: `grain`, not `gr`.
ABBREVIATIONS: dict[str, tuple[str, ...]] = {
    "mass": ("g", "kg", "mg", "ug", "ng", "pg", "fg", "t", "lb", "oz"),
    "length": ("m", "km", "cm", "mm", "um", "nm"),
    "volume": ("L", "l", "dL", "cL", "mL", "ml", "uL", "ul", "nL", "nl", "pL", "fL"),
    "area": ("ha",),
    "time": ("s", "ms", "min", "h", "hr", "d", "yr"),
    "frequency": ("Hz", "kHz"),
    "speed": ("mph",),
    "power": ("W", "kW", "mW", "uW", "nW"),
    "energy": ("J", "kJ", "mJ", "cal", "kcal"),
    "pressure": ("Pa", "kPa"),
    "amount": ("mol", "mmol", "umol", "nmol", "pmol", "fmol", "amol"),
    "temperature": ("K", "degC", "degF"),
    "count": ("count",),
}
_ACCEPTED = frozenset(a for group in ABBREVIATIONS.values() for a in group)
_TOKEN = re.compile(r"[A-Za-z_]+")

_OXYGEN = re.compile(r"(?<![A-Za-z0-9])O(?:2|₂)(?![A-Za-z0-9])")
_SUPERSCRIPTS = {"²": "**2", "³": "**3", "⁻¹": "**-1", "μ": "u", "µ": "u"}


@dataclass(frozen=True)
class Conversion:
    """An affine unit conversion ``to = from * factor + offset``.

    Attributes
    ----------
    from_unit, to_unit
        The unit strings as written by the user.
    factor, offset
        Multiplier and additive offset (offset is non-zero only for temperatures).
    energy_per_ml_o2_joule
        The energy equivalent used, when oxygen consumption became power; else ``None``.
    """

    from_unit: str
    to_unit: str
    factor: float
    offset: float = 0.0
    energy_per_ml_o2_joule: float | None = None

    def apply(self, values: Any) -> np.ndarray:
        """Convert ``values`` (scalar or array) into ``to_unit``."""
        return np.asarray(values, dtype=float) * self.factor + self.offset

    def to_dict(self) -> dict[str, Any]:
        """Plain-data form for ``prepared.json``."""
        return {
            "from": self.from_unit,
            "to": self.to_unit,
            "factor": self.factor,
            "offset": self.offset,
            "energy_per_ml_o2_joule": self.energy_per_ml_o2_joule,
        }


def check_unit(unit: str, quantity: str | None = None, *, where: str = "") -> pint.Unit:
    """Parse ``unit`` and check that it measures ``quantity``.

    Parameters
    ----------
    unit
        Unit string as pint reads it (``g``, ``kg``, ``mW``, ``um**3``, ``degC`` …); an oxygen
        unit (``mL O2/h``) is accepted for ``power``.
    quantity
        A kind of :data:`QUANTITY_DIMENSIONS` to check against; any other text, or ``None``,
        skips the check (the canonical unit then fixes the dimensionality).
    where
        Location for the error message (file, line, column or config key).

    Returns
    -------
    pint.Unit
        The parsed unit (for an oxygen unit: the volume per time without ``O2``).

    Raises
    ------
    UserError
        If the unit is unknown or measures another kind of quantity.
    """
    oxygen, parsed = _parse(unit, where=where)
    if quantity is None or quantity not in QUANTITY_DIMENSIONS:
        return parsed
    if oxygen:
        if quantity != "power":
            msg = (
                f"{_prefix(where)}unit {unit!r} is oxygen consumption, which can only stand for "
                f"power, but this column is declared as {quantity}"
            )
            raise UserError(msg)
        return parsed
    if not parsed.is_compatible_with(_dimension_unit(quantity)):
        msg = (
            f"{_prefix(where)}unit {unit!r} measures {_describe(parsed)}, but this column is "
            f"declared as {quantity} ({QUANTITY_DIMENSIONS[quantity]})"
        )
        raise UserError(msg)
    return parsed


def conversion(
    from_unit: str,
    to_unit: str,
    quantity: str | None = None,
    *,
    energy_per_ml_o2_joule: float = DEFAULT_ENERGY_PER_ML_O2_JOULE,
    where: str = "",
) -> Conversion:
    """Return the affine conversion from ``from_unit`` to ``to_unit``.

    Parameters
    ----------
    from_unit, to_unit
        Unit strings. Either may be an oxygen unit (``mL O2/h``); oxygen consumption converts
        to power as ``W = (mL O2 / s) * energy_per_ml_o2_joule``.
    quantity
        Kind of quantity ``to_unit`` must measure (checked when it is a kind of
        :data:`QUANTITY_DIMENSIONS`), or ``None``. With a quantity given, ``from_unit`` must
        have the dimensionality of ``to_unit`` (oxygen consumption stands for power).
    energy_per_ml_o2_joule
        Energy equivalent of oxygen, J per mL O2.
    where
        Location for error messages.

    Raises
    ------
    UserError
        Unknown unit, units of different kinds, or a non-positive energy equivalent.
    """
    from_ox, from_parsed = _parse(from_unit, where=where)
    to_ox, to_parsed = _parse(to_unit, where=where)
    if quantity is not None:
        check_unit(to_unit, quantity, where=where)
        _check_same_dimension(from_unit, from_ox, from_parsed, to_unit, to_ox, to_parsed,
                              quantity, where)
    energy: float | None = None
    if from_ox == to_ox:
        source, target = from_parsed, to_parsed
        scale = 1.0
    else:
        if not energy_per_ml_o2_joule > 0:
            got = energy_per_ml_o2_joule
            msg = f"{_prefix(where)}energy_per_ml_o2_joule must be positive, got {got!r}"
            raise UserError(msg)
        energy = float(energy_per_ml_o2_joule)
        # Go through mL O2 per second ↔ watt: 1 mL O2/s releases `energy` J/s.
        if from_ox:
            source, target = from_parsed, ureg.Unit("mL/s")
            scale = energy * _magnitude(1.0, "W", to_parsed, from_unit, to_unit, where)
        else:
            source, target = from_parsed, ureg.Unit("W")
            scale = _magnitude(1.0, "mL/s", to_parsed, from_unit, to_unit, where) / energy
    try:
        zero = ureg.Quantity(0.0, source).to(target).magnitude
        one = ureg.Quantity(1.0, source).to(target).magnitude
    except pint.DimensionalityError:
        msg = (
            f"{_prefix(where)}cannot convert {from_unit!r} ({_describe(from_parsed)}) "
            f"to {to_unit!r} ({_describe(to_parsed)})"
        )
        raise UserError(msg) from None
    factor = float(one - zero) * scale
    offset = float(zero) * scale
    return Conversion(from_unit, to_unit, factor, offset, energy)


def conversion_factor(
    from_unit: str,
    to_unit: str,
    quantity: str | None = None,
    *,
    energy_per_ml_o2_joule: float = DEFAULT_ENERGY_PER_ML_O2_JOULE,
    where: str = "",
) -> float:
    """Return the multiplier from ``from_unit`` to ``to_unit``.

    Raises
    ------
    UserError
        As :func:`conversion`, and for offset units (degC → K has no single factor), which
        cannot be used for SDs or for log-scale values.
    """
    conv = conversion(
        from_unit, to_unit, quantity, energy_per_ml_o2_joule=energy_per_ml_o2_joule, where=where
    )
    if conv.offset != 0.0:
        msg = (
            f"{_prefix(where)}{from_unit!r} → {to_unit!r} has an offset "
            f"({conv.offset:g}); it is not a pure scale factor"
        )
        raise UserError(msg)
    return conv.factor


def convert(
    values: Any,
    from_unit: str,
    to_unit: str,
    quantity: str | None = None,
    *,
    energy_per_ml_o2_joule: float = DEFAULT_ENERGY_PER_ML_O2_JOULE,
    where: str = "",
) -> np.ndarray:
    """Convert ``values`` from ``from_unit`` to ``to_unit`` (offset units allowed)."""
    conv = conversion(
        from_unit, to_unit, quantity, energy_per_ml_o2_joule=energy_per_ml_o2_joule, where=where
    )
    return conv.apply(values)


def _parse(unit: Any, *, where: str) -> tuple[bool, pint.Unit]:
    if not isinstance(unit, str) or not unit.strip():
        msg = f"{_prefix(where)}empty unit {unit!r}"
        raise UserError(msg)
    text = unit.strip()
    for old, new in _SUPERSCRIPTS.items():
        text = text.replace(old, new)
    oxygen = bool(_OXYGEN.search(text))
    if oxygen:
        text = _OXYGEN.sub(" ", text)
        text = re.sub(r"\s+", " ", text).strip()
    try:
        parsed = ureg.parse_units(text)
    except pint.UndefinedUnitError as err:
        names = ", ".join(repr(n) for n in err.unit_names)
        msg = f"{_prefix(where)}unknown unit {unit!r} (no unit named {names})"
        raise UserError(msg) from None
    except Exception as err:  # pint's parser raises many types on odd text (TokenError, …)
        msg = f"{_prefix(where)}cannot read unit {unit!r} ({type(err).__name__})"
        raise UserError(msg) from None
    _check_symbols(unit, text, where)
    if oxygen and not parsed.is_compatible_with(ureg.Unit("mL/s")):
        msg = (
            f"{_prefix(where)}oxygen unit {unit!r} must be a volume of O2 per time "
            f"(e.g. 'mL O2/h'), but {text!r} measures {_describe(parsed)}"
        )
        raise UserError(msg)
    return oxygen, parsed


def _check_symbols(unit: str, text: str, where: str) -> None:
    # A token is fine if it is a listed symbol or a full name (not pint's symbol for its unit).
    for token in _TOKEN.findall(text):
        if token in _ACCEPTED or token == "dimensionless":
            continue
        name = ureg.get_name(token)
        symbol = ureg.get_symbol(token)
        if len(token) >= 3 and token != symbol:
            continue
        near = [a for a in _ACCEPTED if a.lower() == token.lower()]
        hint = f"; did you mean {near[0]!r}?" if near else ""
        msg = (
            f"{_prefix(where)}unit {unit!r}: {token!r} is not one of the accepted short "
            f"symbols (pint would read it as {name}); write {name!r} in full if that is "
            f"meant{hint}"
        )
        raise UserError(msg)


def _check_same_dimension(from_unit: str, from_ox: bool, from_parsed: pint.Unit, to_unit: str,
                          to_ox: bool, to_parsed: pint.Unit, quantity: str, where: str) -> None:
    # The source unit must measure what the canonical unit measures; oxygen stands for power.
    power = ureg.Unit("W")
    from_power = from_ox or from_parsed.is_compatible_with(power)
    to_power = to_ox or to_parsed.is_compatible_with(power)
    if from_ox != to_ox and from_power and to_power:
        return
    if from_ox and not to_power:
        msg = (
            f"{_prefix(where)}unit {from_unit!r} is oxygen consumption, which can only stand for "
            f"power, but this column is declared as {quantity} (canonical unit {to_unit!r})"
        )
        raise UserError(msg)
    if from_ox == to_ox and from_parsed.is_compatible_with(to_parsed):
        return
    msg = (
        f"{_prefix(where)}unit {from_unit!r} measures {_describe(from_parsed)}, but this column "
        f"is declared as {quantity}: its canonical unit {to_unit!r} measures "
        f"{_describe(to_parsed)}"
    )
    raise UserError(msg)


def _magnitude(
    value: float, unit: str, target: pint.Unit, from_unit: str, to_unit: str, where: str
) -> float:
    try:
        return float(ureg.Quantity(value, unit).to(target).magnitude)
    except pint.DimensionalityError:
        msg = (
            f"{_prefix(where)}cannot convert {from_unit!r} to {to_unit!r}: oxygen consumption "
            f"converts only to power (W) or to another oxygen unit, not to {_describe(target)}"
        )
        raise UserError(msg) from None


def _dimension_unit(quantity: str) -> pint.Unit:
    return ureg.Unit(_REFERENCE_UNITS[quantity])


def _describe(unit: pint.Unit) -> str:
    dims = str(unit.dimensionality)
    return "a pure number" if dims == "dimensionless" else dims


def _prefix(where: str) -> str:
    return f"{where}: " if where else ""
