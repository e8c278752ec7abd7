"""Choice of the number of regimes: BIC, with a held-out one-step error beside it.

For each ``K = 1..max_regimes`` the regimes are proposed and refined on the *training part*:
the first 80 % of every run (the last 20 % of each run is held out; runs keep their
boundaries).  On the training part

    BIC = -2 loglik + n_params ln(n)

("Estimating the dimension of a model", Annals of Statistics 6(2), 1978,
DOI 10.1214/aos/1176344136), with ``loglik`` the complete-data log-likelihood of the refined
labelling and the parameters counted honestly:

* every nonzero coefficient of every regime and state,
* ``m (m + 1) / 2`` residual covariance entries per regime (``m`` states), or once in all
  when the covariance is shared (``covariance="tied"``, the default),
* ``K (K - 1)`` transition probabilities and ``K - 1`` initial probabilities,
* with a location term, a mean (``m``) per regime and its covariance (``m (m + 1) / 2``),
  shared or per regime like the residual covariance.

The held-out tails are labelled by Viterbi with the trained models and chain; the error of the
one-step prediction under the decoded regime is divided, state by state, by the standard
deviation of that state's target on the held-out part, and the root mean square over samples
and states is reported as ``holdout_rmse``.  The K with the smallest BIC is chosen (the
smaller K on a tie, round-off included); the held-out error is reported beside it, not used
to choose.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from modemap._exceptions import FitCancelled, FitError
from modemap._progress import ProgressCallback, null_progress, scaled
from modemap.regimes.likelihood import predict_by_label, regime_log_likelihood
from modemap.regimes.refine import RefineResult
from modemap.regimes.rows import Rows
from modemap.regimes.viterbi import viterbi_runs

__all__ = ["count_parameters", "holdout_split", "information_criterion", "select_regimes"]

HOLDOUT_FRACTION = 0.2

FitK = Callable[[Rows, int, ProgressCallback], RefineResult]


def count_parameters(result: RefineResult, n_targets: int) -> int:
    """Nonzero coefficients + covariance entries + transition and initial probabilities."""
    k = result.n_regimes
    coefs = sum(int(np.count_nonzero(f.coef)) for f in result.fits)
    n_cov = 1 if result.covariance == "tied" else k
    cov = n_targets * (n_targets + 1) // 2
    location = (k * n_targets + n_cov * cov) if result.location_weight else 0
    return coefs + n_cov * cov + location + k * (k - 1) + (k - 1)


def information_criterion(loglik: float, n_params: int, n_samples: int) -> float:
    """``-2 loglik + n_params ln(n)``."""
    return -2.0 * loglik + n_params * np.log(max(n_samples, 1))


def holdout_split(lengths: np.ndarray, fraction: float = HOLDOUT_FRACTION) -> np.ndarray:
    """Boolean mask of the held-out rows: the last ``fraction`` of every run."""
    lengths = np.asarray(lengths, dtype=np.int64)
    mask = np.zeros(int(lengths.sum()), dtype=bool)
    offset = 0
    for length in lengths:
        held = int(np.floor(fraction * length))
        mask[offset + length - held : offset + length] = True
        offset += length
    return mask


def holdout_error(result: RefineResult, library: Any, rows: Rows) -> float:
    """Normalised RMS one-step error on held-out rows decoded with the trained models."""
    coefs = [f.coef for f in result.fits]
    Z, Y = rows.Z, rows.Y
    log_em = regime_log_likelihood(library, Z, Y, coefs, result.covariances)
    labels, _ = viterbi_runs(log_em, rows.lengths, result.log_start, result.log_trans)
    sse = predict_by_label(library, Z, Y, coefs, labels)
    scale = Y.var(axis=0)
    scale[~(scale > 0)] = 1.0
    return float(np.sqrt(np.mean(sse / (Y.shape[0] * scale))))


def select_regimes(
    fit_k: FitK,
    library: Any,
    rows: Rows,
    max_regimes: int,
    *,
    progress: ProgressCallback | None = None,
) -> tuple[pd.DataFrame, dict[int, RefineResult]]:
    """Fit K = 1..max_regimes on the training part and tabulate BIC and held-out error.

    Parameters
    ----------
    fit_k : callable
        ``fit_k(rows, K, progress) -> RefineResult`` (proposal + refinement).
    library : fitted TermLibrary
    rows : Rows
        Variables, targets, run lengths and times of all runs.
    max_regimes : int
    progress : callable, optional

    Returns
    -------
    table : DataFrame
        Columns ``K, n_regimes, loglik, n_params, bic, holdout_rmse, chosen``
        (``n_regimes``: regimes left after hygiene, may be below ``K``).
    results : dict
        K -> RefineResult on the training part.
    """
    progress = progress or null_progress
    held = holdout_split(rows.lengths)
    train, test = rows.subset(~held), rows.subset(held)
    table_rows, results = [], {}
    for k in range(1, max_regimes + 1):
        progress((k - 1) / max_regimes, f"trying {k} regime(s)")
        try:
            res = fit_k(train, k, scaled(progress, (k - 1) / max_regimes, k / max_regimes))
        except FitCancelled:
            raise
        except FitError:  # e.g. no regime left with enough samples: stop adding regimes
            break
        n_params = count_parameters(res, rows.n_states)
        rmse = holdout_error(res, library, test) if test.n_rows else float("nan")
        table_rows.append(
            {
                "K": k,
                "n_regimes": res.n_regimes,
                "loglik": res.loglik,
                "n_params": n_params,
                "bic": information_criterion(res.loglik, n_params, train.n_rows),
                "holdout_rmse": rmse,
            }
        )
        results[k] = res
    if not table_rows:
        raise FitError("no number of regimes could be fitted")
    table = pd.DataFrame(table_rows)
    table["chosen"] = False
    bic = table["bic"].to_numpy()
    # the smaller K on a tie, round-off included (1e-9 of the criterion's size): two K that
    # end with the same regimes can differ in the last digits through their iteration history
    tie = 1e-9 * max(float(np.nanmax(np.abs(bic))), 1.0)
    table.loc[int(np.flatnonzero(bic <= np.nanmin(bic) + tie)[0]), "chosen"] = True
    return table, results
