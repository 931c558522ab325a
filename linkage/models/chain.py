"""The chain of stage models: which inputs feed which targets, in order.

The default chain (settings -> ribbon -> granules -> tablets)::

    ribbon:   roll_force_kn_per_cm, roll_gap_mm, roll_speed_rpm, screw_speed_rpm -> ribbon_porosity
    granules: ribbon_porosity, mill_screen_mm -> granule_d50_um, fines_pct
    tablets:  ribbon_porosity, granule_d50_um, fines_pct, compression_force_kn
              -> tensile_strength_mpa, weight_rsd_pct, friability_pct, dissolution_pct, breaking_force_n

``breaking_force_n`` (diametral breaking force, "hardness" in N, how most
sites specify tablets) is a target of its own, modelled as the lab measures
it. Inverting a predicted tensile strength through the tablet geometry
(Fell & Newton 1970 for flat faces, F = σ·π·D·t/2; Pitt, Newton & Stanley
1988 for convex faces) would need the thickness of a planned batch, which the
chain does not predict and which moves with ribbon porosity and compression
force (a few percent over the window of the synthetic truth, at constant
tablet weight); a typical thickness would bias the judgement where the
window's edges are decided. Modelled directly, breaking force gets its own
cross-validated candidates, intervals and out-of-fold residuals, drawn with
those of tensile strength from the same lot (their correlation kept).

A chain file is TOML, one ``[[stage]]`` table per stage in order::

    [[stage]]
    name = "ribbon"
    inputs = ["roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm"]
    targets = ["ribbon_porosity"]

    [stage.monotone.ribbon_porosity]   # optional: +1 rises, -1 falls with the input
    roll_force_kn_per_cm = -1

A stage input is either a root input (no stage produces it: a setting, or any
extra column such as ``blend_moisture_pct``) or a target of an *earlier*
stage. Monotone directions constrain the boosting candidate only.
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from linkage.exceptions import InputError, Problem, SpecError, toml_problem

__all__ = ["StageSpec", "ChainSpec", "DEFAULT_MONOTONE"]

_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
_STAGE_KEYS = {"name", "inputs", "targets", "monotone"}
_TOP_KEYS = {"stage"}
#: assembled columns that are not numbers and cannot be a model input or target
_NOT_NUMERIC = {"lot", "product", "compactor", "manufactured_at", "granule_size_source",
                "tensile_strength_method", "dissolution_s1_pass"}

#: Directions the physics fixes (used by the boosting candidate):
#: more roll force densifies the ribbon (porosity falls), a wider gap leaves it
#: more porous; a larger mill screen passes larger granules; more compression
#: force gives stronger tablets. Common practice in roller compaction and
#: tableting (see references.md §2, §10); no single source fixes all four.
DEFAULT_MONOTONE: dict[str, dict[str, int]] = {
    "ribbon_porosity": {"roll_force_kn_per_cm": -1, "roll_gap_mm": 1},
    "granule_d50_um": {"mill_screen_mm": 1},
    "tensile_strength_mpa": {"compression_force_kn": 1},
    "breaking_force_n": {"compression_force_kn": 1},
}


@dataclass
class StageSpec:
    """One stage: inputs -> targets. ``monotone`` maps target -> {input: +1 | -1}."""

    name: str
    inputs: list[str]
    targets: list[str]
    monotone: dict[str, dict[str, int]] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"name": self.name, "inputs": list(self.inputs), "targets": list(self.targets),
                "monotone": {t: dict(m) for t, m in self.monotone.items()}}


def _stage_problems(source: str, index: int, stage: StageSpec) -> list[Problem]:
    where = f"stage {index + 1} ('{stage.name}')" if isinstance(stage.name, str) else f"stage {index + 1}"
    out: list[Problem] = []

    def bad(rule, key=None, value=None):
        out.append(toml_problem(source, f"{where}: {rule}", key=key, value=value, column=key))

    if not isinstance(stage.name, str) or not stage.name.strip():
        bad("needs a non-empty name", key="name", value=stage.name)
    for key in ("inputs", "targets"):
        names = getattr(stage, key)
        if not isinstance(names, list) or not names:
            bad(f"'{key}' must be a non-empty list of column names", key=key, value=names)
            continue
        seen = set()
        for v in names:
            if not isinstance(v, str) or not _NAME.match(v):
                bad(f"'{key}' entries must be column names (letters, digits, underscores)", key=key, value=v)
                continue
            if v in _NOT_NUMERIC:
                bad(f"'{v}' is not a numeric column and cannot be a model {key[:-1]}", key=key, value=v)
            elif v in seen:
                bad(f"'{v}' is listed twice in '{key}'", key=key, value=v)
            seen.add(v)
    if isinstance(stage.inputs, list) and isinstance(stage.targets, list):
        names = {v for v in stage.inputs if isinstance(v, str)} & {v for v in stage.targets if isinstance(v, str)}
        for v in sorted(names):  # non-text entries were reported just above
            bad(f"'{v}' is both an input and a target of the same stage (a cycle)", key="inputs", value=v)
    if not isinstance(stage.monotone, dict):
        bad("'monotone' must be a table of target -> {input: +1 or -1}", key="monotone")
        return out
    for target, directions in stage.monotone.items():
        if not isinstance(stage.targets, list) or target not in stage.targets:
            bad(f"monotone names '{target}', which is not a target of this stage", key="monotone", value=target)
            continue
        if not isinstance(directions, dict):
            bad(f"monotone.{target} must be a table of input = +1 or -1", key="monotone", value=directions)
            continue
        for inp, d in directions.items():
            if not isinstance(stage.inputs, list) or inp not in stage.inputs:
                bad(f"monotone.{target} names '{inp}', which is not an input of this stage",
                    key="monotone", value=inp)
            elif isinstance(d, bool) or d not in (-1, 0, 1):
                bad(f"monotone.{target}.{inp} must be -1, 0 or 1", key="monotone", value=d)
    return out


@dataclass
class ChainSpec:
    """Stages in order. Construction validates; a broken chain raises
    :class:`~linkage.exceptions.SpecError` listing every problem."""

    stages: list[StageSpec]
    source: str | None = None

    def __post_init__(self):
        problems = self._problems(self.source or "chain specification")
        if problems:
            raise SpecError(problems)

    def _problems(self, source: str) -> list[Problem]:
        if not isinstance(self.stages, list) or not self.stages:
            return [Problem(file=source, rule="a chain needs at least one [[stage]]")]
        out: list[Problem] = []
        names: set[str] = set()
        produced_by: dict[str, int] = {}
        for i, st in enumerate(self.stages):
            if not isinstance(st, StageSpec):
                out.append(Problem(file=source, rule=f"stage {i + 1} is not a StageSpec"))
                continue
            out += _stage_problems(source, i, st)
            if isinstance(st.name, str):
                if st.name in names:
                    out.append(toml_problem(source, f"stage name '{st.name}' is used twice", key="name",
                                            value=st.name, column="name"))
                names.add(st.name)
            for t in st.targets if isinstance(st.targets, list) else []:
                if isinstance(t, str) and t in produced_by:
                    out.append(toml_problem(
                        source, key="targets", value=t, column="targets",
                        rule=(f"'{t}' is a target of stage {produced_by[t] + 1} and again of stage {i + 1} "
                              f"('{st.name}'); each attribute is produced by one stage")))
                elif isinstance(t, str):
                    produced_by[t] = i
        for i, st in enumerate(self.stages):
            if not isinstance(st, StageSpec) or not isinstance(st.inputs, list):
                continue
            for v in st.inputs:
                j = produced_by.get(v) if isinstance(v, str) else None
                if j is not None and j >= i and v not in (st.targets or []):
                    later = self.stages[j].name
                    out.append(toml_problem(
                        source, key="inputs", value=v, column="inputs",
                        rule=f"stage {i + 1} ('{st.name}') uses '{v}', which stage {j + 1} ('{later}') produces; "
                             "an input must be a root setting or a target of an earlier stage (order or cycle)"))
        return out

    # -- constructors ----------------------------------------------------
    @classmethod
    def default(cls) -> "ChainSpec":
        """The three stages of the issue, with :data:`DEFAULT_MONOTONE`."""
        def mono(targets):
            return {t: dict(DEFAULT_MONOTONE[t]) for t in targets if t in DEFAULT_MONOTONE}

        ribbon_t = ["ribbon_porosity"]
        gran_t = ["granule_d50_um", "fines_pct"]
        # breaking force is modelled as measured (not inverted from tensile strength through a thickness the
        # chain does not predict); last, so the draws of the others are those of a chain without it
        tab_t = ["tensile_strength_mpa", "weight_rsd_pct", "friability_pct", "dissolution_pct", "breaking_force_n"]
        return cls([
            StageSpec("ribbon", ["roll_force_kn_per_cm", "roll_gap_mm", "roll_speed_rpm", "screw_speed_rpm"],
                      ribbon_t, mono(ribbon_t)),
            StageSpec("granules", ["ribbon_porosity", "mill_screen_mm"], gran_t, mono(gran_t)),
            StageSpec("tablets", ["ribbon_porosity", "granule_d50_um", "fines_pct", "compression_force_kn"],
                      tab_t, mono(tab_t)),
        ], source="default chain")

    @classmethod
    def from_toml(cls, path) -> "ChainSpec":
        """Read a chain file. Every problem of the file is reported at once."""
        path = Path(path)
        src = str(path)
        try:
            text = path.read_text(encoding="utf-8")
        except FileNotFoundError:
            raise InputError(Problem(file=src, rule="chain file not found")) from None
        except (OSError, UnicodeDecodeError) as exc:
            raise InputError(Problem(file=src, rule=f"cannot read the chain file: {exc}")) from None
        return cls.from_toml_text(text, source=src)

    @classmethod
    def from_toml_text(cls, text: str, source: str = "chain file") -> "ChainSpec":
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            line = re.search(r"line (\d+)", str(exc))
            raise SpecError(toml_problem(source, f"not valid TOML: {exc}",
                                         line=int(line.group(1)) if line else None)) from None
        except RecursionError:
            raise SpecError(Problem(file=source, rule="not valid TOML: nested too deeply")) from None
        problems: list[Problem] = []
        for key in sorted(set(data) - _TOP_KEYS):
            problems.append(toml_problem(source, key=key, column=key,
                                         rule=f"unknown key '{key}'; a chain file holds only [[stage]] tables"))
        raw = data.get("stage")
        if not isinstance(raw, list) or not raw:
            problems.append(Problem(file=source, rule="no [[stage]] table; a chain needs at least one stage"))
            raise SpecError(problems)
        stages = []
        for i, st in enumerate(raw):
            if not isinstance(st, dict):
                problems.append(Problem(file=source, rule=f"stage {i + 1} must be a table"))
                continue
            for key in sorted(set(st) - _STAGE_KEYS):
                problems.append(toml_problem(
                    source, key=key, column=key,
                    rule=f"stage {i + 1}: unknown key '{key}'; allowed: {', '.join(sorted(_STAGE_KEYS))}"))
            stages.append(StageSpec(name=st.get("name"), inputs=st.get("inputs"), targets=st.get("targets"),
                                    monotone=st.get("monotone", {})))
        try:
            spec = cls(stages, source=source)
        except SpecError as exc:
            problems += exc.problems
            spec = None
        if problems:
            raise SpecError(problems)
        return spec

    # -- views -----------------------------------------------------------
    def to_toml(self) -> str:
        """The chain as a TOML chain file (reads back to an equal chain)."""
        def toml_string(text):
            """``text`` as a TOML basic string (quoted, backslashes and quotes escaped)."""
            return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'

        lines = ["# linkage chain: stages in order; an input is a root setting or a target of an earlier stage"]
        for st in self.stages:
            lines += ["", "[[stage]]", f"name = {toml_string(st.name)}",
                      "inputs = [" + ", ".join(toml_string(v) for v in st.inputs) + "]",
                      "targets = [" + ", ".join(toml_string(v) for v in st.targets) + "]"]
            for target, directions in st.monotone.items():
                lines += ["", f"[stage.monotone.{target}]"]
                lines += [f"{inp} = {int(d)}" for inp, d in directions.items()]
        return "\n".join(lines) + "\n"

    def to_dict(self) -> dict:
        return {"stages": [s.to_dict() for s in self.stages]}

    def targets(self) -> list[str]:
        """Every target, in stage order."""
        return [t for st in self.stages for t in st.targets]

    def root_inputs(self) -> list[str]:
        """Inputs that no stage produces, in order of first use."""
        produced = set(self.targets())
        out: list[str] = []
        for st in self.stages:
            out += [v for v in st.inputs if v not in produced and v not in out]
        return out

    def stage_of(self, target: str) -> StageSpec:
        for st in self.stages:
            if target in st.targets:
                return st
        raise KeyError(target)

    def __eq__(self, other) -> bool:
        return isinstance(other, ChainSpec) and self.to_dict() == other.to_dict()
