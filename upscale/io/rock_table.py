"""The rock table of two-phase upscaling: a TOML file read with the standard library's
``tomllib``, every key checked, and its rock types matched to the field's facies codes.

Layout::

    [fluids]
    water_viscosity = 0.5        # cP
    oil_viscosity = 2.0          # cP
    interfacial_tension = 0.025  # N/m, times cos(contact angle)

    [rock.channel_sand]          # a flag meaning of the field's facies, or its code: [rock."1"]
    swc = 0.12
    sor = 0.18
    krw_max = 0.35
    kro_max = 0.9
    nw = 2.5
    no = 2.0
    j_entry = 0.25
    pore_size_index = 2.0

Every refusal is one :class:`~upscale.errors.InputError` line naming the file, the table,
the key, the value and what it must be, with its units.
"""

from __future__ import annotations

import hashlib
import math
import os
import tomllib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import xarray as xr

from ..core.rock_curves import ROCK_KEYS, Fluids, RockCurves
from ..errors import InputError
from .validation import Check, count_bad, first_flat_index

#: key -> (what it is, with units; lowest, highest; whether each bound is allowed)
FLUID_RULES = {
    "water_viscosity": ("water viscosity, cP", 0.0, math.inf, False, False),
    "oil_viscosity": ("oil viscosity, cP", 0.0, math.inf, False, False),
    "interfacial_tension": ("interfacial tension times cos(contact angle), N/m", 0.0, 1.0, False, True),
}


ROCK_RULES = {
    "swc": ("connate water saturation, fraction of pore volume", 0.0, 1.0, True, False),
    "sor": ("residual oil saturation, fraction of pore volume", 0.0, 1.0, True, False),
    "krw_max": ("water relative permeability at 1 - sor, fraction of k", 0.0, 1.0, False, True),
    "kro_max": ("oil relative permeability at swc, fraction of k", 0.0, 1.0, False, True),
    "nw": ("Corey exponent of water, dimensionless", 0.0, math.inf, False, False),
    "no": ("Corey exponent of oil, dimensionless", 0.0, math.inf, False, False),
    "j_entry": ("Leverett J at the entry pressure, dimensionless", 0.0, math.inf, False, False),
    "pore_size_index": ("Brooks-Corey pore-size index lambda, dimensionless", 0.0, math.inf, False, False),
}


HINTS = {"interfacial_tension": "; values above 1 look like mN/m (dyn/cm): divide by 1000",
         "swc": "; give fractions (0..1), not percent", "sor": "; give fractions (0..1), not percent"}


@dataclass(frozen=True)
class RockTable:
    """A checked rock table.

    Attributes
    ----------
    path : str
        The file it was read from (resolved).
    sha256 : str
        The file's checksum.
    fluids : Fluids
    curves : RockCurves
        The rock types in the file's order, named as in the file.
    """

    path: str
    sha256: str
    fluids: Fluids
    curves: RockCurves


def read_rock_table(path: str | os.PathLike) -> RockTable:
    """Read and check a rock table.

    Parameters
    ----------
    path : str or os.PathLike
        A TOML file in the layout of this module.

    Returns
    -------
    RockTable

    Raises
    ------
    InputError
        The file is missing or not TOML; a table or key is unknown or missing; a value
        is not a number or out of range (saturations outside 0..1, swc + sor >= 1, ...).
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: rock table not found" + (" (it is a folder)" if path.is_dir() else ""))
    raw = path.read_bytes()
    try:
        document = tomllib.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputError(f"{path}: not a valid TOML rock table ({exc})") from None
    unknown = sorted(set(document) - {"fluids", "rock"})
    if unknown:
        raise InputError(f"{path}: unknown table or key '{unknown[0]}'; a rock table holds [fluids] and "
                         f"[rock.NAME] tables only")
    fluids = Fluids(**_checked(path, "fluids", _table(path, document, "fluids"), FLUID_RULES))
    rocks = _table(path, document, "rock") if "rock" in document else {}
    if not rocks:
        raise InputError(f"{path}: no rock type; add a [rock.NAME] table per facies (NAME a flag meaning of the "
                         f"field's facies, or its code as [rock.\"1\"])")
    values = {name: _rock(path, name, _table(path, rocks, name, parent="rock")) for name in rocks}
    curves = RockCurves(tuple(values), *(np.array([v[key] for v in values.values()], dtype=float) for key in ROCK_KEYS))
    return RockTable(str(path.resolve()), hashlib.sha256(raw).hexdigest(), fluids, curves)


def _table(path: Path, document: dict, name: str, parent: str | None = None) -> dict:
    """The sub-table ``name`` of ``document``, refused when missing or not a table."""
    label = f"[{parent}.{name}]" if parent else f"[{name}]"
    if name not in document:
        raise InputError(f"{path}: missing table {label}")
    table = document[name]
    if not isinstance(table, dict):
        raise InputError(f"{path}: {label} must be a table of keys, got the value {table!r}")
    return table


def _rock(path: Path, name: str, table: dict) -> dict[str, float]:
    """One rock type's keys, checked, and its saturations together (swc + sor < 1)."""
    values = _checked(path, f"rock.{name}", table, ROCK_RULES)
    if values["swc"] + values["sor"] >= 1.0:
        raise InputError(f"{path}: [rock.{name}] swc + sor = {values['swc'] + values['sor']:g} must be below 1 "
                         f"(fractions of pore volume): nothing would be left to move")
    return values


def _checked(path: Path, label: str, table: dict, rules: dict) -> dict[str, float]:
    """The keys of one table, each a number within its rule; unknown and missing keys refused."""
    unknown = [key for key in table if key not in rules]
    if unknown:
        raise InputError(f"{path}: [{label}] unknown key '{unknown[0]}'; the keys are {', '.join(rules)}")
    missing = [key for key in rules if key not in table]
    if missing:
        raise InputError(f"{path}: [{label}] misses {', '.join(missing)} ({'; '.join(rules[k][0] for k in missing)})")
    return {key: _number(path, label, key, table[key], rules[key]) for key in rules}


def _number(path: Path, label: str, key: str, value, rule) -> float:
    """One value, refused unless a finite number within its bounds."""
    meaning, low, high, low_ok, high_ok = rule
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(f"{path}: [{label}] {key} = {value!r} must be a finite number ({meaning})")
    inside = (value >= low if low_ok else value > low) and (value <= high if high_ok else value < high)
    if not inside:
        bounds = ("[" if low_ok else "(") + f"{low:g}, " + (f"{high:g}" if math.isfinite(high) else "inf") + (
            "]" if high_ok else ")")
        raise InputError(f"{path}: [{label}] {key} = {value:g} is outside {bounds} ({meaning}){HINTS.get(key, '')}")
    return float(value)


def facies_rocks(fine: xr.Dataset, table: RockTable, variable: str = "facies",
                 where: str = "field") -> tuple[np.ndarray, np.ndarray]:
    """Match the rock table to the field's facies codes.

    A rock type named like a flag meaning of the facies variable (``flag_meanings``, with
    ``flag_values``) takes its code; a rock type named by an integer takes that code.

    Parameters
    ----------
    fine : xarray.Dataset
        A normalised field with the integer variable ``variable`` on (x, y, z).
    table : RockTable
    variable : str
        The facies variable.
    where : str
        What refusals name first (the field's ``source_path`` when it has one).

    Returns
    -------
    codes : ndarray of int, (C,)
        The codes with a rock type, sorted.
    rock_of_code : ndarray of int, (C,)
        The index of each code's rock type in ``table.curves``.

    Raises
    ------
    InputError
        No such variable, wrong dimensions or not integer in active cells (:func:`code_variable`);
        a rock type naming no facies, two naming the same; a code of an active cell with no
        rock type.
    """
    where = fine.attrs.get("source_path", where)
    facies = code_variable(fine, variable, where)
    meanings = _meanings(facies, variable, where)
    by_code = {}
    for index, name in enumerate(table.curves.names):
        code = meanings.get(name, _integer(name))
        if code is None:
            known = ", ".join(f"{m} ({c})" for m, c in meanings.items()) or "none; use the codes"
            raise InputError(f"{table.path}: [rock.{name}] names no facies of {where} (flag meanings: {known}); "
                             f"name a flag meaning, or give the code as [rock.\"1\"]")
        if code in by_code:
            raise InputError(f"{table.path}: [rock.{name}] and [rock.{table.curves.names[by_code[code]]}] both "
                             f"give facies code {code}; keep one")
        by_code[code] = index
    codes = np.array(sorted(by_code), dtype=np.int64)
    _refuse_without_rock(fine, facies, codes, {c: m for m, c in meanings.items()}, table, where)
    return codes, np.array([by_code[c] for c in codes], dtype=np.int64)


def code_variable(fine: xr.Dataset, variable: str, where: str = "field") -> xr.DataArray:
    """An integer code variable of the field (facies, regions), checked.

    Parameters
    ----------
    fine : xarray.Dataset
        A normalised field.
    variable : str
    where : str
        What refusals name first (the field's ``source_path`` when it has one).

    Returns
    -------
    xarray.DataArray
        The variable, on (x, y, z), numeric, an integer in every active cell; else refused.
    """
    where = fine.attrs.get("source_path", where)
    if variable not in fine:
        raise InputError(f"{where}: no variable '{variable}' (integer codes per cell, e.g. facies with flag_values "
                         f"and flag_meanings)")
    codes = fine[variable]
    if codes.dims != ("x", "y", "z"):
        raise InputError(f"{where}: variable '{variable}' has dimensions ({', '.join(codes.dims)}), "
                         f"expected (x, y, z)")
    if codes.dtype.kind not in "biuf":
        raise InputError(f"{where}: variable '{variable}' is not numeric (type {codes.dtype}); store integer codes")
    values = xr.DataArray(codes.variable).astype(float)
    _refuse_first_cell(fine, Check(~(np.isfinite(values) & (values == np.round(values))), variable, "", ""), values,
                       lambda count, at, value: f"{where}: variable '{variable}' is not an integer code in {count} "
                                                f"active cell(s), first at {at} (value {value:g}); store integer codes")
    return codes


def _meanings(facies: xr.DataArray, variable: str, where: str) -> dict[str, int]:
    """Flag meaning -> code from the CF attributes (none without them)."""
    meanings = str(facies.attrs.get("flag_meanings", "")).split()
    values = np.atleast_1d(facies.attrs.get("flag_values", []))
    if len(meanings) != len(values):
        raise InputError(f"{where}: variable '{variable}' has {len(meanings)} flag_meanings but {len(values)} "
                         f"flag_values; give one code per meaning")
    return {m: int(v) for m, v in zip(meanings, values)}


def _integer(name: str) -> int | None:
    """The code a rock type named by an integer gives, else None."""
    try:
        return int(name.strip())
    except ValueError:
        return None


def _refuse_without_rock(fine: xr.Dataset, facies: xr.DataArray, codes: np.ndarray, names: dict, table: RockTable,
                         where: str) -> None:
    """Refuse active cells whose facies code has no rock type."""
    values = xr.DataArray(facies.variable).astype(float)

    def message(count, at, value):
        code = int(value)
        label, add = (f"{code} ({names[code]})", f"[rock.{names[code]}]") if code in names else (
            str(code), f"[rock.\"{code}\"]")
        return (f"{where}: facies code {label} has no rock type in {table.path}: {count} active cell(s), first at "
                f"{at}; add {add}")

    _refuse_first_cell(fine, Check(~values.isin(codes.astype(float)), facies.name, "", ""), values, message)


def _refuse_first_cell(fine: xr.Dataset, check: Check, values: xr.DataArray, message) -> None:
    """Count the active cells of ``check`` (lazily: slab by slab) and refuse with
    ``message(count, at, value)`` at the first of them, if any."""
    active = xr.DataArray(fine["active"].variable).astype(bool)
    check = Check(active & check.mask, check.name, check.problem, check.fix)
    (count,) = count_bad([check])
    if count:
        index = np.unravel_index(first_flat_index(check.mask.data), check.mask.shape)
        at = "(" + ", ".join(f"{d}={i}" for d, i in zip(("x", "y", "z"), index)) + ")"
        raise InputError(message(count, at, float(values[index])))
