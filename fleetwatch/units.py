"""Unit conversion for column mappings.

Every quantity has one canonical unit (design.md section 3): speed in rpm, power in W,
voltage in V, current in A, torque in N*m, temperature in degC; ratio is dimensionless.
A source unit converts to it as ``canonical = value * scale + offset``.

Factors follow NIST SP 811 (2008), Appendix B, and the SI Brochure (9th ed., 2019):
1 rpm = 2*pi/60 rad/s; 1 r/s (Hz as revolutions per second) = 60 rpm;
t/degC = T/K - 273.15; t/degC = (t/degF - 32) / 1.8.
"""
from __future__ import annotations

import math
from typing import Any

from .errors import InputError

__all__ = ["UNITS", "CANONICAL_UNITS", "COLUMN_QUANTITY", "convert", "unit_factor",
           "normalize_unit", "accepted_units"]

# quantity -> canonical unit
CANONICAL_UNITS: dict[str, str] = {
    "speed": "rpm",
    "power": "W",
    "voltage": "V",
    "current": "A",
    "torque": "N*m",
    "temperature": "degC",
    "ratio": "-",
}

# quantity -> unit -> (scale, offset); canonical = value * scale + offset
UNITS: dict[str, dict[str, tuple[float, float]]] = {
    "speed": {
        "rpm": (1.0, 0.0),
        "rad/s": (60.0 / (2.0 * math.pi), 0.0),   # 1 rpm = 2*pi/60 rad/s (NIST SP 811 B.8)
        "Hz": (60.0, 0.0),                          # read as revolutions per second
        "rev/s": (60.0, 0.0),
    },
    "power": {"W": (1.0, 0.0), "kW": (1.0e3, 0.0), "MW": (1.0e6, 0.0), "mW": (1.0e-3, 0.0)},
    "voltage": {"V": (1.0, 0.0), "kV": (1.0e3, 0.0), "mV": (1.0e-3, 0.0)},
    "current": {"A": (1.0, 0.0), "mA": (1.0e-3, 0.0), "kA": (1.0e3, 0.0)},
    "torque": {"N*m": (1.0, 0.0), "kN*m": (1.0e3, 0.0)},
    "temperature": {
        "degC": (1.0, 0.0),
        "K": (1.0, -273.15),                        # SI Brochure 9th ed. 2.3.1
        "degF": (5.0 / 9.0, -32.0 * 5.0 / 9.0),     # NIST SP 811 B.8: (F - 32)/1.8
    },
    "ratio": {"-": (1.0, 0.0)},
}

# spelling variants -> unit name in UNITS (matched exactly first, then case-insensitively)
_ALIASES: dict[str, str] = {
    "rev/min": "rpm", "r/min": "rpm", "1/min": "rpm", "min^-1": "rpm", "min-1": "rpm",
    "rad/sec": "rad/s", "rad s-1": "rad/s",
    "r/s": "rev/s", "rps": "rev/s", "1/s": "rev/s",
    "N·m": "N*m", "Nm": "N*m", "N m": "N*m", "N.m": "N*m", "N-m": "N*m",
    "kN·m": "kN*m", "kNm": "kN*m",
    "°C": "degC", "C": "degC", "celsius": "degC", "deg C": "degC",
    "°F": "degF", "F": "degF", "fahrenheit": "degF", "deg F": "degF",
    "kelvin": "K",
    "1": "-", "": "-", "ratio": "-",
}

# canonical column -> quantity
COLUMN_QUANTITY: dict[str, str] = {
    "n_in": "speed", "n_out": "speed", "v_in": "voltage", "i_in": "current",
    "p_in": "power", "t_out": "torque", "temp": "temperature", "ratio_cmd": "ratio",
}


def accepted_units(quantity: str) -> list[str]:
    """Unit names (and their aliases) accepted for ``quantity``."""
    names = list(UNITS.get(quantity, {}))
    names += [a for a, u in _ALIASES.items() if u in UNITS.get(quantity, {}) and a]
    return names


def normalize_unit(unit: str, quantity: str) -> str:
    """The UNITS key for ``unit`` of ``quantity``; InputError when it is not known."""
    if quantity not in UNITS:
        raise InputError(f"unknown quantity '{quantity}'",
                         hint="Known quantities: " + ", ".join(UNITS) + ".")
    table = UNITS[quantity]
    u = str(unit).strip()
    if u in table:
        return u
    if u in _ALIASES and _ALIASES[u] in table:
        return _ALIASES[u]
    folded = [k for k in list(table) + [a for a in _ALIASES if _ALIASES[a] in table]
              if k.casefold() == u.casefold()]
    targets = {(_ALIASES.get(k, k)) for k in folded}
    if len(targets) == 1:
        return targets.pop()
    raise InputError(
        f"unknown unit '{unit}' for {quantity}; accepted: " + ", ".join(accepted_units(quantity)),
        hint=f"Use one of the accepted units in the mapping file (canonical: "
             f"{CANONICAL_UNITS[quantity]}).")


def unit_factor(unit: str, quantity: str) -> tuple[float, float]:
    """(scale, offset) such that canonical = value * scale + offset."""
    return UNITS[quantity][normalize_unit(unit, quantity)]


def convert(values: Any, unit: str, quantity: str) -> Any:
    """Convert ``values`` given in ``unit`` to the canonical unit of ``quantity``.

    ``values`` may be a number, a numpy array, a polars Series or a polars expression;
    the result has the same kind. Raises InputError for an unknown unit or quantity.
    """
    scale, offset = unit_factor(unit, quantity)
    if scale == 1.0 and offset == 0.0:
        return values
    if offset == 0.0:
        return values * scale
    return values * scale + offset
