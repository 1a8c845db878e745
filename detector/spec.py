"""Model specifications: which ARIMA a feed gets, validated before any fit.

A :class:`ModelSpec` holds orders and the trend only; it does no fitting.
The special cases are named for what they are (see :attr:`ModelSpec.family`):

=====================  =====================================
orders                 family
=====================  =====================================
(0, 0, 0)              white noise
(p, 0, 0)              AR(p)
(0, 0, q)              MA(q)
(p, 0, q)              ARMA(p, q)
(p, d, q), d >= 1      ARIMA(p, d, q)
seasonal (P, D, Q, s)  SARIMA(p, d, q)(P, D, Q)_s
=====================  =====================================

Notes
-----
The model, in statsmodels SARIMAX form (Durbin & Koopman 2012, section 3.4), is

.. math::

    \\phi(L)\\Phi(L^s)\\,\\Delta^d \\Delta_s^D\\,y_t = A(t) + \\theta(L)\\Theta(L^s)\\,\\varepsilon_t,
    \\qquad \\varepsilon_t \\sim N(0, \\sigma^2)

The trend polynomial A(t) acts on the *differenced* series, as in SARIMAX:
``trend="c"`` with d = 1 is a drift, ``trend="t"`` with d = 0 a linear trend.
A constant with d + D >= 2 would be a quadratic trend in levels, which a
telemetry feed has no business having, so the validator refuses it.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from .errors import SpecError

#: Largest seasonal period allowed for a seasonal ARIMA. Beyond it the state
#: dimension (about s * (P + D) + q) makes each covariance step cost
#: O(k_states^3) and the fit takes minutes; use calendar terms instead.
MAX_SEASONAL_PERIOD = 24

TRENDS = ("n", "c", "t", "ct")
MAX_ORDER = 10


def _check_int(name: str, value: Any, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise SpecError(f"{name} must be an integer, got {value!r}")
    if value < low:
        raise SpecError(f"{name} must be >= {low}, got {value}")
    if value > high:
        raise SpecError(f"{name} must be <= {high}, got {value}")
    return value


@dataclass(frozen=True)
class ModelSpec:
    """Orders and trend of one feed's ARIMA model.

    Parameters
    ----------
    order : tuple of int
        (p, d, q): autoregressive order, differences, moving-average order.
        0 <= p, q <= 10 and 0 <= d <= 2.
    seasonal : tuple of int or None
        (P, D, Q, s) with 2 <= s <= :data:`MAX_SEASONAL_PERIOD`, or None.
    trend : {"n", "c", "t", "ct"} or None
        None, constant, linear time trend, or both; acting on the
        differenced series (see the module Notes). The default (None) is
        a constant for a stationary model and no trend once differenced.

    Raises
    ------
    SpecError
        For negative or too large orders, d > 2, a seasonal period out of
        range, an all-zero seasonal part, or a constant with d + D >= 2.
    """

    order: tuple[int, int, int] = (0, 0, 0)
    seasonal: tuple[int, int, int, int] | None = None
    trend: str | None = None

    def __post_init__(self) -> None:
        order = tuple(self.order)
        if len(order) != 3:
            raise SpecError(f"order must be (p, d, q), got {self.order!r}")
        p = _check_int("order p", order[0], 0, MAX_ORDER)
        d = _check_int("order d", order[1], 0, 2)
        q = _check_int("order q", order[2], 0, MAX_ORDER)
        object.__setattr__(self, "order", (p, d, q))
        seasonal_d = 0
        if self.seasonal is not None:
            seasonal = tuple(self.seasonal)
            if len(seasonal) != 4:
                raise SpecError(f"seasonal must be (P, D, Q, s), got {self.seasonal!r}")
            s = seasonal[3]
            if isinstance(s, int) and not isinstance(s, bool) and s > MAX_SEASONAL_PERIOD:
                raise SpecError(
                    f"seasonal period s={s} is above {MAX_SEASONAL_PERIOD}: a seasonal ARIMA that long "
                    "has a huge state and fits for minutes. Use calendar terms (seasonality periods "
                    "such as '1d' or '7d' with Fourier harmonics) instead."
                )
            s = _check_int("seasonal s", s, 2, MAX_SEASONAL_PERIOD)
            big_p = _check_int("seasonal P", seasonal[0], 0, 3)
            seasonal_d = _check_int("seasonal D", seasonal[1], 0, 1)
            big_q = _check_int("seasonal Q", seasonal[2], 0, 3)
            if big_p == seasonal_d == big_q == 0:
                raise SpecError("seasonal (0, 0, 0, s) has no seasonal part; pass seasonal=None")
            object.__setattr__(self, "seasonal", (big_p, seasonal_d, big_q, s))
        if self.trend is None:
            object.__setattr__(self, "trend", "c" if d + seasonal_d == 0 else "n")
        if self.trend not in TRENDS:
            raise SpecError(f"trend must be one of {TRENDS}, got {self.trend!r}")
        if d + seasonal_d >= 2 and self.trend != "n":
            raise SpecError(
                f"trend {self.trend!r} with {d + seasonal_d} differences would be a polynomial trend of "
                "degree >= 2 in levels; use trend='n' when d + D >= 2"
            )

    # ------------------------------------------------------------------ names
    @classmethod
    def white_noise(cls, constant: bool = True) -> "ModelSpec":
        return cls((0, 0, 0), trend="c" if constant else "n")

    @classmethod
    def ar(cls, p: int, constant: bool = True) -> "ModelSpec":
        return cls((p, 0, 0), trend="c" if constant else "n")

    @classmethod
    def ma(cls, q: int, constant: bool = True) -> "ModelSpec":
        return cls((0, 0, q), trend="c" if constant else "n")

    @classmethod
    def arma(cls, p: int, q: int, constant: bool = True) -> "ModelSpec":
        return cls((p, 0, q), trend="c" if constant else "n")

    @classmethod
    def arima(cls, p: int, d: int, q: int, drift: bool = False) -> "ModelSpec":
        return cls((p, d, q), trend="c" if drift else "n")

    @property
    def family(self) -> str:
        """A readable name: 'white noise', 'AR(2)', 'ARIMA(1,1,1)', ..."""
        p, d, q = self.order
        if d == 0 and p == 0 and q == 0:
            base = "white noise"
        elif d == 0 and q == 0:
            base = f"AR({p})"
        elif d == 0 and p == 0:
            base = f"MA({q})"
        elif d == 0:
            base = f"ARMA({p},{q})"
        else:
            base = f"ARIMA({p},{d},{q})"
        if self.seasonal is not None:
            big_p, big_d, big_q, s = self.seasonal
            base = f"S{base if base.startswith('ARIMA') else f'ARIMA({p},{d},{q})'}({big_p},{big_d},{big_q})_{s}"
        return base

    @property
    def label(self) -> str:
        """Family plus trend, e.g. ``'ARMA(1,1) + const'``."""
        extra = {"n": "", "c": " + const", "t": " + trend", "ct": " + const + trend"}[self.trend]
        if self.trend == "c" and self.order[1] + (self.seasonal[1] if self.seasonal else 0) == 1:
            extra = " + drift"
        return self.family + extra

    @property
    def seasonal_order(self) -> tuple[int, int, int, int]:
        """The statsmodels ``seasonal_order`` (all zero without a seasonal part)."""
        return self.seasonal if self.seasonal is not None else (0, 0, 0, 0)

    def to_dict(self) -> dict[str, Any]:
        return {"order": list(self.order), "seasonal": list(self.seasonal) if self.seasonal else None,
                "trend": self.trend}

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> "ModelSpec":
        seasonal = data.get("seasonal")
        return cls(tuple(data["order"]), tuple(seasonal) if seasonal else None, data.get("trend"))

    @classmethod
    def parse(cls, order: str, seasonal: str | None = None, trend: str | None = None) -> "ModelSpec":
        """Build from text such as ``"2,1,2"`` and ``"0,1,1,12"``."""

        def ints(text: str, what: str, n: int) -> tuple[int, ...]:
            parts = [p.strip() for p in text.split(",")]
            if len(parts) != n:
                raise SpecError(f"{what} must be {n} comma-separated integers, got {text!r}")
            try:
                return tuple(int(p) for p in parts)
            except ValueError as exc:
                raise SpecError(f"{what} must be {n} comma-separated integers, got {text!r}") from exc

        o = ints(order, "order (p,d,q)", 3)
        s = ints(seasonal, "seasonal (P,D,Q,s)", 4) if seasonal else None
        return cls(o, s, trend)
