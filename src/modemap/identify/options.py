"""The flat option names of a fit and the estimator tree they stand for.

The command line, the dashboard's refit dialog and the model file's ``metadata.options``
speak of a fit in one flat vocabulary (``n_regimes``, ``degree``, ``guard_kind``, ...).
The estimators hold the same settings in their stages (``regimes__local_model__degree``,
``guards__kind``, ...).  :func:`stage_parameters` turns the first into the second (used by
:meth:`HybridIdentifier.from_options <modemap.identify.HybridIdentifier.from_options>`) and
:func:`options_record` reads it back; nothing else maps between them.
"""

from __future__ import annotations

from typing import Any

from modemap._exceptions import ParameterError
from modemap.fit.local_model import AffineLocalModel, LocalModel, SparseLocalModel
from modemap.model.guards import SwitchingSurfaces
from modemap.regimes import RegimeFinder

__all__ = ["OPTION_DEFAULTS", "options_record", "stage_parameters"]

#: Every flat option and its default (the defaults of the estimators).
OPTION_DEFAULTS: dict[str, Any] = {
    "n_regimes": "auto",
    "max_regimes": 6,
    "form": "continuous",
    "model": "sparse",
    "degree": "auto",
    "max_degree": 3,
    "custom_terms": (),
    "threshold": "auto",
    "derivative": "auto",
    "final_fit": "integral",
    "guard_kind": "auto",
    "guard_degree": 1,
    "holdout": 0.25,
    "refit": True,
    "tolerance": 0.1,
    "min_dwell": 1,
    "min_regime_samples": None,
    "seed": 0,
    "engine": "local",
    "scheduler": None,
}


def _local_model(o: dict[str, Any]) -> LocalModel:
    if o["model"] == "affine":
        return AffineLocalModel(final_fit=o["final_fit"])
    if o["model"] != "sparse":
        raise ParameterError(f"model must be 'sparse' or 'affine', got {o['model']!r}")
    return SparseLocalModel(
        degree=o["degree"],
        max_degree=o["max_degree"],
        custom=tuple(o["custom_terms"]),
        threshold=o["threshold"],
        final_fit=o["final_fit"],
    )


def stage_parameters(**options: Any) -> dict[str, Any]:
    """The parameters of a :class:`~modemap.identify.HybridIdentifier` from flat options.

    Parameters
    ----------
    **options
        Any of :data:`OPTION_DEFAULTS`; the rest take their defaults.

    Returns
    -------
    dict
        ``regimes`` (a RegimeFinder with its local model), ``guards`` (SwitchingSurfaces),
        ``holdout`` and ``tolerance``.

    Raises
    ------
    ParameterError
        An unknown option name (the values are checked when the estimator is fitted).
    """
    unknown = sorted(set(options) - set(OPTION_DEFAULTS))
    if unknown:
        raise ParameterError(f"unknown fit option(s): {', '.join(unknown)}")
    o = {**OPTION_DEFAULTS, **options}
    finder = RegimeFinder(
        n_regimes=o["n_regimes"],
        max_regimes=o["max_regimes"],
        form=o["form"],
        local_model=_local_model(o),
        derivative=o["derivative"],
        min_dwell=o["min_dwell"],
        min_samples=o["min_regime_samples"],
        seed=o["seed"],
        engine=o["engine"],
        scheduler=o["scheduler"],
    )
    guards = SwitchingSurfaces(kind=o["guard_kind"], degree=o["guard_degree"], seed=o["seed"])
    return {
        "regimes": finder,
        "guards": guards,
        "holdout": o["holdout"],
        "refit": o["refit"],
        "tolerance": o["tolerance"],
    }


def options_record(
    finder: RegimeFinder,
    surfaces: SwitchingSurfaces,
    holdout: float,
    tolerance: float,
    refit: bool = True,
) -> dict[str, Any]:
    """The flat options a fit ran with, read off its fitted stages (sorted by name), as the
    model file's ``metadata.options`` records them."""
    local = finder.local_model if finder.local_model is not None else SparseLocalModel()
    sparse = isinstance(local, SparseLocalModel)
    engine = finder.engine if isinstance(finder.engine, str) else finder.engine.name
    record = {
        "custom_terms": list(local.custom) if sparse else [],
        "degree": local.degree if sparse else 1,
        "max_degree": int(local.max_degree) if sparse else 1,
        "derivative": finder.derivative,
        "engine": engine,
        "final_fit": local.final_fit,
        "form": finder.form,
        "guard_degree": surfaces.degree,
        "guard_kind": surfaces.kind,
        "holdout": holdout,
        "max_regimes": finder.max_regimes,
        "min_dwell": finder.min_dwell,
        "min_regime_samples": finder.min_samples,
        "model": "affine" if isinstance(local, AffineLocalModel) else "sparse",
        "n_regimes": finder.n_regimes,
        "refit": bool(refit),
        "scheduler": finder.scheduler,
        "seed": finder.seed,
        "threshold": local.threshold if sparse else "auto",
        "tolerance": tolerance,
    }
    return dict(sorted(record.items()))
