"""The lab's own headers and units: ``columns.toml`` (see the package notes, Mapping file)."""

from __future__ import annotations

import hashlib
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable

from linkage import read as package
from linkage.exceptions import InputError, Problem, toml_problem
from linkage.nearest import did_you_mean
from linkage.read import MAPPING_FILE
from linkage.read.raw import _norm_header
from linkage.schema import NUMBER, TABLES, Column, Table

#: template unit -> {unit a file may use: factor to the template unit}.
#: SI prefixes and derived units (BIPM, The International System of Units,
#: 9th ed. 2019); 1 kgf = 1 kp = 9.80665 N (standard acceleration of gravity,
#: 3rd CGPM 1901); 1 in = 25.4 mm (international inch, 1959).
UNITS: dict[str, dict[str, float]] = {
    "g/cm3": {"g/cm3": 1.0, "g/ml": 1.0, "g/mL": 1.0, "kg/L": 1.0, "kg/l": 1.0, "kg/m3": 1e-3},
    "g": {"g": 1.0, "mg": 1e-3, "kg": 1e3},
    "mg": {"mg": 1.0, "g": 1e3},
    "mm": {"mm": 1.0, "cm": 10.0, "m": 1e3, "um": 1e-3, "in": 25.4},
    "um": {"um": 1.0, "mm": 1e3},
    "N": {"N": 1.0, "kN": 1e3, "kp": 9.80665, "kgf": 9.80665},
    "kN": {"kN": 1.0, "N": 1e-3},
    "kN/cm": {"kN/cm": 1.0, "kN/mm": 10.0, "N/mm": 1e-2},
    "%": {"%": 1.0, "fraction": 100.0},
    "min": {"min": 1.0, "s": 1.0 / 60.0, "h": 60.0},
    "rpm": {"rpm": 1.0, "1/min": 1.0, "min-1": 1.0},
}
#: A total roll force in these units becomes kN/cm by dividing by the roll width.
TOTAL_FORCE_UNITS: dict[str, float] = {"kN": 1.0, "N": 1e-3}
TOTAL_FORCE_COLUMN = "roll_force_kn_per_cm"
ROLL_WIDTH_COLUMN = "roll_width_mm"



@dataclass(frozen=True)
class ColumnMap:
    """One header of the lab's files and what it becomes."""

    source: str
    target: str
    unit: str | None = None
    factor: float = 1.0
    total_force: bool = False
    roll_width_mm: float | None = None
    extra: bool = False


@dataclass(frozen=True)
class Mapping:
    """The lab's headers and units (``columns.toml``), see the module notes."""

    tables: dict[str, dict[str, ColumnMap]] = field(default_factory=dict)
    file: str = MAPPING_FILE
    sha256: str | None = None

    def for_table(self, table: str) -> dict[str, ColumnMap]:
        """Header key (trimmed, lower case) -> ColumnMap for one table."""
        return self.tables.get(table, {})

    @classmethod
    def from_dict(cls, data: dict, file: str = MAPPING_FILE, sha256: str | None = None) -> Mapping:
        problems: list[Problem] = []
        tables: dict[str, dict[str, ColumnMap]] = {}
        for tname, section in data.items():
            if tname not in TABLES:
                problems.append(toml_problem(file, f"unknown table [{tname}]{_suggest(tname, TABLES)}; "
                                                   f"tables: {', '.join(TABLES)}"))
                continue
            if not isinstance(section, dict) or set(section) - {"columns"}:
                found = (", ".join(map(repr, sorted(set(section) - {"columns"}))) if isinstance(section, dict)
                         else f"{tname} = {section!r}")
                problems.append(toml_problem(file, f"[{tname}] may only hold a [{tname}.columns] table; found {found}"))
                continue
            columns = section.get("columns", {})
            if not isinstance(columns, dict):
                problems.append(toml_problem(file, f"[{tname}.columns] must be a table of header = column"))
                continue
            tables[tname] = _mapping_columns(TABLES[tname], columns, file, problems)
        if problems:
            raise InputError(problems)
        return cls(tables, file, sha256)


def _key_problem(file: str, rule: str, source: str, value: object = None) -> Problem:
    """A problem of one header's entry of a mapping file: said at its key (the header, as the file has it), kept
    as the problem's ``column`` too, where code reading problems found it before."""
    return toml_problem(file, rule, key=source, column=source, value=value)


def _mapping_columns(tdef: Table, columns: dict, file: str, problems: list[Problem]) -> dict[str, ColumnMap]:
    out: dict[str, ColumnMap] = {}
    targets: dict[str, str] = {}
    for source, value in columns.items():
        where = f"[{tdef.name}.columns] \"{source}\""
        key = _norm_header(source).lower()
        if isinstance(value, str):
            value = {"column": value}
        if not isinstance(value, dict):
            problems.append(_key_problem(file, f"{where}: must be a column name or an inline table "
                                               "{ column = ..., unit = ... }", source, value=value))
            continue
        unknown = sorted(set(value) - {"column", "unit", "roll_width_mm", "roll_width_cm", "extra"})
        if unknown:
            problems.append(_key_problem(file, f"{where}: unknown key(s) {', '.join(unknown)}; allowed: column, unit, "
                                               "roll_width_mm, roll_width_cm, extra", source))
            continue
        target = value.get("column", _norm_header(source))
        extra = value.get("extra", False)
        if not isinstance(target, str) or not target.strip() or not isinstance(extra, bool):
            problems.append(_key_problem(file, f"{where}: column must be a name and extra true or false",
                                         source, value=target))
            continue
        target = _norm_header(target)
        if extra:
            if target.lower() in tdef.names or set(value) - {"column", "extra"}:
                problems.append(_key_problem(file, f"{where}: an extra column takes only a new name, not a template "
                                                   "name or a unit", source, value=target))
                continue
            cmap = ColumnMap(source, target, extra=True)
        else:
            if target not in tdef.names:
                problems.append(_key_problem(file, f"{where}: unknown target column '{target}' in table {tdef.name}"
                                                   f"{_suggest(target, tdef.names)}; columns: {', '.join(tdef.names)} "
                                                   "(or add extra = true for a new column)", source, value=target))
                continue
            cmap = _unit_map(tdef.column(target), source, value, where, file, problems)
            if cmap is None:
                continue
        if target.lower() in targets:
            problems.append(_key_problem(file, f"{where}: column '{target}' is already the target of "
                                               f"\"{targets[target.lower()]}\"", source, value=target))
            continue
        targets[target.lower()] = source
        out[key] = cmap
    return out


def _unit_map(col: Column, source: str, value: dict, where: str, file: str,
              problems: list[Problem]) -> ColumnMap | None:
    width_keys = [k for k in ("roll_width_mm", "roll_width_cm") if k in value]
    unit = value.get("unit")
    if unit is None:
        if width_keys:
            problems.append(_key_problem(file, f"{where}: {width_keys[0]} only goes with a total roll force unit",
                                         source))
            return None
        return ColumnMap(source, col.name)
    if not isinstance(unit, str):
        problems.append(_key_problem(file, f"{where}: unit must be text", source, value=unit))
        return None
    norm = _norm_unit(unit)
    accepted = dict(UNITS.get(col.unit, {})) if col.kind == NUMBER else {}
    total = col.name == TOTAL_FORCE_COLUMN and norm in TOTAL_FORCE_UNITS
    if not total and norm not in accepted:
        names = sorted(accepted) + (sorted(f"{u} (total force)" for u in TOTAL_FORCE_UNITS)
                                    if col.name == TOTAL_FORCE_COLUMN else [])
        choice = f"accepted: {', '.join(names)}" if names else "this column takes no unit conversion"
        problems.append(_key_problem(file, f"{where}: unknown unit '{unit}' for {col.name} [{col.unit}]; {choice}",
                                     source, value=unit))
        return None
    if width_keys and not total:
        problems.append(_key_problem(file, f"{where}: {width_keys[0]} only goes with a total roll force unit "
                                           f"({', '.join(TOTAL_FORCE_UNITS)})", source))
        return None
    width = None
    if width_keys:
        if len(width_keys) > 1:
            problems.append(_key_problem(file, f"{where}: give roll_width_mm or roll_width_cm, not both", source))
            return None
        raw = value[width_keys[0]]
        number = _finite_float(raw)
        if number is None or not number > 0:
            problems.append(_key_problem(file, f"{where}: {width_keys[0]} must be a number > 0", source,
                                         value=raw))
            return None
        width = number * (10.0 if width_keys[0] == "roll_width_cm" else 1.0)
    if total:
        return ColumnMap(source, col.name, norm, TOTAL_FORCE_UNITS[norm], total_force=True, roll_width_mm=width)
    return ColumnMap(source, col.name, norm, accepted[norm])


def _finite_float(value: object) -> float | None:
    """A TOML number as a finite float, or None (not a number, NaN, infinite,
    or an integer beyond float range, where float() raises OverflowError)."""
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    try:
        number = float(value)
    except OverflowError:
        return None
    return number if math.isfinite(number) else None


def read_mapping(path: Path) -> Mapping:
    """Read and check a ``columns.toml`` mapping file."""
    path = Path(path)
    size = path.stat().st_size
    if size > package.MAX_MAPPING_BYTES:
        raise InputError(Problem(path.name, f"{size:,} bytes; a mapping file may hold at most "
                                            f"{package.MAX_MAPPING_BYTES:,} bytes (a real one is a few kB)"))
    data = path.read_bytes()
    try:
        parsed = tomllib.loads(data.decode("utf-8-sig"))
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputError(toml_problem(path.name, f"not valid TOML: {exc}", line=_toml_line(exc))) from None
    except RecursionError:  # tomllib is recursive: arrays or tables nested thousands deep
        raise InputError(Problem(path.name, "not valid TOML: nested too deeply")) from None
    return Mapping.from_dict(parsed, path.name, hashlib.sha256(data).hexdigest())


def _toml_line(exc: Exception) -> int | None:
    m = re.search(r"line (\d+)", str(exc))
    return int(m.group(1)) if m else None

#: a unit written after a column name: "name [%]", "name (%)", "name {mm}", "name, %", "name / mm", "name in mm"
_UNIT_SUFFIX = re.compile(r"^(.*?)\s*(?:[\[({][^\])}]*[\])}]|(?:,|/|\s+in\s+)\s*\S+|\s+%)\s*$", re.IGNORECASE)


def _without_unit(header: str) -> str:
    """A header with a trailing unit taken off (``dissolution_pct [%]`` -> ``dissolution_pct``); else as it is."""
    m = _UNIT_SUFFIX.match(header)
    return m.group(1) if m else header


def _norm_unit(text: str) -> str:
    s = text.replace("³", "3").replace("^3", "3").replace("µ", "u").replace("μ", "u")
    return "".join(s.split())


def _suggest(name: str, choices: Iterable[str]) -> str:
    """`` (did you mean 'x'?)`` with the choice nearest ``name`` as a whole, or ''
    (:func:`linkage.nearest.did_you_mean`)."""
    return did_you_mean(name, choices, by_beginning=False)
