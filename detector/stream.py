"""The recursive filter: continue a fitted model one reading at a time.

A :class:`Stream` starts from the fit's last predicted state a_n and its
covariance P_n and runs the Kalman filter forward, predict then update,
one reading per call. It is held to exact agreement with statsmodels'
batch ``filter()`` on the same parameters (the tests compare every step).

Notes
-----
For each slot t, with the prior (a_t, P_t) (Durbin & Koopman 2012, eq. 4.24):

.. math::

    f_t = Z a_t + d_t                      \\quad\\text{(one-step forecast)}

    v_t = y_t - f_t,\\qquad F_t = Z P_t Z' + H

    K_t = T P_t Z' F_t^{-1}

    a_{t+1} = T a_t + K_t v_t + c_t

    P_{t+1} = T (P_t - P_t Z' Z P_t / F_t) T' + R Q R'

A missing reading (NaN or None) has one meaning: predict only. It gives
no score (error and z are NaN), K_t v_t is dropped and the variance grows:
a_{t+1} = T a_t + c_t, P_{t+1} = T P_t T' + R Q R'.
``update(value, absorb=False)`` scores the reading as usual but then
advances the state as for a missing one, so that a confirmed outlier does
not pull later forecasts.

**Steady state.** For a time-invariant model P_t converges to the solution
of the Riccati equation. Once an observed step changes P by less than
``STEADY_RTOL`` (relative), the stream freezes P, F and K and skips the
covariance recursion; a missing or unabsorbed reading returns it to the
full recursion until P converges again. The steady step is generated as
straight-line Python arithmetic on floats for this model's matrices
(:func:`_compile_steady_step`), which costs about as much as one step of
statsmodels' compiled filter, where numpy calls on 4 x 4 arrays would cost
several times more.
"""

from __future__ import annotations

import io
import json
import math
import struct
import zipfile
from functools import lru_cache
from typing import Any, Protocol

import numpy as np
from scipy.stats import norm

from .checkpoint_bytes import layout, read_arrays, read_preamble
from .errors import ParameterError, StateFormatError
from .innovation import Innovation
from .seasonality import regression_from_dict
from .statespace import LinearSystem

#: Slots of d_t computed at a time for a stream with calendar terms.
INTERCEPT_BLOCK = 1024

#: Relative change of P_t below which the steady-state gain is used.
STEADY_RTOL = 1e-12

_MAGIC = b"LLSTREAM"
#: Version of the byte format written by :meth:`Stream.to_bytes` (2: raw arrays after the header; 1: ``.npz``).
STATE_FORMAT_VERSION = 2
#: The versions :meth:`Stream.from_bytes` reads.
READABLE_STATE_VERSIONS = (1, 2)


class Regression(Protocol):
    """The part of the mean that comes from the clock (calendar terms).

    ``offsets(start, count)`` gives x_t' beta for the 0-based slots
    start .. start + count - 1 of the model's grid; it is added to d_t.
    """

    def offsets(self, start: int, count: int) -> np.ndarray: ...

    def to_dict(self) -> dict[str, Any]: ...


@lru_cache(maxsize=64)
def interval_quantile(level: float) -> float:
    """The standard normal quantile of the two-sided ``level`` interval (cached: every new
    model's stream asks for the same one, and scipy's ``norm.ppf`` is slow to call)."""
    return float(norm.ppf(0.5 + level / 2.0))


def steady_step_source(system: LinearSystem, coefficients: dict[str, float] | None = None) -> tuple[str, str, str, str]:
    """The steady step as Python expressions over the names ``a0..``, ``g0..``, ``y``, ``d``, ``t``, ``v``.

    Returns ``(unpack_a, unpack_gain, forecast, next_state)``: the targets
    that unpack a and the gain (``"a0, a1"``; a trailing comma for one
    state), the forecast Z a_t + d_t, and the tuple of the next state's
    expressions (in terms of v = y - f). The matrices' entries are written
    as float literals (``repr`` round-trips a float exactly), or, when a
    ``coefficients`` dict is given, as names (``Z0``, ``T0_1``, ``C0``,
    ``S0``) that it is filled with, so that the source depends on the
    model's structure only (which entries are zero) and compiles once for
    all models of that structure; zeros are left out either way. Both
    :func:`_compile_steady_step` and the replay's quiet runs
    (:mod:`.quiet_run`) are built from these, so they do the same
    floating-point operations in the same order.
    """
    def coef(name: str, value: float) -> str:
        if coefficients is None:
            return repr(float(value))
        coefficients[name] = float(value)
        return name

    k = system.k_states
    a_names = [f"a{i}" for i in range(k)]
    z_terms = [f"{coef(f'Z{j}', z)}*{a}" for j, (z, a) in enumerate(zip(system.design, a_names)) if z != 0.0]
    out = []
    for i in range(k):
        terms = [f"{coef(f'T{i}_{j}', system.transition[i, j])}*{a_names[j]}" for j in range(k)
                 if system.transition[i, j] != 0.0]
        terms.append(f"g{i}*v")
        if system.state_intercept_const[i] != 0.0:
            terms.append(coef(f"C{i}", system.state_intercept_const[i]))
        if system.state_intercept_slope[i] != 0.0:
            terms.append(f"{coef(f'S{i}', system.state_intercept_slope[i])}*t")
        out.append(" + ".join(terms))
    comma = "," if k == 1 else ""
    return (f"{', '.join(a_names)}{comma}", f"{', '.join(f'g{i}' for i in range(k))}{comma}",
            f"{' + '.join(z_terms) if z_terms else '0.0'} + d", f"({', '.join(out)}{comma})")


_steady_factories: dict[str, Any] = {}


def _compile_steady_step(system: LinearSystem):
    """Build ``step(a, gain, y, d, t) -> (forecast, error, next_state)``.

    A few multiply-adds with no numpy call overhead, zeros left out
    (:func:`steady_step_source`). The source names the matrix entries, so it
    compiles once per model structure; each model's entries are bound in a
    closure.
    """
    coefficients: dict[str, float] = {}
    unpack_a, unpack_gain, forecast, next_state = steady_step_source(system, coefficients)
    names = list(coefficients)
    lines = [
        "def make(coefficients):",
        f"    {', '.join(names)}{',' if len(names) == 1 else ''} = coefficients" if names else "    pass",
        "    def step(a, gain, y, d, t):",
        f"        {unpack_a} = a",
        f"        {unpack_gain} = gain",
        f"        f = {forecast}",
        "        v = y - f",
        f"        return f, v, {next_state}",
        "    return step",
    ]
    source = "\n".join(lines)
    make = _steady_factories.get(source)
    if make is None:
        if len(_steady_factories) >= 256:
            _steady_factories.clear()
        namespace: dict[str, Any] = {}
        exec(compile(source, "<leadline steady step>", "exec"), namespace)  # noqa: S102 - names only
        make = _steady_factories[source] = namespace["make"]
    return make(tuple(coefficients.values()))


class Stream:
    """One feed's model, continued one reading at a time.

    Parameters
    ----------
    system : LinearSystem
        The fitted model's matrices.
    state, cov : ndarray
        a_t and P_t: the prediction for the next slot, shapes (k,), (k, k).
    step : int
        The 0-based slot index of the next reading in the model's grid.
    level : float
        Coverage of the forecast interval in each :class:`Innovation`.
    model_version : int or None
        Carried into every saved state and event.
    regression : Regression or None
        Calendar terms whose offset x_t' beta is added to the forecast.
    meta : dict
        JSON-serialisable facts about the model (spec, parameter names),
        saved with the state.

    Raises
    ------
    ParameterError
        When ``level`` is not in (0, 1); :meth:`forecast` and
        :meth:`shift_level` raise it for a horizon below 1 and a non-finite
        shift.

    Notes
    -----
    See the module docstring for the equations.
    """

    def __init__(
        self,
        system: LinearSystem,
        state: np.ndarray,
        cov: np.ndarray,
        step: int,
        *,
        level: float = 0.95,
        model_version: int | None = None,
        regression: Regression | None = None,
        meta: dict[str, Any] | None = None,
        level_offset: float = 0.0,
        steady: bool = False,
    ) -> None:
        if not 0.0 < level < 1.0:
            raise ParameterError(f"level must be in (0, 1), got {level}")
        self.system = system
        self.level = float(level)
        self.model_version = model_version
        self.regression = regression
        self.meta = dict(meta or {})
        self._quantile = interval_quantile(self.level)
        self._a = np.array(state, dtype=float)
        self._P = np.array(cov, dtype=float)
        self._t = int(step)
        self._level_offset = float(level_offset)
        self._Z = system.design
        self._T = system.transition
        self._H = system.obs_cov
        self._RQR = system.state_cov
        self._d_const = system.obs_intercept + self._level_offset
        self._d_start = 0
        self._d_block: list[float] = []
        self._x_block: list[float] = []  # x_t' beta of the same slots as _d_block
        self._d_len = 0
        self._step_fn = None
        self._steady = False
        self._a_tuple: tuple[float, ...] = ()
        if steady:
            self._enter_steady()

    # ------------------------------------------------------------ properties
    @property
    def step(self) -> int:
        """0-based slot index of the next reading."""
        return self._t

    @property
    def state(self) -> np.ndarray:
        """a_t, the predicted state for the next slot (a copy)."""
        if self._steady:
            return np.array(self._a_tuple)
        return self._a.copy()

    @property
    def cov(self) -> np.ndarray:
        """P_t, the predicted state covariance for the next slot (a copy)."""
        return self._P.copy()

    @property
    def is_steady(self) -> bool:
        """Whether the constant steady-state gain is in use."""
        return self._steady

    @property
    def level_offset(self) -> float:
        """Sum of the level shifts applied by :meth:`shift_level`."""
        return self._level_offset

    # ------------------------------------------------------------ internals
    def _obs_intercept(self, t: int) -> float:
        """d_t: the constant, the level shifts and the calendar terms' x_t' beta."""
        if self.regression is None:
            return self._d_const
        i = t - self._d_start
        if 0 <= i < self._d_len:
            return self._d_block[i]
        self._d_start = t
        offsets = self.regression.offsets(t, INTERCEPT_BLOCK)
        self._x_block = offsets.tolist()
        self._d_block = (self._d_const + offsets).tolist()
        self._d_len = len(self._d_block)
        return self._d_block[0]

    def calendar_part(self, t: int) -> float:
        """x_t' beta of slot t (0.0 without calendar terms), from the same block as d_t."""
        if self.regression is None:
            return 0.0
        self._obs_intercept(t)
        return self._x_block[t - self._d_start]

    def intercepts(self, count: int) -> tuple[list[float], list[float]]:
        """d_t and x_t' beta of the next ``count`` slots, asked for slot by slot as
        :meth:`update` asks (the block cache is left as those steps leave it)."""
        d, x = [], []
        for t in range(self._t, self._t + count):
            d.append(self._obs_intercept(t))
            x.append(self._x_block[t - self._d_start])
        return d, x

    def intercept_cache(self) -> tuple:
        """The block cache of d_t, to put back with :meth:`restore_intercept_cache`."""
        return self._d_start, self._d_block, self._x_block, self._d_len

    def restore_intercept_cache(self, cache: tuple) -> None:
        self._d_start, self._d_block, self._x_block, self._d_len = cache

    def _enter_steady(self) -> None:
        if self._step_fn is None:
            self._step_fn = _compile_steady_step(self.system)
        PZ = self._P @ self._Z
        F = float(self._Z @ PZ) + self._H
        self._F_ss = F
        self._sqrtF_ss = math.sqrt(F)
        self._gain = tuple(float(g) for g in (self._T @ PZ) / F)
        self._halfwidth_ss = self._quantile * self._sqrtF_ss
        self._a_tuple = tuple(float(x) for x in self._a)
        self._steady = True

    def _leave_steady(self) -> None:
        self._a = np.array(self._a_tuple)
        self._steady = False

    def _innovation(self, t, value, f, v, F, absorbed) -> Innovation:
        sd = math.sqrt(F)
        half = self._quantile * sd
        return Innovation(t, value, f, v, F, v / sd, f - half, f + half, self.level, absorbed)

    # ---------------------------------------------------------------- public
    def peek(self, value: float | None) -> Innovation:
        """Score ``value`` for the next slot without changing the state."""
        t = self._t
        y = math.nan if value is None else float(value)
        d = self._obs_intercept(t)
        if self._steady:
            f, v, _ = self._step_fn(self._a_tuple, self._gain, y, d, t)
            F = self._F_ss
        else:
            f = float(self._Z @ self._a) + d
            v = y - f
            F = float(self._Z @ self._P @ self._Z) + self._H
        return self._innovation(t, y, f, v, F, False)

    def update(self, value: float | None, absorb: bool = True) -> Innovation:
        """Score the reading of the next slot and advance the filter.

        Parameters
        ----------
        value : float or None
            The reading; NaN or None for a missing slot (predict only).
        absorb : bool
            When False the reading is scored but the state advances as for
            a missing slot (see the module Notes).

        Returns
        -------
        Innovation
        """
        t = self._t
        y = math.nan if value is None else float(value)
        missing = y != y
        if self.regression is None:
            d = self._d_const
        else:
            i = t - self._d_start
            d = self._d_block[i] if 0 <= i < self._d_len else self._obs_intercept(t)
        if self._steady:
            if absorb and not missing:
                f, v, self._a_tuple = self._step_fn(self._a_tuple, self._gain, y, d, t)
                self._t = t + 1
                return Innovation(t, y, f, v, self._F_ss, v / self._sqrtF_ss, f - self._halfwidth_ss,
                                  f + self._halfwidth_ss, self.level, True)
            self._leave_steady()

        a, P, Z, T = self._a, self._P, self._Z, self._T
        PZ = P @ Z
        F = float(Z @ PZ) + self._H
        f = float(Z @ a) + d
        v = y - f
        c = self.system.state_intercept(t)
        if absorb and not missing:
            gain = (T @ PZ) / F
            self._a = T @ a + gain * v + c
            P_filtered = P - np.outer(PZ, PZ) / F
            P_next = T @ P_filtered @ T.T + self._RQR
            P_next = 0.5 * (P_next + P_next.T)
            change = float(np.max(np.abs(P_next - P)))
            self._P = P_next
            self._t = t + 1
            if change <= STEADY_RTOL * max(1.0, float(np.max(np.abs(P_next)))):
                self._enter_steady()
            return self._innovation(t, y, f, v, F, True)
        self._a = T @ a + c
        P_next = T @ P @ T.T + self._RQR
        self._P = 0.5 * (P_next + P_next.T)
        self._t = t + 1
        if missing:
            return Innovation(t, y, f, math.nan, F, math.nan, f - self._quantile * math.sqrt(F),
                              f + self._quantile * math.sqrt(F), self.level, False)
        return self._innovation(t, y, f, v, F, False)

    def forecast(self, horizon: int) -> tuple[np.ndarray, np.ndarray]:
        """Forecasts of the next ``horizon`` readings and their variances.

        Returns
        -------
        mean, variance : ndarray, shape (horizon,)
            mean[j] = Z a_{t+j} + d_{t+j}, variance[j] = Z P_{t+j} Z' + H,
            predicting through the slots with no readings.
        """
        if horizon < 1:
            raise ParameterError(f"horizon must be >= 1, got {horizon}")
        a = self.state
        P = self._P.copy()
        mean = np.empty(horizon)
        var = np.empty(horizon)
        for j in range(horizon):
            t = self._t + j
            mean[j] = float(self._Z @ a) + self._obs_intercept(t)
            var[j] = float(self._Z @ P @ self._Z) + self._H
            a = self._T @ a + self.system.state_intercept(t)
            P = self._T @ P @ self._T.T + self._RQR
        return mean, var

    def shift_level(self, delta: float) -> None:
        """Re-anchor the forecasts to a new level: add ``delta`` to d_t from now on.

        Used after a CUSUM-confirmed level shift, so that the new level is
        not scored as a train of anomalies. The shift is saved with the state.
        """
        if not math.isfinite(delta):
            raise ParameterError(f"level shift must be finite, got {delta}")
        self._level_offset += float(delta)
        self._d_const = self.system.obs_intercept + self._level_offset
        self._d_len = 0  # recompute the calendar block with the new constant

    # ------------------------------------------------------------ save/load
    def to_bytes(self) -> bytes:
        """The full state (a_t, P_t, the model and its version) as bytes.

        Layout (format 2): 8-byte magic, uint16 format version, uint32
        header length, a UTF-8 JSON header whose ``"$arrays"`` lists the
        arrays' names, number types and shapes, then their raw
        little-endian bytes (:func:`~.checkpoint_bytes.layout`). Format 1
        had an ``.npz`` archive after the header (about 2 KB of zip and
        ``.npy`` headers around a few hundred bytes of numbers); it still
        loads, with ``allow_pickle=False``.
        """
        header = {
            "format_version": STATE_FORMAT_VERSION,
            "model_version": self.model_version,
            "step": self._t,
            "level": self.level,
            "level_offset": self._level_offset,
            "steady": self._steady,
            "regression": self.regression.to_dict() if self.regression is not None else None,
            "meta": self.meta,
        }
        header_bytes, raw = layout(header, {"state": self.state, "cov": self._P, **self.system.to_arrays()})
        return _MAGIC + struct.pack("<HI", STATE_FORMAT_VERSION, len(header_bytes)) + header_bytes + raw

    @classmethod
    def from_bytes(cls, data: bytes) -> "Stream":
        """Load a state saved by :meth:`to_bytes`.

        Raises
        ------
        StateFormatError
            When the bytes are not a leadline stream state, are corrupt, or
            are of a format version this build does not read.
        """
        data, version, header_len, start = read_preamble(data, _MAGIC, "stream state", READABLE_STATE_VERSIONS)
        try:
            if version == 1:
                header = json.loads(data[start : start + header_len].decode("utf-8"))
                if not isinstance(header, dict):
                    raise StateFormatError(f"stream state header is a JSON {type(header).__name__}, "
                                           "expected an object")
                with np.load(io.BytesIO(data[start + header_len :]), allow_pickle=False) as archive:
                    arrays = {name: archive[name] for name in archive.files}
            else:
                header, arrays = read_arrays(data, start, header_len)
            system = LinearSystem.from_arrays(arrays)
            state, cov = arrays["state"], arrays["cov"]
            regression = None
            if header.get("regression") is not None:
                regression = regression_from_dict(header["regression"])
            return cls(
                system,
                state,
                cov,
                header["step"],
                level=header["level"],
                model_version=header["model_version"],
                regression=regression,
                meta=header.get("meta"),
                level_offset=header.get("level_offset", 0.0),
                steady=header.get("steady", False),
            )
        except StateFormatError:
            raise
        except (ValueError, KeyError, IndexError, TypeError, AttributeError, UnicodeDecodeError, OSError,
                EOFError, ZeroDivisionError, zipfile.BadZipFile, np.linalg.LinAlgError) as exc:
            # ValueError covers leadline's own ValueErrors too (a saved level outside (0, 1),
            # an unknown regression kind): in a loaded state they all mean a corrupt state.
            raise StateFormatError(f"stream state is corrupt: {type(exc).__name__}: {exc}") from exc
