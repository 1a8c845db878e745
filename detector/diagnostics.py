"""Rolling checks of a watched feed's innovations, and the package's one Ljung-Box test.

Every :data:`DIAGNOSTICS_EVERY` scored slots, the last
:data:`DIAGNOSTICS_WINDOW` absorbed innovations, winsorized at
+-:data:`DIAGNOSTICS_CLIP_ABS_Z`, are checked two ways (Notes). The window
only holds innovations scored while no alarm episode was open: an open
episode, or a re-anchoring of the level, empties it. A rule already
explains such a misfit, and a refit on faulty data would teach the model
the fault. (With the alarmed slots left in, a confirmed level shift made
the Ljung-Box check fire in two of three seeded test feeds.) No further
diagnostics refit is requested within ``refit_window_points`` slots of one
(:mod:`.feed`).

Notes
-----
The variance check is the mean of the winsorized squared innovations,
divided by its expectation under the model. With c the clip level and z
standard normal:

.. math::

    E[\\min(z^2, c^2)] = (2\\Phi(c) - 1) - 2c\\varphi(c) + 2c^2(1 - \\Phi(c))

It triggers above :data:`VARIANCE_RATIO_LIMIT`, an innovation spread about
1.4 times the model's. With 240 values the ratio has a standard error
of about 0.09 under the model, so 2.0 lies more than 10 standard errors out.

The autocorrelation check is the Ljung-Box statistic of the window (Ljung
& Box 1978, Biometrika 65) at m = :data:`LJUNG_BOX_LAG` lags:

.. math::

    Q = n(n+2)\\sum_{j=1}^{m}\\frac{r_j^2}{n-j} \\sim \\chi^2_m

It triggers at p < :data:`REFIT_LJUNG_BOX_ALPHA`. The window length and the
limits are common practice, not published values.

:func:`ljung_box_pvalue` computes the statistic for the whole package:
r_j are the sample autocorrelations of the demeaned series (divided by
the lag-0 sum of squares), and with ``model_df`` fitted ARMA terms the
chi-square has m - ``model_df`` degrees of freedom (Ljung & Box 1978), as
in statsmodels' ``acorr_ljungbox``.
"""

from __future__ import annotations

import math
from typing import Callable

import numpy as np
from scipy.special import chdtrc
from scipy.stats import norm

from .innovation import Innovation
from .ring import RingBuffer

#: Absorbed innovations in the rolling diagnostics window.
DIAGNOSTICS_WINDOW = 240
#: Scored slots between two diagnostics checks.
DIAGNOSTICS_EVERY = 48
#: The innovations are winsorized at +-this for the diagnostics.
DIAGNOSTICS_CLIP_ABS_Z = 4.0
#: Winsorized mean square over its expectation above which the fit is degraded.
VARIANCE_RATIO_LIMIT = 2.0
#: Lags of the live Ljung-Box check.
LJUNG_BOX_LAG = 10
#: Ljung-Box p-value of the live innovations below which a watched feed's
#: model is refitted ("diagnostics degraded"). Not the fit-acceptance level
#: of :mod:`.fitting`, which only reports a problem of a new fit.
REFIT_LJUNG_BOX_ALPHA = 1e-4


def clipped_square_mean(clip_abs_z: float) -> float:
    """E[min(z^2, c^2)] for z ~ N(0, 1) (see the module Notes)."""
    c = float(clip_abs_z)
    return (2 * norm.cdf(c) - 1) - 2 * c * norm.pdf(c) + 2 * c * c * norm.sf(c)


def ljung_box_pvalue(x: np.ndarray, lag: int, model_df: int = 0) -> float:
    """The Ljung-Box p-value of ``x`` at ``lag`` lags (module Notes).

    Parameters
    ----------
    x : array_like
        The series, all finite (drop missing values first).
    lag : int
        m, the number of autocorrelations summed.
    model_df : int
        Fitted ARMA terms; the chi-square has ``lag - model_df`` degrees of freedom.

    Returns
    -------
    float
        NaN when the test is undefined: ``lag <= model_df``, no more than
        ``lag + 1`` values, or a constant series.
    """
    x = np.asarray(x, dtype=float)
    n = x.size
    if lag <= model_df or n <= lag + 1:
        return math.nan
    d = x - float(x.sum()) / n
    denom = float(d @ d)
    if denom <= 0:
        return math.nan
    # row j - 1 of the lagged matrix is d shifted by j (zeros after the end): all lags in one product
    padded = np.zeros(n + lag)
    padded[:n] = d
    lagged = np.ndarray((lag, n), dtype=float, buffer=padded, offset=padded.itemsize, strides=(padded.itemsize,) * 2)
    r = (lagged @ d) / denom
    q = n * (n + 2) * float((r * r) @ (1.0 / (n - np.arange(1.0, lag + 1.0))))
    return float(chdtrc(lag - model_df, q))  # chi2.sf(q, df) is this function, without scipy.stats' overhead


class InnovationDiagnostics:
    """Rolling checks of a watched feed's innovations (module Notes)."""

    def __init__(self) -> None:
        self.z = RingBuffer(DIAGNOSTICS_WINDOW, dtype=np.float32)  # z in (-4, 4): 4 bytes each is plenty
        self.since_check = 0
        self.last: dict[str, float] | None = None
        self._expected = clipped_square_mean(DIAGNOSTICS_CLIP_ABS_Z)

    def add(self, inn: Innovation) -> None:
        z = inn.z
        if inn.absorbed and math.isfinite(z):
            c = DIAGNOSTICS_CLIP_ABS_Z
            self.z.append(c if z > c else (-c if z < -c else z))
            self.since_check += 1

    def add_absorbed(self, z: np.ndarray) -> None:
        """Many absorbed innovations' finite z at once (as :meth:`add` one by one)."""
        c = DIAGNOSTICS_CLIP_ABS_Z
        self.z.extend(np.clip(np.asarray(z, dtype=float), -c, c))
        self.since_check += int(np.size(z))

    def steps_to_due(self) -> int:
        """How many more :meth:`add` calls make :attr:`due` true (at least 1)."""
        return max(DIAGNOSTICS_WINDOW - len(self.z), DIAGNOSTICS_EVERY - self.since_check, 1)

    @property
    def due(self) -> bool:
        return len(self.z) >= DIAGNOSTICS_WINDOW and self.since_check >= DIAGNOSTICS_EVERY

    def skip(self) -> None:
        self.since_check = 0

    def check(self) -> str | None:
        """Judge the window now; a one-line reason when the fit has degraded, else None."""
        self.since_check = 0
        verdict, self.last = self._judge(self.z.to_array())
        return verdict

    def _judge(self, z: np.ndarray) -> tuple[str | None, dict[str, float]]:
        ratio = float(z @ z) / z.size / self._expected
        p = ljung_box_pvalue(z, LJUNG_BOX_LAG)
        last = {"variance_ratio": float(ratio), "ljung_box_p": float(p)}
        if ratio > VARIANCE_RATIO_LIMIT:
            return (f"innovation variance {ratio:.2f} times the model's over the last {z.size} readings "
                    f"(limit {VARIANCE_RATIO_LIMIT:g})"), last
        if math.isfinite(p) and p < REFIT_LJUNG_BOX_ALPHA:
            return (f"innovations autocorrelated over the last {z.size} readings "
                    f"(Ljung-Box p = {p:.2g} at lag {LJUNG_BOX_LAG})"), last
        return None, last

    def checks_ahead(self, z: np.ndarray, skipped: Callable[[int], bool]) -> tuple[int | None, int, dict | None]:
        """The checks that adding ``z`` (absorbed, finite) one by one would make due, judged
        without changing anything: each after the ``count``-th addition, ``count < z.size``,
        either skipped (``skipped(count)``: the feed refitted on diagnostics too recently)
        or judged on the window as it would stand then.

        Returns
        -------
        (count, since_check, last)
            The count after which a check finds the fit degraded (None if none
            does), and :attr:`since_check` and :attr:`last` as they would be
            after all of ``z`` (up to that count, when one did).
        """
        z = np.asarray(z, dtype=float)
        c = DIAGNOSTICS_CLIP_ABS_Z
        clipped = np.clip(z, -c, c)
        # the window's values as the float32 ring would give them back (RingBuffer.to_array)
        reference = self.z.saved_reference
        if reference is None:
            reference = float(clipped[0]) if clipped.size else 0.0
        new = (clipped - reference).astype(np.float32).astype(np.float64)
        if reference != 0.0:
            new += reference
        kept = np.concatenate([self.z.to_array(), new])
        old = len(self.z)
        since, last, done = self.since_check, self.last, 0
        for count in range(self.steps_to_due(), z.size, DIAGNOSTICS_EVERY):
            since, done = 0, count
            if skipped(count):
                continue
            end = old + count
            verdict, last = self._judge(kept[max(0, end - DIAGNOSTICS_WINDOW):end])
            if verdict is not None:
                return count, since, last
        return None, since + z.size - done, last

    def take_checked(self, z: np.ndarray, since_check: int, last: dict | None) -> None:
        """Add ``z`` as :meth:`checks_ahead` walked them, taking its ``since_check`` and ``last``."""
        self.add_absorbed(z)
        self.since_check, self.last = since_check, last

    def reset(self) -> None:
        self.z.clear()
        self.since_check = 0

