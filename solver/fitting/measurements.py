"""Measured data from CSV files whose header names each column with its unit: ``name [unit]``.

Example file::

    # gate sweep, sample A, 1.5 K
    gate [V], current [uA], V2w [nV], sigma_xx [mS]
    -10, 10, 41.2, 0.494
    ...

``load_measurements(path, {"current": "A", "V2w": "V", "sigma_xx": "S"})`` returns
``{"current": array in A, "V2w": array in V, "sigma_xx": array in S}``: each requested column is
converted from the unit in the file to the unit asked for.  Units are products and quotients of
symbols with an optional SI prefix and an integer power, e.g. ``uA``, ``nV``, ``m/V``, ``cm^-2``,
``S``, ``kOhm``, ``meV``, ``A/V^2``.  Symbols: m g s A K Hz V Ohm (Ω) S T C F J W eV rad deg,
``1`` or ``-`` for dimensionless, ``%``; prefixes a f p n u (µ) m c k M G.  A column whose unit has a
different dimension from the one asked for (say ``Ohm`` where ``S`` is expected) is an error, not a
silent inversion.
"""
from __future__ import annotations

import csv
import difflib
import math
import os
import re

import numpy as np
from scipy import constants as _c

# SI factor and dimension exponents over (m, kg, s, A, K)
_SYMBOLS = {
    "m": (1.0, (1, 0, 0, 0, 0)), "g": (1e-3, (0, 1, 0, 0, 0)), "s": (1.0, (0, 0, 1, 0, 0)),
    "A": (1.0, (0, 0, 0, 1, 0)), "K": (1.0, (0, 0, 0, 0, 1)), "Hz": (1.0, (0, 0, -1, 0, 0)),
    "V": (1.0, (2, 1, -3, -1, 0)), "Ohm": (1.0, (2, 1, -3, -2, 0)), "Ω": (1.0, (2, 1, -3, -2, 0)),
    "S": (1.0, (-2, -1, 3, 2, 0)), "T": (1.0, (0, 1, -2, -1, 0)), "C": (1.0, (0, 0, 1, 1, 0)),
    "F": (1.0, (-2, -1, 4, 2, 0)), "J": (1.0, (2, 1, -2, 0, 0)), "W": (1.0, (2, 1, -3, 0, 0)),
    "eV": (_c.e, (2, 1, -2, 0, 0)), "rad": (1.0, (0, 0, 0, 0, 0)),
    "deg": (math.pi / 180.0, (0, 0, 0, 0, 0)), "1": (1.0, (0, 0, 0, 0, 0)), "-": (1.0, (0, 0, 0, 0, 0)),
    "%": (1e-2, (0, 0, 0, 0, 0)),
}
_PREFIXES = {"a": 1e-18, "f": 1e-15, "p": 1e-12, "n": 1e-9, "u": 1e-6, "µ": 1e-6, "μ": 1e-6,
             "m": 1e-3, "c": 1e-2, "k": 1e3, "M": 1e6, "G": 1e9}
_SUPERSCRIPT = str.maketrans("⁻⁰¹²³⁴⁵⁶⁷⁸⁹", "-0123456789")
_HEADER = re.compile(r"^\s*(?P<name>[^\[\]]*?)\s*\[\s*(?P<unit>[^\[\]]*?)\s*\]\s*$")
_FACTOR = re.compile(r"^(?P<sym>[^\^]+?)(?:\^?(?P<pow>[-+]?\d+))?$")


def parse_unit(text: str):
    """``(factor to SI, dimension exponents over (m, kg, s, A, K))`` of a unit string; raises
    ``ValueError`` for an unknown symbol."""
    t = text.strip().translate(_SUPERSCRIPT)
    if t in ("", "1", "-"):
        return 1.0, (0, 0, 0, 0, 0)
    tokens = [tok for tok in re.split(r"([/*·\s])", t) if tok.strip()]
    factor, dims, sign = 1.0, np.zeros(5, dtype=int), 1
    for tok in tokens:
        if tok in "/*·":
            sign = -1 if tok == "/" else 1
            continue
        m = _FACTOR.match(tok)
        if m is None:
            raise ValueError(f"unknown unit '{text}'")
        sym, power = m.group("sym"), int(m.group("pow") or 1)
        if sym in _SYMBOLS:
            f, d = _SYMBOLS[sym]
        elif len(sym) > 1 and sym[0] in _PREFIXES and sym[1:] in _SYMBOLS and sym[1:] not in ("1", "-", "%"):
            f, d = _SYMBOLS[sym[1:]]
            f = f * _PREFIXES[sym[0]]
        else:
            raise ValueError(f"unknown unit '{text}' (symbol '{sym}')")
        factor *= f ** (sign * power)
        dims += sign * power * np.asarray(d)
        sign = 1
    return factor, tuple(int(x) for x in dims)


def _examples(unit: str) -> str:
    base = unit.strip()
    if base in _SYMBOLS and base not in ("1", "-", "%"):
        return f"e.g. {base}, m{base}, u{base}, n{base}"
    return f"e.g. {base}"


def load_measurements(path, columns: dict, *, min_points: int | None = None, optional=(),
                      aliases: dict | None = None) -> dict:
    """Read the requested ``columns`` ({name: unit wanted}) of a CSV file with a ``name [unit]``
    header; returns {name: float64 array converted to the unit wanted}.

    Lines starting with ``#`` and blank lines are skipped; the first other line is the header.
    Raises ``ValueError`` naming the file, the column and the fix for: a missing column, a header
    without a unit, an unknown unit, a unit of the wrong dimension, missing or non-numeric values
    (listing the file line numbers), and fewer than ``min_points`` rows (e.g. the number of free
    fit parameters).  ``FileNotFoundError`` if the file does not exist.  Columns named in
    ``optional`` may be absent (they are then left out of the result); ``aliases`` ({name: (other
    header names, …)}) lists older header names also accepted for a column.
    """
    path = os.fspath(path)
    if not isinstance(columns, dict) or not columns:
        raise ValueError("load_measurements: columns must be a non-empty dict {name: unit}, e.g. "
                         "{'current': 'A', 'V2w': 'V'}")
    wanted = {}
    for name, unit in columns.items():
        try:
            wanted[name] = parse_unit(unit)
        except ValueError as exc:
            raise ValueError(f"load_measurements: {exc} requested for column '{name}'; use SI symbols "
                             "with an optional prefix such as A, uA, V, nV, S, m/V") from None
    if not os.path.exists(path):
        raise FileNotFoundError(f"load_measurements: no file '{path}'")
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            lines = [(i + 1, row) for i, row in enumerate(csv.reader(fh))]
    except UnicodeDecodeError as exc:
        raise ValueError(f"{path}: not UTF-8 text (byte 0x{exc.object[exc.start]:02x} at position {exc.start}); "
                         "save the measurement file as UTF-8 (CSV)") from None
    except csv.Error as exc:
        raise ValueError(f"{path}: not a readable CSV file ({exc}); save it as plain comma-separated text") from None
    body = [(n, row) for n, row in lines
            if row and any(c.strip() for c in row) and not row[0].lstrip().startswith("#")]
    if not body:
        raise ValueError(f"{path}: the file has no header line; the first line must name the columns "
                         "as 'name [unit]', e.g. 'current [uA], V2w [nV]'")
    header_line, header = body[0]
    rows = body[1:]
    names, units = [], []
    for cell in header:
        m = _HEADER.match(cell)
        if m:
            names.append(m.group("name").strip())
            units.append(m.group("unit"))
        else:
            names.append(cell.strip())
            units.append(None)
    seen = set()
    for n in names:
        if n in seen and n in columns:
            raise ValueError(f"{path}: column '{n}' appears twice in the header (line {header_line}); "
                             "rename one of them")
        seen.add(n)
    out = {}
    aliases = aliases or {}
    for name, (want_factor, want_dims) in wanted.items():
        if name not in names:
            alt = next((a for a in aliases.get(name, ()) if a in names), None)
            if alt is not None:
                names = [name if n == alt else n for n in names]
        if name not in names and name in optional:
            continue
        if name not in names:
            close = difflib.get_close_matches(name, names, n=1)
            hint = f" (did you mean '{close[0]}'?)" if close else ""
            raise ValueError(f"{path}: column '{name}' is missing{hint}; the header (line {header_line}) "
                             f"has {', '.join(repr(c) for c in header)}; add a column "
                             f"'{name} [{columns[name]}]'")
        j = names.index(name)
        if units[j] is None:
            raise ValueError(f"{path}: column '{name}' has no unit in the header (line {header_line}); "
                             f"write it as '{name} [{columns[name]}]' ({_examples(columns[name])})")
        try:
            have_factor, have_dims = parse_unit(units[j])
        except ValueError:
            raise ValueError(f"{path}: column '{name}' has unknown unit '{units[j]}'; use SI symbols with "
                             f"an optional prefix, {_examples(columns[name])}") from None
        if have_dims != want_dims:
            raise ValueError(f"{path}: column '{name}' is in '{units[j]}' but '{columns[name]}' is "
                             f"expected ({_examples(columns[name])}); convert the column or fix its header")
        values, bad = [], []
        for line_no, row in rows:
            if len(row) != len(header):
                raise ValueError(f"{path}: line {line_no} has {len(row)} values but the header has "
                                 f"{len(header)} columns; fix the row")
            try:
                v = float(row[j])
            except ValueError:
                v = math.nan
            if not math.isfinite(v):
                bad.append(line_no)
            values.append(v)
        if bad:
            shown = ", ".join(str(b) for b in bad[:20]) + (" …" if len(bad) > 20 else "")
            raise ValueError(f"{path}: column '{name}' has missing, non-numeric or NaN values on line(s) "
                             f"{shown}; fill them in or delete those rows")
        out[name] = np.asarray(values, dtype=np.float64) * (have_factor / want_factor)
    n_rows = len(rows)
    if n_rows == 0:
        raise ValueError(f"{path}: no data rows below the header; add measurements")
    if min_points is not None and n_rows < min_points:
        raise ValueError(f"{path}: {n_rows} data row(s) but at least {min_points} are needed (one per "
                         "free fit parameter, more for error estimates); add data or fix parameters")
    return out
