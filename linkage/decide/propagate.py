"""Monte Carlo through the chain: settings → ribbon → granules → tablets.

A draw of a lot is built stage by stage. A stage's targets are its selected
model's prediction at the draw's inputs plus a residual vector taken from one
training lot's out-of-fold residuals (lots are the exchangeable unit, and
taking a whole lot's residual vector keeps the correlation between a stage's
targets, say tensile strength and friability). Out-of-fold residuals are
errors on lots the model did not see, so they carry both measurement noise
and model error. A value the user measured replaces the stage's draw and
carries no model error.

Every draw is projected onto its attribute's physical range
(:func:`linkage.models.lean.project`: a weight RSD below 0 is 0, a porosity
stays inside (0, 1)) before it is judged or passed to the next stage, and so
is every mean prediction; ``Draws.raw`` keeps the draws as the models gave
them, to say where a value was projected.

Where an attribute has a spread model (its intervals are locally weighted
CV+, :data:`linkage.models.fitted.LW_INTERVAL_METHOD`), a lot's residual is
first divided by the spread ρ̂ at its own out-of-fold level and then
multiplied by ρ̂ at the draw's predicted level, so a noise that grows with the
level is drawn larger where the level is higher instead of pooled.

Draws use common random numbers: the same residual lots for every row of
the inputs, so that a curve over porosity is smooth and two rows differ only
by their inputs.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from linkage.exceptions import UsageError


@dataclass
class Draws:
    """Simulated lots: ``values[name]`` is an array of shape (rows, draws)."""

    values: dict[str, np.ndarray]
    means: dict[str, np.ndarray]  # deterministic chain of mean predictions, shape (rows,)
    fixed: set[str]  # names given by the user (measured or set), not predicted
    #: the predicted draws and means before the physical projection (same shapes); given names are absent
    raw: dict[str, np.ndarray] = field(default_factory=dict)
    raw_means: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def n_draws(self) -> int:
        return next(iter(self.values.values())).shape[1]


def simulate(chain, inputs, *, n_draws: int = 2000, seed: int = 0) -> Draws:
    """Draw ``n_draws`` lots for each row of ``inputs`` through the chain.

    ``chain`` is a fitted chain or its lean form (:mod:`linkage.models.lean`;
    the draws are computed on the lean form either way). ``inputs`` maps each
    given name to its values, one per row (a DataFrame or a dict of arrays):
    root settings (all required; the caller fills unset ones) and,
    optionally, measured stage targets such as ``ribbon_porosity``, which
    replace the prediction for that target.
    """
    from linkage.models.lean import as_lean, project

    chain = as_lean(chain)
    columns = {str(name): np.asarray(inputs[name], dtype=float).reshape(-1) for name in inputs}
    rows = len(next(iter(columns.values()))) if columns else 0
    rng = np.random.default_rng(seed)
    values: dict[str, np.ndarray] = {}
    means: dict[str, np.ndarray] = {}
    raw: dict[str, np.ndarray] = {}
    raw_means: dict[str, np.ndarray] = {}
    fixed = set(columns)
    for name, col in columns.items():
        values[name] = np.repeat(col[:, None], n_draws, axis=1)
        means[name] = col
    for stage in chain.stages:
        todo = [t for t in stage.targets if t not in fixed]
        if not todo:
            continue
        missing = [c for c in stage.inputs if c not in values]
        if missing:
            raise UsageError(f"stage '{stage.name}' needs {', '.join(missing)}, which were neither given "
                             "nor predicted by an earlier stage")
        pick = rng.integers(0, len(stage.residual_lots), size=n_draws)
        # one wide matrix: rows × draws, in row-major order
        x = {c: values[c].reshape(-1) for c in stage.inputs}
        x_mean = {c: means[c] for c in stage.inputs}
        for name in todo:
            target = stage.targets[name]
            pred = target.predict(x, raw=True).reshape(rows, n_draws)
            if getattr(target, "spread", None) is None:
                r = _residual_column(stage.residual_column(name), name, pick, rng)
                raw[name] = pred + r[None, :]  # the model's draw; projected once, as a whole
            else:  # the lot's standardised residual, rescaled to the spread at this draw's level
                r = _residual_column(stage.scaled_residual_column(name), name, pick, rng)
                raw[name] = pred + r[None, :] * target.scale(pred)
            values[name] = project(name, raw[name])[0]
            raw_means[name] = target.predict(x_mean, raw=True)
            means[name] = project(name, raw_means[name])[0]
    return Draws(values=values, means=means, fixed=fixed, raw=raw, raw_means=raw_means)


def _residual_column(col: np.ndarray, name: str, pick: np.ndarray, rng) -> np.ndarray:
    """The picked lots' residuals of one target; a lot without that target is
    replaced by a random lot that has it (still one whole lot per draw for the
    targets it measured)."""
    have = np.flatnonzero(~np.isnan(col))
    if len(have) == 0:
        raise UsageError(f"no out-of-fold residuals for {name}; the model cannot give it an uncertainty")
    r = col[pick]
    gaps = np.isnan(r)
    if gaps.any():
        r[gaps] = col[rng.choice(have, size=int(gaps.sum()))]
    return r


def within(values: np.ndarray, limit) -> np.ndarray:
    """Boolean array: values inside a spec limit (min and max inclusive)."""
    ok = np.ones(np.shape(values), dtype=bool)
    if limit.min is not None:
        ok &= values >= limit.min
    if limit.max is not None:
        ok &= values <= limit.max
    return ok


def pass_matrix(draws: Draws, spec, attributes: list[str]) -> dict[str, np.ndarray]:
    """Per attribute, a boolean array (rows, draws): does the draw meet its limits."""
    return {name: within(draws.values[name], spec.limits[name]) for name in attributes}


def mean_passes(draws: Draws, spec, attributes: list[str]) -> dict[str, np.ndarray]:
    """Per attribute, does the chain of mean predictions meet its limits (rows,)."""
    return {name: within(draws.means[name], spec.limits[name]) for name in attributes}


def needed_settings(chain, given: set[str]) -> list[str]:
    """Root inputs the chain needs when the names in ``given`` are known: a
    stage whose targets are all given is skipped, and so are its inputs."""
    produced = set(given)
    needed: list[str] = []
    for stage in chain.stages:
        if all(t in given for t in stage.targets):
            continue
        for name in stage.inputs:
            if name not in produced and name not in needed:
                needed.append(name)
        produced.update(stage.targets)
    return needed


def fill_settings(chain, given: dict[str, float], *, scan=()) -> tuple[dict[str, float], dict[str, str]]:
    """The given values plus every other needed setting, held coherently
    with the given ones: at its conditional mean given the given settings
    under a multivariate normal of the training lots' settings, clipped to
    the training range (:mod:`linkage.decide.held`; the training mean when
    no setting is given). A model saved before that model was kept holds
    them at the training median, and the source says so. Names in ``scan``
    are given only as placeholders for a value the caller scans (a roll
    force range): they count as given but are not conditioned on. Returns
    the values and, per name, where it came from."""
    from linkage.decide import held

    values = dict(given)
    source = {name: "given" for name in given}
    needed = needed_settings(chain, set(given))
    model = held.of_chain(chain)
    if model is not None:
        known = {k: v for k, v in given.items() if k not in set(scan)}
        coherent, labels = held.hold_with_sources(model, known, needed)
        for name, v in coherent.items():
            values[name] = float(v[0])
            source[name] = labels[name]
        needed = [n for n in needed if n not in coherent]
    medians = chain.medians if hasattr(chain, "medians") else chain.training["medians"]
    for name in needed:
        if name not in medians or medians[name] is None or not np.isfinite(medians[name]):
            raise UsageError(f"{name} was not given and the training lots have no median for it; "
                             f"give it with --set {name}=VALUE")
        values[name] = float(medians[name])
        source[name] = held.MEDIAN
    return values, source
