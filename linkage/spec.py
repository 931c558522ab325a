"""Acceptance limits: ``spec.toml``.

One TOML table per quality attribute, named as the column of the assembled
table (``schema.QUALITY_ATTRIBUTES``), with ``min`` and/or ``max`` in that
column's unit (``schema.ASSEMBLED``). The ``dissolution_pct`` table may carry
``time_min``, the time point the limit applies to (default 30 min)::

    [dissolution_pct]
    min = 80
    time_min = 30

    [tensile_strength_mpa]
    min = 1.7

    [weight_rsd_pct]
    max = 2.0

Limits are inclusive: a value passes when ``min <= value <= max`` (a spec of
"not less than 80 %" passes 80.0). Values are compared as given, without
rounding to the limit's digits.

Refused, with the file, line and attribute named: invalid TOML; an unknown
attribute (the valid ones are listed); a key other than ``min``/``max``
(and ``time_min`` in ``dissolution_pct``); a limit that is not a number; a
table with neither ``min`` nor ``max``; ``min`` above ``max``; and a limit
outside the attribute's plausible range, which usually means the wrong unit
(a porosity of 20 meant as percent, a dissolution maximum of 500).

Compendial judgement (:mod:`linkage.decide.compendial`)::

    [dissolution_pct]
    min = 80            # Q
    judge = "stages"    # USP <711> immediate-release table; default "mean"
    pass_by = "S3"      # the stage a lot must pass by for P(all); default S3

    [acceptance_value]
    max = 15            # L1 of USP <905>, judged on simulated unit weights

``judge = "stages"`` needs ``min`` (Q, at most 100 %) and no ``max``;
``pass_by`` needs ``judge = "stages"``; ``[acceptance_value]`` takes only
``max``, in 0 < max <= 100.
"""

from __future__ import annotations

import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from linkage.exceptions import Problem, SpecError, UsageError, toml_problem
from linkage.nearest import did_you_mean
from linkage.schema import (ASSEMBLED, DEFAULT_DISSOLUTION_TIME_MIN, QUALITY_ATTRIBUTES, TABLES)

DISSOLUTION = "dissolution_pct"
#: the spec table of the USP <905> acceptance value (not a column: judged on simulated units)
ACCEPTANCE_VALUE = "acceptance_value"
JUDGES = ("mean", "stages")
STAGES = ("S1", "S2", "S3")

#: Plausible ranges of the quality attributes that are not input columns of
#: the template (those take their bounds from ``schema.TABLES``).
#: Porosity and solid fraction are fractions by definition (porosity =
#: 1 - envelope/skeletal density); fines are a mass percentage. The upper ends
#: of strength, span and acceptance value are generous guards against a unit
#: slip (kPa for MPa), common practice, no source.
DERIVED_RANGES: dict[str, tuple[float, float]] = {
    "ribbon_porosity": (0.0, 1.0),
    "ribbon_solid_fraction": (0.0, 1.0),
    "fines_pct": (0.0, 100.0),
    "granule_span": (0.0, 100.0),
    "tensile_strength_mpa": (0.0, 100.0),
    "ribbon_tensile_strength_mpa": (0.0, 100.0),
    "weight_acceptance_value": (0.0, 100.0),
}


def plausible_range(attribute: str) -> tuple[float, float]:
    """(low, high) a limit on ``attribute`` must lie in, in its assembled unit."""
    if attribute in DERIVED_RANGES:
        return DERIVED_RANGES[attribute]
    source = attribute.removeprefix("granule_")  # granule_d50_um <- granules_laser.d50_um
    for table in TABLES.values():
        if source in table.names:
            col = table.column(source)
            return (-math.inf if col.low is None else col.low, math.inf if col.high is None else col.high)
    raise KeyError(attribute)


def _time_range() -> tuple[float, float]:
    col = TABLES["dissolution"].column("time_min")
    return col.low, col.high


@dataclass(frozen=True)
class Limit:
    """An inclusive acceptance interval; ``None`` is an open side."""

    min: float | None = None
    max: float | None = None

    def text(self) -> str:
        if self.min is not None and self.max is not None:
            return f"{self.min:g} to {self.max:g}"
        return f">= {self.min:g}" if self.min is not None else f"<= {self.max:g}"


@dataclass(frozen=True)
class Spec:
    """Acceptance limits by quality attribute, and the dissolution time point."""

    limits: dict[str, Limit] = field(default_factory=dict)
    dissolution_time_min: float = DEFAULT_DISSOLUTION_TIME_MIN
    #: how dissolution is judged: "mean" (the lot mean against its limits) or "stages" (USP <711> Table 1 on
    #: simulated units, Q = min), and the stage a lot must pass by ("S1", "S2" or "S3")
    dissolution_judge: str = "mean"
    dissolution_pass_by: str = "S3"
    #: L1 of the USP <905> acceptance value ([acceptance_value] max); None when the spec has no such table
    acceptance_value_max: float | None = None
    #: the file it was read from (its name) and the SHA-256 of its bytes; None when not read from a file
    file: str | None = field(default=None, compare=False)
    sha256: str | None = field(default=None, compare=False)

    def judge_of(self, attribute: str) -> str:
        """How ``attribute`` is judged: ``"mean"``, the lot value (a lot mean)
        against the limits, unless the spec names another judge for it (a
        ``dissolution_judge`` field, where the spec has one)."""
        if attribute == DISSOLUTION:
            return str(getattr(self, "dissolution_judge", "mean"))
        return "mean"

    def time_point_of(self, attribute: str) -> float | None:
        """The time point [min] of ``attribute``'s limit (dissolution only)."""
        return self.dissolution_time_min if attribute == DISSOLUTION else None

    def describe(self) -> dict:
        """Where the spec came from and how each attribute is judged (for the
        report and the what-if sheet)."""
        attributes = {a: {"limits": lim.text(), "judge": self.judge_of(a), "time_min": self.time_point_of(a)}
                      for a, lim in self.limits.items()}
        if self.acceptance_value_max is not None:
            attributes["acceptance_value"] = {"limits": f"<= {self.acceptance_value_max:g}",
                                              "judge": "stages (USP <905>)", "time_min": None}
        return {"file": self.file, "sha256": self.sha256, "attributes": attributes}

    def passes(self, attribute: str, value: float) -> bool:
        """True when ``value`` meets the limits of ``attribute`` (inclusive).

        An attribute without limits passes; a missing value (NaN, None) does
        not. An attribute that is not a quality attribute is a UsageError.
        """
        if attribute not in QUALITY_ATTRIBUTES:
            raise UsageError(f"'{attribute}' is not a quality attribute{_suggest(attribute)}; "
                             f"valid: {', '.join(QUALITY_ATTRIBUTES)}")
        limit = self.limits.get(attribute)
        if limit is None:
            return True
        if value is None or math.isnan(float(value)):
            return False
        v = float(value)
        return (limit.min is None or v >= limit.min) and (limit.max is None or v <= limit.max)

    def to_dict(self) -> dict:
        out = {
            "limits": {a: {k: v for k, v in (("min", lim.min), ("max", lim.max)) if v is not None}
                       for a, lim in self.limits.items()},
            "dissolution_time_min": self.dissolution_time_min,
        }
        if self.dissolution_judge != "mean":  # keys only when used, so a plain spec's record is unchanged
            out["dissolution_judge"] = self.dissolution_judge
            out["dissolution_pass_by"] = self.dissolution_pass_by
        if self.acceptance_value_max is not None:
            out["acceptance_value_max"] = self.acceptance_value_max
        return out

    def judges(self) -> dict[str, str]:
        """Attribute -> how it is judged, in words (every output says it)."""
        from linkage.decide.compendial import judge_text

        return judge_text(self)

    @classmethod
    def from_dict(cls, data: dict, file: str = "spec") -> Spec:
        """Inverse of :meth:`to_dict`, with the checks of :func:`read_spec`."""
        tables = {a: dict(v) for a, v in data.get("limits", {}).items()}
        time = data.get("dissolution_time_min", DEFAULT_DISSOLUTION_TIME_MIN)
        if time != DEFAULT_DISSOLUTION_TIME_MIN or DISSOLUTION in tables:
            tables.setdefault(DISSOLUTION, {})["time_min"] = time
        if data.get("dissolution_judge", "mean") != "mean":
            tables.setdefault(DISSOLUTION, {})["judge"] = data["dissolution_judge"]
            tables[DISSOLUTION]["pass_by"] = data.get("dissolution_pass_by", "S3")
        if data.get("acceptance_value_max") is not None:
            tables[ACCEPTANCE_VALUE] = {"max": data["acceptance_value_max"]}
        return _parse(tables, file, "")


def read_spec(path: Path) -> Spec:
    """Read and check a ``spec.toml`` file; raises :class:`SpecError` with every problem."""
    path = Path(path)
    if not path.is_file():
        raise SpecError(Problem(str(path), "no such spec file"))
    try:
        raw = path.read_bytes()
        text = raw.decode("utf-8-sig")
        data = tomllib.loads(text)
    except UnicodeDecodeError:
        raise SpecError(Problem(path.name, "not UTF-8 text")) from None
    except tomllib.TOMLDecodeError as exc:
        m = re.search(r"line (\d+)", str(exc))
        line = int(m.group(1)) if m else None
        raise SpecError(toml_problem(path.name, f"not valid TOML: {exc}", line=line)) from None
    except RecursionError:
        raise SpecError(Problem(path.name, "not valid TOML: nested too deeply")) from None
    import dataclasses
    import hashlib

    return dataclasses.replace(_parse(data, path.name, text), file=path.name,
                               sha256=hashlib.sha256(raw).hexdigest())


def _parse(data: dict, file: str, text: str) -> Spec:
    problems: list[Problem] = []
    limits: dict[str, Limit] = {}
    time_min = DEFAULT_DISSOLUTION_TIME_MIN

    def bad(attr: str, rule: str, value=None, key: str | None = None) -> None:
        problems.append(toml_problem(file, rule, line=_line_of(text, attr, key), table=attr, key=key, value=value,
                                     column=attr))

    if not data:
        problems.append(Problem(file, "no limits: give one table per quality attribute, e.g. "
                                      "[dissolution_pct] min = 80"))
    judge, pass_by, av_max = "mean", "S3", None
    for attr, table in data.items():
        if attr == ACCEPTANCE_VALUE:
            av_max = _parse_acceptance_value(table, bad)
            continue
        if attr not in QUALITY_ATTRIBUTES:
            bad(attr, f"unknown quality attribute [{attr}]{_suggest(attr)}; valid: {', '.join(QUALITY_ATTRIBUTES)}; "
                      f"and [{ACCEPTANCE_VALUE}] for the USP <905> acceptance value (max = L1)")
            continue
        if not isinstance(table, dict):
            bad(attr, f"'{attr}' must be a table: [{attr}] with min and/or max", table)
            continue
        allowed = {"min", "max", "time_min", "judge", "pass_by"} if attr == DISSOLUTION else {"min", "max"}
        unknown = sorted(set(table) - allowed)
        for key in unknown:
            where = " (time_min belongs in [dissolution_pct] only)" if key == "time_min" else _suggest(key, allowed)
            bad(attr, f"[{attr}]: unknown key '{key}'{where}; allowed: {', '.join(sorted(allowed))}", table[key],
                key=key)
        values: dict[str, float] = {}
        for key in ("min", "max", "time_min"):
            if key not in table or key not in allowed:
                continue
            v = table[key]
            try:  # a TOML integer may be too large for a float
                f = float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else math.nan
            except OverflowError:
                f = math.nan
            if not math.isfinite(f):
                huge = isinstance(v, int) and not isinstance(v, bool)  # only an overflowing integer gets here
                bad(attr, f"[{attr}] {key} must be a number", "an integer beyond float range" if huge else v, key=key)
                continue
            values[key] = f
        if "min" not in table and "max" not in table:
            if not unknown:  # an unknown key already says which keys are allowed
                bad(attr, f"[{attr}] has neither min nor max")
            continue
        lo, hi = plausible_range(attr)
        unit = ASSEMBLED.get(attr, "")
        ok = True
        for key in ("min", "max"):
            if key in values and not lo <= values[key] <= hi:
                hint = " (a fraction: write 0.20 for 20%)" if (lo, hi) == (0.0, 1.0) else ""
                bad(attr, f"[{attr}] {key} = {values[key]:g} is outside the plausible range {lo:g} to {hi:g} "
                          f"{unit} of {attr}: limit in the wrong unit range?{hint}", table[key], key=key)
                ok = False
        if "min" in values and "max" in values and values["min"] > values["max"]:
            bad(attr, f"[{attr}] min {values['min']:g} is above max {values['max']:g}", table["min"], key="min")
            ok = False
        if "time_min" in values:
            t_lo, t_hi = _time_range()
            if not t_lo < values["time_min"] <= t_hi:
                bad(attr, f"[{attr}] time_min must be in {t_lo:g} < time_min <= {t_hi:g} min", table["time_min"],
                    key="time_min")
                ok = False
            else:
                time_min = values["time_min"]
        if attr == DISSOLUTION and ("judge" in table or "pass_by" in table):
            judged = _parse_judge(table, values, bad)
            if judged is None:
                ok = False
            else:
                judge, pass_by = judged
        if ok and ("min" in values or "max" in values) and set(values) >= set(table) & {"min", "max"}:
            limits[attr] = Limit(values.get("min"), values.get("max"))
    if problems:  # in the file's order of lines (a problem without a line first), as a reader goes down the file
        raise SpecError(sorted(problems, key=lambda p: -1 if p.row is None else p.row))
    return Spec(limits, time_min, judge, pass_by, av_max)


def _parse_judge(table: dict, values: dict, bad) -> tuple[str, str] | None:
    """``judge`` and ``pass_by`` of [dissolution_pct]; None (with the problems told to ``bad``) when wrong."""
    judge, pass_by = table.get("judge", "mean"), table.get("pass_by", "S3")
    ok = True
    if judge not in JUDGES:
        bad(DISSOLUTION, f"[{DISSOLUTION}] judge must be \"mean\" (the lot mean against the limits) or "
                         f"\"stages\" (USP <711> acceptance table)", judge, key="judge")
        return None
    if "pass_by" in table and judge != "stages":
        bad(DISSOLUTION, f"[{DISSOLUTION}] pass_by applies to judge = \"stages\" only", pass_by, key="pass_by")
        ok = False
    elif pass_by not in STAGES:
        bad(DISSOLUTION, f"[{DISSOLUTION}] pass_by must be \"S1\", \"S2\" or \"S3\" (USP <711> stages)", pass_by,
            key="pass_by")
        ok = False
    if judge == "stages":
        if "max" in table:
            bad(DISSOLUTION, f"[{DISSOLUTION}] judge = \"stages\" judges a minimum Q (USP <711> Table 1); "
                             "remove max", table["max"], key="max")
            ok = False
        if "min" not in table:
            bad(DISSOLUTION, f"[{DISSOLUTION}] judge = \"stages\" needs min (Q, % of label claim)")
            ok = False
        elif "min" in values and not 0 <= values["min"] <= 100:
            bad(DISSOLUTION, f"[{DISSOLUTION}] judge = \"stages\": Q = min must lie in 0 to 100% of label claim "
                             "(USP <711>)", table["min"], key="min")
            ok = False
    return (judge, pass_by) if ok else None


def _parse_acceptance_value(table, bad) -> float | None:
    """``max`` of [acceptance_value] (L1 of USP <905>); None (with the problems told to ``bad``) when wrong."""
    attr = ACCEPTANCE_VALUE
    if not isinstance(table, dict):
        bad(attr, f"'{attr}' must be a table: [{attr}] with max (L1 of USP <905>, usually 15)", table)
        return None
    for key in sorted(set(table) - {"max"}):
        bad(attr, f"[{attr}]: unknown key '{key}'; allowed: max (L1 of USP <905>; the acceptance value has no "
                  "minimum)", table[key], key=key)
    if "max" not in table:
        if set(table) <= {"max"}:
            bad(attr, f"[{attr}] needs max (L1 of USP <905>, usually 15)")
        return None
    v = table["max"]
    f = float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) and abs(v) < 1e300 else math.nan
    if not math.isfinite(f):
        bad(attr, f"[{attr}] max must be a number", v, key="max")
        return None
    lo, hi = DERIVED_RANGES["weight_acceptance_value"]
    if not lo < f <= hi:
        bad(attr, f"[{attr}] max = {f:g} is outside {lo:g} < max <= {hi:g} (L1 of USP <905> is 15.0 unless the "
                  "monograph says otherwise)", v, key="max")
        return None
    return None if set(table) - {"max"} else f


def _line_of(text: str, attr: str, key: str | None = None) -> int | None:
    """The line (first = 1) of table ``[attr]``'s header, or of its ``key = …`` line when ``key`` is given and
    found before the next table's header."""
    m = re.search(rf"^[ \t]*\[[ \t]*\"?{re.escape(attr)}\"?[ \t]*\]", text, flags=re.MULTILINE)
    if not m:
        return None
    at = m.start()
    if key is not None:
        section = re.compile(r"^[ \t]*\[", flags=re.MULTILINE)
        following = section.search(text, m.end())
        end = following.start() if following else len(text)
        k = re.compile(rf"^[ \t]*\"?{re.escape(key)}\"?[ \t]*=", flags=re.MULTILINE).search(text, m.end(), end)
        if k:
            at = k.start()
    return text.count("\n", 0, at) + 1


def _suggest(name: str, names=QUALITY_ATTRIBUTES) -> str:
    """`` (did you mean 'x'?)`` with the name of ``names`` nearest ``name`` as a whole, or ''
    (:func:`linkage.nearest.did_you_mean`)."""
    return did_you_mean(name, sorted(names), by_beginning=False)
