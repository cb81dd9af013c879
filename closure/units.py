"""Physical units of a model's quantities, derived from the units its input recorded.

Units are UDUNITS-style text as CF files carry them (``"m s-1"``, ``"m2 s-2"``, ``"1"``). A
small algebra multiplies, divides and simplifies products of powers of unit symbols
(``"(m s-1)/(m)"`` -> ``"s-1"``, ``"m/s"`` -> ``"m s-1"``) without converting between symbols
(``km`` and ``m`` stay apart) and without scale factors. Nothing is invented: a quantity whose
base units were not recorded has units None, and figures and tables then say so.

Every derived quantity is a power of length L and time T; with a recorded length and velocity
U, the time unit is L / U (so vorticity is U / L simplified), else the recorded time unit.

    base = model_units(model)        # Units(length="m", velocity="m s-1", time="s", ...)
    base.of("energy_spectrum")       # "m3 s-2"
    base.component("force_x")        # "m s-2"
    label("wavenumber k", base.of("wavenumber"))   # "wavenumber k (m-1)"
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from fractions import Fraction

#: CF's unit of a dimensionless quantity.
DIMENSIONLESS = "1"

#: What an axis label or table heading says when its units were not recorded.
NOT_RECORDED = "units not recorded"

#: Derived quantities as exponents of (length, time).
QUANTITIES: dict[str, tuple[int, int]] = {
    "dimensionless": (0, 0),
    "length": (1, 0),
    "filter_width": (1, 0),
    "wavenumber": (-1, 0),
    "time": (0, 1),
    "velocity": (1, -1),
    "energy": (2, -2),                  # kinetic energy per unit mass, 0.5 u_i u_i
    "energy_spectrum": (3, -2),         # spectral density E(k): sum(E) dk = energy
    "vorticity": (0, -1),
    "enstrophy": (0, -2),               # 0.5 omega^2
    "stress": (2, -2),                  # tau_ij
    "force": (1, -2),                   # d_j tau_ij
    "vorticity_forcing": (0, -2),
    "energy_transfer": (2, -3),         # pi = -tau_ij S_ij, and per shell T(k)
    "enstrophy_transfer": (0, -3),      # per shell Z(k)
    "vorticity_pdf": (0, 1),            # probability density of the vorticity: 1 / vorticity
}

_ALIASES = {"meter": "m", "meters": "m", "metre": "m", "metres": "m", "second": "s",
            "seconds": "s", "sec": "s", "secs": "s"}


class Unit:
    """A product of unit symbols to rational powers, e.g. ``{"m": 1, "s": -1}``; an opaque
    symbol (text the parser does not understand) is kept whole in parentheses."""

    __slots__ = ("powers",)

    def __init__(self, powers: Mapping[str, Fraction] | None = None):
        self.powers = {k: Fraction(v) for k, v in (powers or {}).items() if v != 0}

    def __mul__(self, other: Unit) -> Unit:
        out = dict(self.powers)
        for k, v in other.powers.items():
            out[k] = out.get(k, Fraction(0)) + v
        return Unit(out)

    def __truediv__(self, other: Unit) -> Unit:
        return self * other ** -1

    def __pow__(self, p) -> Unit:
        p = Fraction(p)
        return Unit({k: v * p for k, v in self.powers.items()})

    def __eq__(self, other) -> bool:
        return isinstance(other, Unit) and self.powers == other.powers

    def __hash__(self) -> int:
        return hash(frozenset(self.powers.items()))

    def __str__(self) -> str:
        if not self.powers:
            return DIMENSIONLESS
        # positive powers first, each group in the order the symbols first appeared
        items = [kv for kv in self.powers.items() if kv[1] > 0] + \
                [kv for kv in self.powers.items() if kv[1] < 0]
        return " ".join(_power_text(k, v) for k, v in items)

    def __repr__(self) -> str:
        return f"Unit({str(self)!r})"


def _power_text(symbol: str, p: Fraction) -> str:
    opaque = symbol.startswith("(")
    if p == 1:
        return symbol
    exp = str(p.numerator) if p.denominator == 1 else f"({p})"
    return f"{symbol}^{exp}" if opaque else f"{symbol}{exp}"


_EXPONENT = re.compile(r"\^?([+-]?\d+)")
_NAME = re.compile(r"[A-Za-z_%][A-Za-z_%]*")


class _Parser:
    """Recursive descent over ``factor ((' ' | '*' | '.' | '/' | 'per') factor)*``, where a
    factor is ``1``, a symbol or a parenthesised group, each with an optional integer
    exponent (``m2``, ``s-1``, ``s^-1``, ``(m s-1)^2``)."""

    def __init__(self, text: str):
        self.s = text.replace("**", "^")
        self.i = 0

    def _skip(self) -> None:
        while self.i < len(self.s) and self.s[self.i] == " ":
            self.i += 1

    def product(self) -> Unit | None:
        unit, divide = None, False
        while True:
            self._skip()
            if self.i >= len(self.s) or self.s[self.i] == ")":
                return None if unit is None or divide else unit
            ch = self.s[self.i]
            if ch in "*.":
                if unit is None:
                    return None
                self.i += 1
                continue
            per = re.compile(r"(?i)per(?![A-Za-z_%\d^])").match(self.s, self.i)
            if ch == "/" or per:
                if unit is None or divide:
                    return None
                divide = True
                self.i = per.end() if per else self.i + 1
                continue
            f = self.factor()
            if f is None:
                return None
            unit = f if unit is None else (unit / f if divide else unit * f)
            divide = False

    def factor(self) -> Unit | None:
        s = self.s
        if s[self.i] == "(":
            self.i += 1
            inner = self.product()
            if inner is None or self.i >= len(s) or s[self.i] != ")":
                return None
            self.i += 1
            base = inner
        elif s[self.i].isdigit():
            m = re.compile(r"\d+").match(s, self.i)
            if m.group(0) != "1":
                return None  # a scale factor: not a plain product of powers
            self.i = m.end()
            return Unit()
        else:
            m = _NAME.match(s, self.i)
            if m is None:
                return None
            self.i = m.end()
            name = _ALIASES.get(m.group(0), m.group(0))
            base = Unit({name: Fraction(1)})
        m = _EXPONENT.match(s, self.i)
        if m is not None:
            self.i = m.end()
            base = base ** int(m.group(1))
        return base


def parse(text: str | None) -> Unit | None:
    """The Unit of UDUNITS-style text (``"m s-1"``, ``"m/s"``, ``"m.s^-1"``, ``"(m s-1)^2/(m)"``,
    ``"1"``), or None when it is not a plain product of symbol powers (e.g. has a scale
    factor or an offset such as ``"seconds since 2000-01-01"``)."""
    if text is None or not str(text).strip():
        return None
    p = _Parser(str(text).strip())
    unit = p.product()
    return unit if unit is not None and p.i == len(p.s) else None


def _unit(text: str) -> Unit:
    """Parsed text, or the text as one opaque symbol (never guessed apart)."""
    u = parse(text)
    return u if u is not None else Unit({f"({text.strip()})": 1})


def simplify(text: str | None) -> str | None:
    """``text`` in simplest form (``"(m s-1)/(m)"`` -> ``"s-1"``); text the parser does not
    understand comes back unchanged; None stays None."""
    if text is None:
        return None
    u = parse(text)
    return str(text).strip() if u is None else str(u)


def combine(*factors: tuple[str | None, float]) -> str | None:
    """The simplified product of ``(units, power)`` factors; None when a factor with a
    non-zero power has no units. ``combine(("m s-1", 2), ("m", 1)) == "m3 s-2"``."""
    out = Unit()
    for text, p in factors:
        if p == 0:
            continue
        if text is None:
            return None
        out = out * _unit(text) ** Fraction(p).limit_denominator(1000)
    return str(out)


def is_dimensionless(units: str | None) -> bool:
    """True for ``"1"`` (and equivalent text such as ``"m m-1"``)."""
    u = parse(units) if units is not None else None
    return u is not None and not u.powers


def label(name: str, units: str | None) -> str:
    """An axis label or table heading: ``"E(k) (m3 s-2)"``, ``"R^2 (dimensionless)"``, or the
    bare name when the units are not recorded (the caption says so once)."""
    if units is None:
        return name
    if is_dimensionless(units):
        return f"{name} (dimensionless)"
    return f"{name} ({units})"


def _time_text(text: str | None) -> str | None:
    """The unit of a CF time coordinate: ``"seconds since 2000-01-01"`` -> ``"s"``."""
    if text is None:
        return None
    base = str(text).split(" since ", 1)[0].strip()
    return simplify(base) if base else None


@dataclass(frozen=True)
class Units:
    """Base units recorded for a model's data: ``length`` (the grid's coordinates),
    ``velocity``, ``time`` (the time coordinate) and ``scalars`` by name; None where not
    recorded. Everything else is derived from them (:meth:`of`, :meth:`component`)."""

    length: str | None = None
    velocity: str | None = None
    time: str | None = None
    scalars: dict[str, str] = field(default_factory=dict)

    @property
    def _length(self) -> str | None:
        if self.length is not None:
            return self.length
        if self.velocity is not None and self.time is not None:
            return combine((self.velocity, 1), (self.time, 1))
        return None

    @property
    def _time(self) -> str | None:
        """The time unit of the dynamics: length / velocity when both are recorded."""
        if self.length is not None and self.velocity is not None:
            return combine((self.length, 1), (self.velocity, -1))
        return self.time

    def dims(self, length: float, time: float, **scalars: float) -> str | None:
        """Units of length^a time^b (scalar^c ...); None where a needed base is missing."""
        factors = [(self._length, length), (self._time, time)]
        if length == 1 and time == -1 and self.velocity is not None:
            factors = [(self.velocity, 1)]  # the recorded velocity itself
        factors += [(self.scalars.get(c), p) for c, p in scalars.items()]
        return combine(*factors)

    def of(self, quantity: str, **scalars: float) -> str | None:
        """Units of a named quantity of :data:`QUANTITIES` (``"wavenumber"``, ``"energy"``,
        ...), times scalar powers (``scalar_variance_transfer``: ``of("time", c=2)``...)."""
        if quantity not in QUANTITIES:
            raise KeyError(f"unknown quantity {quantity!r}: one of {', '.join(QUANTITIES)}")
        a, b = QUANTITIES[quantity]
        return self.dims(a, b, **scalars)

    def component(self, name: str) -> str | None:
        """Units of an input or output variable: ``u``, a scalar, ``vorticity``, ``tau_xy``,
        ``force_x``, ``flux_<c>_x``, ``vorticity_forcing``, ``pi``, ``enstrophy_transfer``."""
        if name in ("u", "v", "w"):
            return self.of("velocity")
        if name in self.scalars:
            return self.scalars[name]
        if name.startswith("tau_"):
            return self.of("stress")
        if name.startswith("force_"):
            return self.of("force")
        if name.startswith("flux_"):
            c = name[5:-2]
            return self.dims(1, -1, **{c: 1}) if c in self.scalars else None
        if name in QUANTITIES:
            return self.of(name)
        if name == "pi":
            return self.of("energy_transfer")
        return None

    def derivative(self, field_name: str, order: int) -> str | None:
        """Units of an ``order``-th spatial derivative of a velocity component or scalar."""
        if field_name in ("u", "v", "w"):
            return self.dims(1 - order, -1) if order else self.of("velocity")
        if field_name in self.scalars:
            return self.dims(-order, 0, **{field_name: 1})
        return None

    def coefficient(self, scaled_units: Mapping[str, float] | None,
                    delta_power: float = 0.0) -> str | None:
        """Units of a term's fitted coefficient from the library's exponents (``{}``:
        dimensionless; ``{"length": 2, "time": -1}``: an eddy viscosity) times
        length^delta_power (0: the Delta-scaled coefficient; the term's power: the
        dimensional one). None for mixed units or a base not recorded."""
        if scaled_units is None:
            return None
        s = dict(scaled_units)
        a = float(s.pop("length", 0.0)) + float(delta_power or 0.0)
        b = float(s.pop("time", 0.0))
        if a == 0 and b == 0 and not s:
            return DIMENSIONLESS
        return self.dims(a, b, **{k: float(v) for k, v in s.items()})

    @property
    def complete(self) -> bool:
        """True when length and time (directly or through velocity) are known."""
        return self._length is not None and self._time is not None

    def to_dict(self) -> dict:
        return {"length": self.length, "velocity": self.velocity, "time": self.time,
                "scalars": dict(self.scalars)}


def variable_units(name: str, units: Mapping[str, str], length: str | None) -> str | None:
    """Units of a variable we write (``u``, a scalar, ``vorticity``, ``tau_xy``, ``force_x``,
    ``flux_<c>_x``, ``vorticity_forcing``, ``pi``, ``enstrophy_transfer``) from an input's
    units by variable (``FieldSource.units``: our names and coordinate dims -> CF ``units``)
    and the grid's length units, simplified: vorticity from ``m s-1`` and ``m`` is ``s-1``
    whichever file it is written to. None where not derivable."""
    if name in units and name not in ("u", "v", "w") and not name.startswith(
            ("tau_", "force_", "flux_")):
        return simplify(units[name])
    scalars = {c: str(u) for c, u in units.items()
               if c not in ("u", "v", "w", "x", "y", "z", "time", "vorticity")}
    base = Units(simplify(length), _velocity_of(units), None, scalars)
    return base.component(name)


def _get(obj, name, default=None):
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


def _mapping(x) -> dict:
    return dict(x) if isinstance(x, Mapping) else {}


def _first(*values) -> str | None:
    for v in values:
        if isinstance(v, str) and v.strip():
            return v.strip()
    return None


def _velocity_of(units: Mapping) -> str | None:
    """One unit shared by the velocity components (None when they differ or are missing)."""
    given = {simplify(units[c]) for c in ("u", "v", "w") if isinstance(units.get(c), str)}
    return given.pop() if len(given) == 1 else None


def model_units(model) -> Units:
    """The base units a model (ClosureModel, its dict, or an object with its attributes)
    records: length from its grid (or its fine grid, or its coordinates' units), velocity and
    time from its provenance (``velocity_units`` / ``units`` by variable, as read from the
    input's CF ``units``), scalar units by scalar name. None where not recorded."""
    to_dict = getattr(model, "to_dict", None)
    d = dict(model) if isinstance(model, Mapping) else (
        _mapping(to_dict()) if callable(to_dict) else {})
    prov = _mapping(_get(model, "provenance", None) or d.get("provenance"))
    settings = _mapping(_get(model, "settings", None) or d.get("settings"))
    top = _mapping(d.get("units"))
    grid = _get(model, "grid", None) or d.get("grid")
    read = _mapping(prov.get("input_read"))
    by_var = {**_mapping(read.get("units")), **_mapping(prov.get("units"))}
    fine = _mapping(prov.get("fine_grid"))
    coords = [by_var.get(c) for c in ("x", "y", "z") if isinstance(by_var.get(c), str)]
    length = _first(top.get("length"), _get(grid, "units", None), fine.get("units"),
                    prov.get("length_units"), coords[0] if len(set(coords)) == 1 else None)
    velocity = _first(top.get("velocity"), prov.get("velocity_units"),
                      by_var.get("velocity"), settings.get("velocity_units"),
                      _velocity_of(by_var))
    time_attrs = _mapping(prov.get("time_attrs"))
    time = _time_text(_first(top.get("time"), prov.get("time_units"), by_var.get("time"),
                             time_attrs.get("units")))
    scalars = {str(c): str(u) for c, u in _mapping(top.get("scalars")).items()}
    for c in list(_get(model, "scalars", None) or d.get("scalars") or []):
        if isinstance(by_var.get(c), str):
            scalars.setdefault(str(c), by_var[c])
    return Units(simplify(length), simplify(velocity), time, scalars)


def run_units(result, fallback: Units | None = None) -> Units:
    """Base units of an a posteriori result (its dict from ``closure les --json``): its
    ``settings.units`` where recorded, its coarse grid's length units, else ``fallback``'s
    (the model's: the runs are of the model's kind of data)."""
    d = result if isinstance(result, Mapping) else (
        result.to_dict() if callable(getattr(result, "to_dict", None)) else {})
    settings = _mapping(_mapping(d).get("settings"))
    recorded = _mapping(settings.get("units"))
    fb = fallback or Units()
    grid = _mapping(settings.get("grid"))
    return Units(simplify(_first(recorded.get("length"), grid.get("units"), fb.length)),
                 simplify(_first(recorded.get("velocity"), _velocity_of(recorded),
                                 fb.velocity)),
                 _time_text(_first(recorded.get("time"), fb.time)),
                 dict(fb.scalars))


__all__ = ["DIMENSIONLESS", "NOT_RECORDED", "QUANTITIES", "Unit", "Units", "combine",
           "is_dimensionless", "label", "model_units", "parse", "run_units", "simplify",
           "variable_units"]
