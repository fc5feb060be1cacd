"""Row weights: sample weights times the training loss's hessian.

Pure numpy.  A gradient-boosting step with a second-order loss weights each
row's contribution to a split by the loss's second derivative (the hessian)
at the current prediction, so split candidates should sit at quantiles of
that weight (Chen & Guestrin, KDD 2016, section 3.3).

=========  ====================  ==========================================
loss       hessian h             prediction scales accepted
=========  ====================  ==========================================
squared    1                     (prediction ignored)
logistic   p (1 - p)             ``probability`` (default): p in [0, 1];
                                 ``margin``: p = 1 / (1 + exp(-m))
poisson    mu (log link)         ``mean`` (default): mu >= 0;
                                 ``margin``: mu = exp(m)
=========  ====================  ==========================================
"""

from __future__ import annotations

import numpy as np

from .errors import InputError

__all__ = ["LOSSES", "SCALES", "default_scale", "hessian", "validate_loss"]

LOSSES = ("squared", "logistic", "poisson")
SCALES = {"squared": ("margin", "probability", "mean"), "logistic": ("probability", "margin"),
          "poisson": ("mean", "margin")}


def default_scale(loss: str) -> str:
    """The prediction scale assumed when none is given."""
    validate_loss(loss, None)
    return SCALES[loss][0]


def validate_loss(loss: str, scale: str | None) -> str:
    """Check a loss name and prediction scale; return the scale to use."""
    if loss not in LOSSES:
        raise InputError(f"hessian loss: expected one of {', '.join(LOSSES)}, got {loss!r}")
    if scale is None:
        return SCALES[loss][0]
    if scale not in SCALES[loss]:
        raise InputError(f"prediction scale for {loss} loss: expected one of "
                         f"{', '.join(SCALES[loss])}, got {scale!r}")
    return scale


def hessian(loss: str, prediction: np.ndarray | None, scale: str | None = None,
            where: str = "prediction") -> np.ndarray | float:
    """Per-row hessian of ``loss`` at ``prediction``.

    Returns the scalar 1.0 for squared error (no prediction needed).  NaN
    predictions must be handled by the caller before this call.

    Examples
    --------
    >>> hessian("logistic", np.array([0.5, 0.9, 1.0])).round(3).tolist()
    [0.25, 0.09, 0.0]
    """
    scale = validate_loss(loss, scale)
    if loss == "squared":
        return 1.0
    p = np.asarray(prediction, dtype=np.float64)
    if not np.all(np.isfinite(p)):
        i = int(np.argmax(~np.isfinite(p)))
        raise InputError(f"{where}: prediction {float(p[i])!r} at row {i} is not finite")
    if loss == "logistic":
        if scale == "margin":
            # 1/(1+exp(-m)) computed without overflow for large |m|
            p = 0.5 * (1.0 + np.tanh(0.5 * p))
        else:
            bad = (p < 0.0) | (p > 1.0)
            if bad.any():
                i = int(np.argmax(bad))
                raise InputError(f"{where}: expected probabilities in [0, 1] for logistic loss, got "
                                 f"{float(p[i])!r} at row {i} (use prediction scale 'margin' for raw scores)")
        return p * (1.0 - p)
    # poisson with log link: h = mu
    if scale == "margin":
        with np.errstate(over="ignore"):
            mu = np.exp(p)
        if not np.all(np.isfinite(mu)):
            i = int(np.argmax(~np.isfinite(mu)))
            raise InputError(f"{where}: margin {float(p[i])!r} at row {i} overflows exp() for poisson loss")
        return mu
    bad = p < 0.0
    if bad.any():
        i = int(np.argmax(bad))
        raise InputError(f"{where}: expected predicted means >= 0 for poisson loss, got {float(p[i])!r} at row {i}")
    return p
