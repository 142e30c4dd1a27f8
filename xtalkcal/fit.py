"""Null estimators: where the victim's error signal is smallest, and how sure we are.

A null sweep plays a cancellation tone of complex amplitude ``z = x + i y``
(dimensionless, fraction of the victim line's full scale) on the victim's own
line while the aggressor drives. The victim's isolated error signal depends on
``|z - z*|`` only, where ``z*`` is the null (``z* = -u/v``, DESIGN.md section 5).
Near the null every signal is a paraboloid::

    S(z) ~= S0 + kappa * |z - z*|**2

and, for the probability signals (leakage ``P(2)``, rotation ``P(1)``), a driven
rotation saturates further out; the full model used here is::

    S(z) = S0 + A * sin(K * sqrt(kappa / A) * |z - z*|)**2

with ``K`` the error amplification (the aggressor pulse repeated ``K`` times,
so the curvature scales as ``K**2 * kappa`` while the floor stays). It reduces
to the paraboloid for ``|z - z*| << sqrt(A / kappa) / K``.

Estimators
----------
``fit_paraboloid``
    Weighted linear least squares in the basis ``(1, x, y, x**2 + y**2)``,
    vectorised over any leading batch dimensions (batched normal equations).
``fit_paraboloid_counts``
    The same from binomial counts, with the variance re-estimated from the
    fitted model a few times (iterated reweighting).
``fit_ring``
    Points on a circle: a first-harmonic sinusoid in the ring angle gives the
    direction of the null from the ring's centre.
``fit_null``
    The nonlinear model (saturating or paraboloid) from binomial counts by
    lmfit, weighted by the binomial variance of the model (iterated to the
    maximum-likelihood fixed point), optionally joint over amplifications.
``fit_null_gaussian``
    The paraboloid from Gaussian data (e.g. Stark phases with a stderr) by lmfit.

Every estimator returns a verdict (:class:`Verdict`) with a reason
(:class:`RejectionReason`). The rule for rejected estimates is the same
everywhere: **numbers never leave a rejected estimate**. Its value properties
(``z_star``, ``covariance``, ...) raise :class:`RejectedEstimateError`, its
``to_dict()`` carries no numeric values, and batch arrays hold NaN at
rejected entries. Diagnostics that really need the fitted numbers of a rejected
fit (a plot of the failed landscape) must ask for them by name through
``unchecked()``.

This module is pure mathematics: it never imports rig, probe or simulator code.
"""

from __future__ import annotations

import enum
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Generic, Literal, TypeVar, overload

import lmfit
import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from xtalkcal.exceptions import FitInputError, XtalkcalError

__all__ = [
    # verdict vocabulary
    "Verdict",
    "RejectionReason",
    "VerdictRules",
    "RejectedEstimateError",
    # results
    "NullFitValues",
    "NullEstimate",
    "ParaboloidBatch",
    "RingValues",
    "RingEstimate",
    "RingBatch",
    # estimators
    "fit_paraboloid",
    "fit_paraboloid_column",
    "ColumnNullFit",
    "fit_paraboloid_counts",
    "fit_ring",
    "fit_null",
    "fit_null_gaussian",
    # models and helpers
    "null_signal",
    "binomial_signal",
    "linearise_fringe",
]

NullModel = Literal["saturating", "paraboloid"]

_SCHEMA_VERSION = 1

# Likelihood-ratio margin (in -2 log L, i.e. 3 sigma for one extra parameter)
# by which a free fringe amplitude must beat the ceiling held at 1.
_BRANCH_PREFERENCE = 9.0


# ---------------------------------------------------------------------------
# Verdict vocabulary
# ---------------------------------------------------------------------------


class Verdict(str, enum.Enum):
    """Whether an estimate may be used."""

    ACCEPTED = "accepted"
    REJECTED = "rejected"

    def __str__(self) -> str:  # the value, as StrEnum does (numpy compares via str)
        return self.value


class RejectionReason(str, enum.Enum):
    """Why an estimate was rejected (``NONE`` for accepted estimates)."""

    NONE = "none"
    TOO_FEW_POINTS = "too_few_points"
    FIT_FAILED = "fit_failed"
    NO_SIGNAL = "no_signal"
    SATURATED = "saturated"
    OUTSIDE_REGION = "outside_region"
    MODEL_MISMATCH = "model_mismatch"

    def __str__(self) -> str:
        return self.value


# Integer codes used inside batch arrays; index into this tuple.
_REASONS: tuple[RejectionReason, ...] = tuple(RejectionReason)
_CODE = {r: i for i, r in enumerate(_REASONS)}


class RejectedEstimateError(XtalkcalError, ValueError):
    """A value was requested from an estimate whose verdict is *rejected*."""


@dataclass(frozen=True)
class VerdictRules:
    """The thresholds behind every verdict.

    Parameters
    ----------
    min_points : int
        Fewer sweep points than this (or than the number of free parameters
        plus one) is ``too_few_points``.
    min_curvature_snr : float
        The curvature must exceed this many of its standard errors
        (``kappa / stderr(kappa)``), else ``no_signal``. For ring fits the
        same threshold applies to the sinusoid amplitude.
    region_margin : float
        The null must lie inside the bounding box of the sweep points, each
        side pushed out by this fraction of the box width, *and* inside the
        circle about the points' centroid through the farthest point, radius
        enlarged by this fraction; else ``outside_region``.
    mismatch_pvalue : float
        When the noise level is known (sigma given, or binomial counts), a
        chi-square tail probability below this is ``model_mismatch``.
    saturation_phase : float
        Saturating model only (radians): if even the sweep point nearest the
        null has ``K * sqrt(kappa/A) * |z - z*|`` above this, the signal there
        is more than half-way up the fringe (``pi/4`` -> ``S0 + A/2``), the data
        never came near the floor, and the verdict is ``saturated``.
    saturation_floor : float
        Binomial nonlinear fits: a fitted floor at or above this probability
        means the signal is pinned near its ceiling (no null in view):
        ``saturated``.
    """

    min_points: int = 5
    min_curvature_snr: float = 3.0
    region_margin: float = 0.1
    mismatch_pvalue: float = 1e-3
    saturation_phase: float = math.pi / 4
    saturation_floor: float = 0.9


DEFAULT_RULES = VerdictRules()


# ---------------------------------------------------------------------------
# Result types
# ---------------------------------------------------------------------------


def _readonly(a: ArrayLike) -> NDArray[np.float64]:
    arr = np.array(a, dtype=float)
    arr.setflags(write=False)
    return arr


def _json_float(v: float | None) -> float | None:
    if v is None:
        return None
    v = float(v)
    return v if math.isfinite(v) else None


@dataclass(frozen=True, eq=False)
class NullFitValues:
    """The fitted numbers of a null estimate (reach them through the estimate).

    Attributes
    ----------
    z_star : complex
        Null position, cancellation-tone amplitude (fraction of full scale).
    covariance : ndarray, shape (2, 2)
        Covariance of ``(Re z*, Im z*)``, full-scale fraction squared.
    floor, floor_stderr : float
        Signal at the null ``S0`` (signal units: probability or rad).
    curvature, curvature_stderr : float
        ``kappa``: signal per |z - z*|**2 at amplification 1.
    amplitude, amplitude_stderr : float or None
        Saturating model's fringe amplitude ``A`` (probability); ``None`` for
        the paraboloid. The stderr is NaN when ``A`` sits at its bound
        ``S0 + A = 1`` (then it was held there for the covariance).
    """

    z_star: complex
    covariance: NDArray[np.float64]
    floor: float
    floor_stderr: float
    curvature: float
    curvature_stderr: float
    amplitude: float | None = None
    amplitude_stderr: float | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "covariance", _readonly(self.covariance))

    @property
    def position_stderr(self) -> float:
        """1-sigma semi-major axis of the null's error ellipse (full-scale fraction)."""
        cov = np.asarray(self.covariance)
        if not np.all(np.isfinite(cov)):
            return math.nan
        return float(math.sqrt(max(np.linalg.eigvalsh(cov)[-1], 0.0)))


_NAN_VALUES = NullFitValues(
    z_star=complex(math.nan, math.nan),
    covariance=np.full((2, 2), math.nan),
    floor=math.nan,
    floor_stderr=math.nan,
    curvature=math.nan,
    curvature_stderr=math.nan,
)


_V = TypeVar("_V")


class _Guarded(Generic[_V]):
    """Shared rule: the numbers of a rejected estimate are not handed out."""

    verdict: Verdict
    reason: RejectionReason
    message: str
    _values: _V

    @property
    def accepted(self) -> bool:
        """True when the verdict is ``accepted``."""
        return self.verdict is Verdict.ACCEPTED

    def _checked(self) -> _V:
        if self.verdict is not Verdict.ACCEPTED:
            raise RejectedEstimateError(
                f"this estimate was rejected ({self.reason.value}): {self.message}. "
                "A rejected estimate has no value; use .unchecked() only for diagnostics."
            )
        return self._values

    def unchecked(self) -> _V:
        """The fitted numbers regardless of the verdict -- for diagnostic plots only.

        Never store, export or act on these for a rejected estimate.
        """
        return self._values


_T = TypeVar("_T")


class _ReadOnly(property, Generic[_T]):
    """A read-only attribute with a docstring, typed ``_T`` for type checkers.

    A ``property`` subclass, so that ``help()``, IDEs and documentation tools list it as a
    property with its docstring. The ``__get__`` overloads exist for type checkers only: at
    run time the built-in ``property.__get__`` does the work.
    """

    def __init__(self, key: str, fget: Callable[[Any], Any], doc: str) -> None:
        fget.__name__ = key
        fget.__doc__ = doc
        super().__init__(fget, doc=doc)
        # CPython 3.11 (at least) drops ``doc`` for a property subclass; set it where lookups
        # find it, or help() shows this class's docstring instead.
        self.__doc__ = doc

    if TYPE_CHECKING:

        @overload
        def __get__(self, instance: None, owner: type | None = None, /) -> _ReadOnly[_T]: ...

        @overload
        def __get__(self, instance: object, owner: type | None = None, /) -> _T: ...

        def __get__(self, instance: object, owner: type | None = None, /) -> Any: ...


class _Value(_ReadOnly[_T]):
    """Field ``key`` of a guarded estimate's values; raises if the estimate is rejected."""

    def __init__(self, key: str, doc: str) -> None:
        def fget(estimate: _Guarded[Any]) -> Any:
            return getattr(estimate._checked(), key)

        super().__init__(key, fget, doc)


class _Masked(_ReadOnly[_T]):
    """Array ``key`` of a batch's raw fit results, NaN wherever the verdict is rejected."""

    def __init__(self, key: str, doc: str) -> None:
        def fget(batch: ParaboloidBatch | RingBatch) -> Any:
            return _mask(batch._raw[key], batch.accepted)

        super().__init__(key, fget, doc)


@dataclass(frozen=True, eq=False, repr=False)
class NullEstimate(_Guarded[NullFitValues]):
    """One null estimate: value, covariance, quality figure and verdict.

    The value properties (``z_star``, ``covariance``, ``floor``, ...) raise
    :class:`RejectedEstimateError` when the verdict is ``rejected``, and
    :meth:`to_dict` then omits every numeric value.

    Attributes
    ----------
    method : str
        Which estimator produced it (e.g. ``"paraboloid_wls"``).
    verdict : Verdict
    reason : RejectionReason
    message : str
        One human sentence on the verdict.
    n_points : int
        Sweep points used.
    total_shots : int or None
        Shots behind those points (None when the estimator was given none).
    reduced_chi2 : float
        Chi-square per degree of freedom (NaN when the noise level is not
        known, i.e. an unweighted linear fit).
    dof : int
        Degrees of freedom of the fit.
    amplifications : tuple of int
        The distinct error amplifications ``K`` in the data; ``curvature`` is
        always quoted at ``K = 1``.
    """

    method: str
    verdict: Verdict
    reason: RejectionReason
    message: str
    n_points: int
    total_shots: int | None
    reduced_chi2: float
    dof: int
    amplifications: tuple[int, ...] = (1,)
    _values: NullFitValues = field(default=_NAN_VALUES, repr=False)

    # -- guarded values -------------------------------------------------
    z_star = _Value[complex]("z_star", "Null position (fraction of the victim line's full scale).")
    covariance = _Value[NDArray[np.float64]]("covariance", "2x2 covariance of ``(Re z*, Im z*)``.")
    floor = _Value[float]("floor", "Signal at the null ``S0``.")
    floor_stderr = _Value[float]("floor_stderr", "Standard error of ``floor``.")
    curvature = _Value[float](
        "curvature", "``kappa`` at amplification 1 (signal per full-scale fraction squared)."
    )
    curvature_stderr = _Value[float]("curvature_stderr", "Standard error of ``curvature``.")
    amplitude = _Value[float | None](
        "amplitude", "Fringe amplitude ``A`` of the saturating model (None for the paraboloid)."
    )
    amplitude_stderr = _Value[float | None](
        "amplitude_stderr",
        "Standard error of ``amplitude`` (None for the paraboloid, NaN with ``A`` at its bound).",
    )

    @property
    def z_star_stderr(self) -> tuple[float, float]:
        """Standard errors of ``(Re z*, Im z*)``."""
        c = self._checked().covariance
        return (float(math.sqrt(c[0, 0])), float(math.sqrt(c[1, 1])))

    @property
    def position_stderr(self) -> float:
        """1-sigma semi-major axis of the error ellipse of ``z*``."""
        return self._checked().position_stderr

    # -- records --------------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able record. Numeric values only when accepted."""
        d: dict[str, Any] = {
            "schema": "xtalkcal.null_estimate",
            "schema_version": _SCHEMA_VERSION,
            "method": self.method,
            "verdict": self.verdict.value,
            "reason": self.reason.value,
            "message": self.message,
            "n_points": int(self.n_points),
            "total_shots": None if self.total_shots is None else int(self.total_shots),
            "reduced_chi2": _json_float(self.reduced_chi2),
            "dof": int(self.dof),
            "amplifications": [int(k) for k in self.amplifications],
        }
        if self.accepted:
            v = self._values
            d.update(
                z_star=[float(v.z_star.real), float(v.z_star.imag)],
                covariance=[[float(c) for c in row] for row in v.covariance],
                floor=_json_float(v.floor),
                floor_stderr=_json_float(v.floor_stderr),
                curvature=_json_float(v.curvature),
                curvature_stderr=_json_float(v.curvature_stderr),
                amplitude=_json_float(v.amplitude),
                amplitude_stderr=_json_float(v.amplitude_stderr),
            )
        return d

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> NullEstimate:
        """Rebuild an estimate from :meth:`to_dict` output."""
        if d.get("schema") != "xtalkcal.null_estimate":
            raise FitInputError(
                f"not a null-estimate record: schema={d.get('schema')!r}, "
                "expected 'xtalkcal.null_estimate'"
            )
        verdict = Verdict(d["verdict"])
        values = _NAN_VALUES
        if verdict is Verdict.ACCEPTED:

            def num(key: str) -> float:
                v = d.get(key)
                return math.nan if v is None else float(v)

            amp = d.get("amplitude")
            values = NullFitValues(
                z_star=complex(d["z_star"][0], d["z_star"][1]),
                covariance=np.asarray(d["covariance"], dtype=float),
                floor=num("floor"),
                floor_stderr=num("floor_stderr"),
                curvature=num("curvature"),
                curvature_stderr=num("curvature_stderr"),
                amplitude=None if amp is None else float(amp),
                amplitude_stderr=None if amp is None else num("amplitude_stderr"),
            )
        chi = d.get("reduced_chi2")
        return cls(
            method=str(d["method"]),
            verdict=verdict,
            reason=RejectionReason(d["reason"]),
            message=str(d["message"]),
            n_points=int(d["n_points"]),
            total_shots=None if d.get("total_shots") is None else int(d["total_shots"]),
            reduced_chi2=math.nan if chi is None else float(chi),
            dof=int(d["dof"]),
            amplifications=tuple(int(k) for k in d.get("amplifications", [1])),
            _values=values,
        )

    def __repr__(self) -> str:
        head = f"NullEstimate(method={self.method!r}, verdict={self.verdict.value!r}"
        if not self.accepted:
            return f"{head}, reason={self.reason.value!r}, message={self.message!r})"
        v = self._values
        return (
            f"{head}, z_star={v.z_star:.6g} +/- {v.position_stderr:.3g}, "
            f"floor={v.floor:.4g}, curvature={v.curvature:.4g}, "
            f"reduced_chi2={self.reduced_chi2:.3g}, n_points={self.n_points})"
        )


@dataclass(frozen=True, eq=False)
class RingValues:
    """Fitted numbers of a ring fit (reach them through the estimate).

    Attributes
    ----------
    direction, direction_stderr : float
        Angle of ``z* - c`` (rad, in (-pi, pi]): where on the ring the signal
        is lowest.
    amplitude, amplitude_stderr : float
        First-harmonic amplitude ``sqrt(a1**2 + a2**2)`` (signal units). Under
        the paraboloid it equals ``2 * kappa * rho * |z* - c|``.
    offset, offset_stderr : float
        Ring mean ``a0`` (signal units).
    """

    direction: float
    direction_stderr: float
    amplitude: float
    amplitude_stderr: float
    offset: float
    offset_stderr: float


_NAN_RING = RingValues(*(math.nan,) * 6)


@dataclass(frozen=True, eq=False, repr=False)
class RingEstimate(_Guarded[RingValues]):
    """Direction of the null seen from a ring's centre, with a verdict.

    Same rule as :class:`NullEstimate`: values raise when rejected.
    """

    method: str
    verdict: Verdict
    reason: RejectionReason
    message: str
    n_points: int
    total_shots: int | None
    reduced_chi2: float
    dof: int
    _values: RingValues = field(default=_NAN_RING, repr=False)

    direction = _Value[float]("direction", "Angle of ``z* - centre`` (rad).")
    direction_stderr = _Value[float]("direction_stderr", "Standard error of ``direction`` (rad).")
    amplitude = _Value[float](
        "amplitude", "First-harmonic amplitude of the ring signal (signal units)."
    )
    amplitude_stderr = _Value[float]("amplitude_stderr", "Standard error of ``amplitude``.")
    offset = _Value[float]("offset", "Ring mean ``a0`` (signal units).")

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able record. Numeric values only when accepted."""
        d: dict[str, Any] = {
            "schema": "xtalkcal.ring_estimate",
            "schema_version": _SCHEMA_VERSION,
            "method": self.method,
            "verdict": self.verdict.value,
            "reason": self.reason.value,
            "message": self.message,
            "n_points": int(self.n_points),
            "total_shots": None if self.total_shots is None else int(self.total_shots),
            "reduced_chi2": _json_float(self.reduced_chi2),
            "dof": int(self.dof),
        }
        if self.accepted:
            v = self._values
            d.update(
                direction=_json_float(v.direction),
                direction_stderr=_json_float(v.direction_stderr),
                amplitude=_json_float(v.amplitude),
                amplitude_stderr=_json_float(v.amplitude_stderr),
                offset=_json_float(v.offset),
                offset_stderr=_json_float(v.offset_stderr),
            )
        return d

    def __repr__(self) -> str:
        head = f"RingEstimate(verdict={self.verdict.value!r}"
        if not self.accepted:
            return f"{head}, reason={self.reason.value!r}, message={self.message!r})"
        v = self._values
        return (
            f"{head}, direction={v.direction:.4g} +/- {v.direction_stderr:.2g} rad, "
            f"amplitude={v.amplitude:.3g})"
        )


def _mask(arr: NDArray[Any], ok: NDArray[np.bool_]) -> NDArray[Any]:
    """Copy of ``arr`` with NaN wherever the verdict is rejected."""
    extra = arr.ndim - ok.ndim
    okb = ok.reshape(ok.shape + (1,) * extra)
    out = np.where(okb, arr, np.nan)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, eq=False)
class ParaboloidBatch:
    """Results of :func:`fit_paraboloid` over a batch of sweeps.

    Array attributes have the batch shape (``z`` and ``s`` minus their last
    axis) and hold **NaN wherever the verdict is rejected**; use
    :meth:`estimate` for one sweep's :class:`NullEstimate`.

    Attributes
    ----------
    shape : tuple of int
        Batch shape.
    n_points : int
        Points per sweep.
    method : str
    accepted : ndarray of bool
    reason_codes : ndarray of int
        Index into ``tuple(RejectionReason)``; see :meth:`reasons`.
    reduced_chi2 : ndarray
        Quality figure (kept for rejected fits too: it is a diagnosis, not a value).
    dof : int
    total_shots : ndarray of int or None
    """

    shape: tuple[int, ...]
    n_points: int
    method: str
    accepted: NDArray[np.bool_]
    reason_codes: NDArray[np.int64]
    reduced_chi2: NDArray[np.float64]
    dof: int
    total_shots: NDArray[np.int64] | None
    _raw: Mapping[str, NDArray[Any]] = field(repr=False)
    rules: VerdictRules = DEFAULT_RULES

    z_star = _Masked[NDArray[np.complex128]]("z_star", "Null positions (NaN where rejected).")
    covariance = _Masked[NDArray[np.float64]](
        "covariance", "Covariances of (Re z*, Im z*), shape ``shape + (2, 2)``."
    )
    floor = _Masked[NDArray[np.float64]]("floor", "Signals at the nulls ``S0``.")
    floor_stderr = _Masked[NDArray[np.float64]]("floor_stderr", "Standard errors of ``floor``.")
    curvature = _Masked[NDArray[np.float64]]("curvature", "``kappa`` at amplification 1.")
    curvature_stderr = _Masked[NDArray[np.float64]](
        "curvature_stderr", "Standard errors of ``curvature``."
    )

    def reasons(self) -> NDArray[np.object_]:
        """Array of :class:`RejectionReason` with the batch shape."""
        return np.asarray(_REASONS, dtype=object)[self.reason_codes]

    def unchecked(self, name: str) -> NDArray[Any]:
        """Raw fitted array regardless of verdicts -- diagnostics only.

        ``name`` is one of ``z_star, covariance, floor, floor_stderr, curvature,
        curvature_stderr, coefficients`` (``coefficients``: ``c0..c3`` of
        ``c0 + c1 x + c2 y + c3 (x**2 + y**2)`` in the original units).
        """
        if name not in self._raw:
            raise KeyError(f"unknown field {name!r}; choose from {sorted(self._raw)}")
        return self._raw[name]

    def estimate(self, index: int | tuple[int, ...] = ()) -> NullEstimate:
        """The :class:`NullEstimate` of one sweep of the batch."""
        idx = np.index_exp[index] if not isinstance(index, tuple) else index
        code = int(self.reason_codes[idx])
        reason = _REASONS[code]
        verdict = Verdict.ACCEPTED if reason is RejectionReason.NONE else Verdict.REJECTED
        r = self._raw
        cov = np.asarray(r["covariance"][idx], dtype=float)
        values = NullFitValues(
            z_star=complex(r["z_star"][idx]),
            covariance=cov,
            floor=float(r["floor"][idx]),
            floor_stderr=float(r["floor_stderr"][idx]),
            curvature=float(r["curvature"][idx]),
            curvature_stderr=float(r["curvature_stderr"][idx]),
        )
        shots = None if self.total_shots is None else int(self.total_shots[idx])
        msg = _paraboloid_message(reason, {k: v[idx] for k, v in r.items()}, self.dof, self.rules)
        return NullEstimate(
            method=self.method,
            verdict=verdict,
            reason=reason,
            message=msg,
            n_points=self.n_points,
            total_shots=shots,
            reduced_chi2=float(self.reduced_chi2[idx]),
            dof=self.dof,
            _values=values,
        )


@dataclass(frozen=True, eq=False)
class RingBatch:
    """Results of :func:`fit_ring` over a batch of rings (NaN where rejected)."""

    shape: tuple[int, ...]
    n_points: int
    accepted: NDArray[np.bool_]
    reason_codes: NDArray[np.int64]
    reduced_chi2: NDArray[np.float64]
    dof: int
    _raw: Mapping[str, NDArray[Any]] = field(repr=False)

    direction = _Masked[NDArray[np.float64]]("direction", "Angle of ``z* - centre`` (rad).")
    direction_stderr = _Masked[NDArray[np.float64]](
        "direction_stderr", "Standard errors of ``direction`` (rad)."
    )
    amplitude = _Masked[NDArray[np.float64]](
        "amplitude", "First-harmonic amplitudes of the ring signals (signal units)."
    )
    amplitude_stderr = _Masked[NDArray[np.float64]](
        "amplitude_stderr", "Standard errors of ``amplitude``."
    )
    offset = _Masked[NDArray[np.float64]]("offset", "Ring means ``a0`` (signal units).")

    def reasons(self) -> NDArray[np.object_]:
        return np.asarray(_REASONS, dtype=object)[self.reason_codes]

    def unchecked(self, name: str) -> NDArray[Any]:
        """Raw fitted array regardless of verdicts -- diagnostics only."""
        return self._raw[name]

    def estimate(self, index: int | tuple[int, ...] = ()) -> RingEstimate:
        """The :class:`RingEstimate` of one ring of the batch."""
        idx = np.index_exp[index] if not isinstance(index, tuple) else index
        reason = _REASONS[int(self.reason_codes[idx])]
        verdict = Verdict.ACCEPTED if reason is RejectionReason.NONE else Verdict.REJECTED
        r = self._raw
        vals = RingValues(
            *(
                float(r[k][idx])
                for k in (
                    "direction",
                    "direction_stderr",
                    "amplitude",
                    "amplitude_stderr",
                    "offset",
                    "offset_stderr",
                )
            )
        )
        if reason is RejectionReason.NONE:
            msg = "accepted"
        elif reason is RejectionReason.NO_SIGNAL:
            msg = (
                f"ring modulation is not significant (amplitude/stderr = "
                f"{float(r['snr'][idx]):.2f})"
            )
        elif reason is RejectionReason.TOO_FEW_POINTS:
            msg = f"{self.n_points} ring points; at least 5 needed"
        else:
            msg = "the ring angles do not determine a sinusoid (degenerate design)"
        return RingEstimate(
            method="ring_harmonic_wls",
            verdict=verdict,
            reason=reason,
            message=msg,
            n_points=self.n_points,
            total_shots=None,
            reduced_chi2=float(self.reduced_chi2[idx]),
            dof=self.dof,
            _values=vals,
        )


# ---------------------------------------------------------------------------
# Input checks
# ---------------------------------------------------------------------------


def _as_complex(z: ArrayLike, name: str = "z") -> NDArray[np.complex128]:
    arr = np.asarray(z)
    if arr.dtype.kind not in "biufc":
        raise FitInputError(f"{name} must be numeric (complex amplitudes), got dtype {arr.dtype}")
    arr = arr.astype(np.complex128)
    if arr.ndim == 0:
        raise FitInputError(f"{name} must have a points axis, got a scalar")
    if not np.all(np.isfinite(arr)):
        raise FitInputError(f"{name} contains non-finite values")
    return arr


def _as_real(a: ArrayLike, name: str) -> NDArray[np.float64]:
    arr = np.asarray(a)
    if arr.dtype.kind not in "biuf":
        raise FitInputError(f"{name} must be real numbers, got dtype {arr.dtype}")
    arr = arr.astype(float)
    if not np.all(np.isfinite(arr)):
        raise FitInputError(f"{name} contains non-finite values")
    return arr


def _broadcast(**arrays: NDArray[Any]) -> tuple[NDArray[Any], ...]:
    shapes = {k: v.shape for k, v in arrays.items()}
    try:
        shape = np.broadcast_shapes(*shapes.values())
    except ValueError:
        raise FitInputError(
            "inputs do not broadcast to one (..., n_points) shape: "
            + ", ".join(f"{k}{s}" for k, s in shapes.items())
        ) from None
    return tuple(np.broadcast_to(v, shape) for v in arrays.values())


def binomial_signal(
    counts: ArrayLike, shots: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Probability estimate and its standard error from binomial counts.

    Parameters
    ----------
    counts : array_like of int
        Number of shots in the signalling outcome (e.g. found in ``|2>``).
    shots : array_like of int
        Shots per point (broadcast against ``counts``).

    Returns
    -------
    p : ndarray
        ``counts / shots``.
    sigma : ndarray
        ``sqrt(p~ (1 - p~) / shots)`` with ``p~ = (counts + 1/2) / (shots + 1)``
        (Jeffreys-smoothed, so a point with zero counts keeps a finite weight).
    """
    k, n = _counts_shots(counts, shots)
    pt = (k + 0.5) / (n + 1.0)
    return k / n, np.sqrt(pt * (1.0 - pt) / n)


def _counts_shots(
    counts: ArrayLike, shots: ArrayLike
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    k = _as_real(counts, "counts")
    n = _as_real(shots, "shots")
    k, n = _broadcast(counts=k, shots=n)
    if np.any(n <= 0):
        raise FitInputError("shots must be positive at every point")
    if np.any(k < 0) or np.any(k > n):
        raise FitInputError("counts must satisfy 0 <= counts <= shots at every point")
    return k, n


# ---------------------------------------------------------------------------
# Linear paraboloid (vectorised)
# ---------------------------------------------------------------------------


def _normalise(z: NDArray[np.complex128]) -> tuple[Any, Any, Any, Any]:
    """Centre and scale the points so the fit is well conditioned."""
    centre = z.mean(axis=-1)
    dz = z - centre[..., None]
    scale = np.abs(dz).max(axis=-1)
    degenerate = ~(scale > 0)
    safe = np.where(degenerate, 1.0, scale)
    return centre, safe, dz / safe[..., None], degenerate


def _region_ok(zn: NDArray[np.complex128], zs: NDArray[Any], margin: float) -> NDArray[np.bool_]:
    """Null inside the (margin-enlarged) bounding box and circle of the points."""
    x, y = zn.real, zn.imag
    xmin, xmax = x.min(-1), x.max(-1)
    ymin, ymax = y.min(-1), y.max(-1)
    wx, wy = xmax - xmin, ymax - ymin
    # A sweep along a line has zero box width across it; let the circle rule
    # govern that direction instead of rejecting everything.
    wide = np.maximum(wx, wy)
    mx = margin * np.where(wx > 0, wx, wide)
    my = margin * np.where(wy > 0, wy, wide)
    with np.errstate(invalid="ignore"):
        in_box = (
            (zs.real >= xmin - mx)
            & (zs.real <= xmax + mx)
            & (zs.imag >= ymin - my)
            & (zs.imag <= ymax + my)
        )
        in_circle = np.abs(zs) <= 1.0 + margin  # zn has max radius 1 by construction
    ok: NDArray[np.bool_] = in_box & in_circle
    return ok


def _batched_wls(
    basis: NDArray[np.float64], s: NDArray[np.float64], w: NDArray[np.float64]
) -> tuple[Any, Any, Any, Any]:
    """Weighted least squares for a batch: returns (coef, inv normal matrix, chi2, singular)."""
    p = basis.shape[-1]
    bw = basis * w[..., None]
    m = np.swapaxes(bw, -1, -2) @ basis
    rhs = (np.swapaxes(bw, -1, -2) @ s[..., None])[..., 0]
    # Normalise by the diagonal before judging and solving: cheap and makes the
    # singularity test scale-free.
    d = np.sqrt(np.clip(np.diagonal(m, axis1=-2, axis2=-1), 1e-300, None))
    mn = m / (d[..., :, None] * d[..., None, :])
    ev = np.linalg.eigvalsh(mn)
    singular = ~(ev[..., 0] > 1e-12 * ev[..., -1])
    eye = np.eye(p)
    mn_safe = np.where(singular[..., None, None], eye, mn)
    rhs_n = rhs / d
    stacked = np.concatenate([rhs_n[..., None], np.broadcast_to(eye, mn.shape)], axis=-1)
    sol = np.linalg.solve(mn_safe, stacked)
    coef = sol[..., 0] / d
    minv = sol[..., 1:] / (d[..., :, None] * d[..., None, :])
    resid = s - (basis @ coef[..., None])[..., 0]
    chi2 = np.sum(w * resid * resid, axis=-1)
    return coef, minv, chi2, singular


def _paraboloid_core(
    z: NDArray[np.complex128],
    s: NDArray[np.float64],
    w: NDArray[np.float64],
    absolute: bool,
    rules: VerdictRules,
) -> tuple[dict[str, NDArray[Any]], NDArray[np.int64], NDArray[np.float64], int]:
    shape = s.shape[:-1]
    n = s.shape[-1]
    dof = n - 4
    nan = np.full(shape, np.nan)
    if n < max(rules.min_points, 5):
        raw = {
            "z_star": nan + 1j * nan,
            "covariance": np.full(shape + (2, 2), np.nan),
            "floor": nan,
            "floor_stderr": nan,
            "curvature": nan,
            "curvature_stderr": nan,
            "coefficients": np.full(shape + (4,), np.nan),
            "snr": nan,
            "pvalue": nan,
            "offset_radius": nan,
        }
        codes = np.full(shape, _CODE[RejectionReason.TOO_FEW_POINTS], dtype=np.int64)
        return raw, codes, nan, dof

    centre, scale, zn, degenerate = _normalise(z)
    x, y = zn.real, zn.imag
    basis = np.stack([np.ones_like(x), x, y, x * x + y * y], axis=-1)
    coef, minv, chi2, singular = _batched_wls(basis, s, w)
    if absolute:
        cov_c = minv
        redchi = chi2 / dof
        pvalue = stats.chi2.sf(chi2, dof)
    else:
        cov_c = minv * (chi2 / dof)[..., None, None]
        redchi = np.full(shape, np.nan)
        pvalue = np.full(shape, np.nan)

    c0, c1, c2, c3 = (coef[..., i] for i in range(4))
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        xs = -c1 / (2 * c3)
        ys = -c2 / (2 * c3)
        r2 = xs * xs + ys * ys
        floor = c0 - c3 * r2
        # Delta method. Jacobians of (x*, y*) and S0 with respect to (c0..c3).
        zero = np.zeros(shape)
        jx = np.stack([zero, -1 / (2 * c3), zero, -xs / c3], axis=-1)
        jy = np.stack([zero, zero, -1 / (2 * c3), -ys / c3], axis=-1)
        jz = np.stack([jx, jy], axis=-2)  # (...,2,4)
        cov_zn = jz @ cov_c @ np.swapaxes(jz, -1, -2)
        js = np.stack([np.ones(shape), xs, ys, r2], axis=-1)
        var_floor = np.einsum("...i,...ij,...j->...", js, cov_c, js)
        var_k = cov_c[..., 3, 3]
        k_se = np.sqrt(var_k)
        snr = c3 / k_se
    zs_n = xs + 1j * ys
    failed = singular | degenerate | ~np.isfinite(snr)
    in_region = _region_ok(zn, zs_n, rules.region_margin)

    raw = {
        "z_star": centre + scale * zs_n,
        "covariance": cov_zn * (scale**2)[..., None, None],
        "floor": floor,
        "floor_stderr": np.sqrt(var_floor),
        "curvature": c3 / scale**2,
        "curvature_stderr": k_se / scale**2,
        "coefficients": _coefficients_original(coef, centre, scale),
        "snr": snr,
        "pvalue": pvalue,
        "offset_radius": np.abs(zs_n),
    }
    conds = [
        failed,
        ~(snr >= rules.min_curvature_snr),
        ~in_region,
        (pvalue < rules.mismatch_pvalue) if absolute else np.zeros(shape, bool),
    ]
    codes_list = [
        _CODE[RejectionReason.FIT_FAILED],
        _CODE[RejectionReason.NO_SIGNAL],
        _CODE[RejectionReason.OUTSIDE_REGION],
        _CODE[RejectionReason.MODEL_MISMATCH],
    ]
    codes = np.select(conds, codes_list, default=_CODE[RejectionReason.NONE]).astype(np.int64)
    return raw, codes, redchi, dof


def _coefficients_original(
    coef: NDArray[np.float64], centre: NDArray[Any], scale: NDArray[Any]
) -> NDArray[np.float64]:
    """Map c0..c3 fitted on normalised points back to the original z units."""
    c0, c1, c2, c3 = (coef[..., i] for i in range(4))
    a, b = centre.real, centre.imag
    k3 = c3 / scale**2
    k1 = c1 / scale - 2 * k3 * a
    k2 = c2 / scale - 2 * k3 * b
    k0 = c0 - (c1 * a + c2 * b) / scale + k3 * (a * a + b * b)
    return np.stack([k0, k1, k2, k3], axis=-1)


def _paraboloid_message(
    reason: RejectionReason, r: Mapping[str, Any], dof: int, rules: VerdictRules
) -> str:
    if reason is RejectionReason.NONE:
        return "accepted"
    if reason is RejectionReason.TOO_FEW_POINTS:
        return (
            f"fewer than {max(rules.min_points, 5)} sweep points; a paraboloid needs at "
            "least that many for a checked fit"
        )
    if reason is RejectionReason.FIT_FAILED:
        return "the sweep points do not determine a paraboloid (degenerate design)"
    if reason is RejectionReason.NO_SIGNAL:
        return (
            f"curvature is not significantly positive (kappa/stderr = "
            f"{float(r['snr']):.2f}, need >= {rules.min_curvature_snr:g})"
        )
    if reason is RejectionReason.OUTSIDE_REGION:
        return (
            f"the fitted null lies outside the swept region ({float(r['offset_radius']):.2f} "
            "sweep radii from the centroid)"
        )
    if reason is RejectionReason.MODEL_MISMATCH:
        return (
            f"the paraboloid does not describe the data (chi-square tail probability "
            f"{float(r['pvalue']):.2g} with {dof} dof)"
        )
    return str(reason.value)


def fit_paraboloid(
    z: ArrayLike,
    s: ArrayLike,
    sigma: ArrayLike | None = None,
    *,
    shots: ArrayLike | None = None,
    rules: VerdictRules = DEFAULT_RULES,
) -> ParaboloidBatch:
    """Fit ``S = c0 + c1 x + c2 y + c3 (x**2 + y**2)`` by weighted linear least squares.

    Vectorised over any leading batch dimensions: the normal equations of every
    sweep are formed and solved together (no Python loop over fits).

    The null and its parameters follow from the coefficients::

        z* = -(c1 + i c2) / (2 c3),   kappa = c3,   S0 = c0 - kappa |z*|**2

    with the covariance of ``(Re z*, Im z*)`` and the stderr of ``S0`` by the
    delta method. Internally the points are centred and scaled to unit radius
    so that the normal equations stay well conditioned for any amplitude scale.

    Parameters
    ----------
    z : array_like of complex, shape (..., n)
        Cancellation-tone amplitudes (fraction of full scale).
    s : array_like of float, shape (..., n)
        Error signal at each point (probability, or rad for a Stark phase).
    sigma : array_like of float, optional
        Standard error of each ``s`` (same units). When given, the fit is
        weighted by ``1/sigma**2`` and the covariance is absolute; when
        omitted, the fit is unweighted, the covariance is scaled by the
        residual variance, and ``reduced_chi2`` is NaN.
    shots : array_like of int, optional
        Shots behind each point, only recorded (``total_shots``).
    rules : VerdictRules
        Verdict thresholds.

    Returns
    -------
    ParaboloidBatch
        Arrays with the batch shape, NaN where rejected; ``.estimate(i)``.

    Raises
    ------
    FitInputError
        Non-numeric or non-finite input, shapes that do not broadcast, or a
        non-positive sigma.

    Notes
    -----
    Verdict rules, first match wins:

    1. ``too_few_points``: fewer than ``rules.min_points`` (5) points.
    2. ``fit_failed``: the points do not determine the four coefficients
       (e.g. all on one circle or one line).
    3. ``no_signal``: ``kappa / stderr(kappa) < rules.min_curvature_snr`` (3):
       the curvature is not significantly positive.
    4. ``outside_region``: ``z*`` outside the bounding box of the points (each
       side pushed out by ``rules.region_margin`` = 10 % of the width) or
       outside the circle about their centroid through the farthest point,
       enlarged by the same 10 %.
    5. ``model_mismatch`` (only with ``sigma``): the chi-square tail
       probability of the residuals with ``n - 4`` dof is below
       ``rules.mismatch_pvalue`` (1e-3).

    Examples
    --------
    >>> import numpy as np
    >>> from xtalkcal.design import grid_design
    >>> z = grid_design(0.02 + 0.01j, 0.01, 5)
    >>> s = 0.01 + 40.0 * np.abs(z - (0.021 + 0.012j)) ** 2
    >>> est = fit_paraboloid(z, s).estimate()
    >>> round(est.z_star.real, 6), round(est.z_star.imag, 6)
    (0.021, 0.012)
    """
    za = _as_complex(z, "z")
    sa = _as_real(s, "s")
    if sa.ndim == 0:
        raise FitInputError("s must have a points axis, got a scalar")
    if za.shape[-1] != sa.shape[-1]:
        raise FitInputError(
            f"z and s must have the same number of points on the last axis, "
            f"got {za.shape[-1]} and {sa.shape[-1]}"
        )
    if sigma is not None:
        sg = _as_real(sigma, "sigma")
        if np.any(sg <= 0):
            raise FitInputError("sigma must be positive at every point")
        za, sa, sg = _broadcast(z=za, s=sa, sigma=sg)
        w = 1.0 / (sg * sg)
    else:
        za, sa = _broadcast(z=za, s=sa)
        w = np.ones(sa.shape)
    total = None
    if shots is not None:
        sh = _as_real(shots, "shots")
        (sh,) = _broadcast(shots=np.broadcast_to(sh, sa.shape))
        total = np.sum(sh, axis=-1).astype(np.int64)
    raw, codes, redchi, dof = _paraboloid_core(za, sa, w, sigma is not None, rules)
    return _make_batch(raw, codes, redchi, dof, sa, total, "paraboloid_wls", rules)


def _make_batch(
    raw: dict[str, NDArray[Any]],
    codes: NDArray[np.int64],
    redchi: NDArray[np.float64],
    dof: int,
    s: NDArray[np.float64],
    total: NDArray[np.int64] | None,
    method: str,
    rules: VerdictRules,
) -> ParaboloidBatch:
    for v in raw.values():
        v.setflags(write=False)
    accepted = codes == _CODE[RejectionReason.NONE]
    return ParaboloidBatch(
        shape=s.shape[:-1],
        n_points=s.shape[-1],
        method=method,
        accepted=accepted,
        reason_codes=codes,
        reduced_chi2=np.asarray(redchi, dtype=float),
        dof=dof,
        total_shots=total,
        _raw=raw,
        rules=rules,
    )


def fit_paraboloid_counts(
    z: ArrayLike,
    counts: ArrayLike,
    shots: ArrayLike,
    *,
    iterations: int = 3,
    rules: VerdictRules = DEFAULT_RULES,
) -> ParaboloidBatch:
    """Linear paraboloid fit of binomial counts, vectorised, with iterated reweighting.

    The first pass weights each point by the Jeffreys-smoothed binomial
    variance of its own counts (:func:`binomial_signal`); each further pass
    re-weights by the binomial variance ``p (1 - p) / shots`` of the *fitted
    paraboloid* at that point (clipped to ``[0.5/shots, 1 - 0.5/shots]``).
    The fixed point of this reweighting solves the binomial score equations
    of the linear model, i.e. it is the maximum-likelihood paraboloid, and the
    covariance is then the inverse Fisher information. ``reduced_chi2`` is the
    Pearson chi-square per dof under the final weights.

    Parameters
    ----------
    z : array_like of complex, shape (..., n)
        Cancellation-tone amplitudes (fraction of full scale).
    counts, shots : array_like of int, shape (..., n)
        Signalling counts and shots per point.
    iterations : int
        Reweighting passes after the first (3 is ample in practice).
    rules : VerdictRules
        Verdict thresholds; same rules as :func:`fit_paraboloid` with sigma.
    """
    za = _as_complex(z, "z")
    k, n = _counts_shots(counts, shots)
    if za.shape[-1] != k.shape[-1]:
        raise FitInputError(
            f"z and counts must have the same number of points on the last axis, "
            f"got {za.shape[-1]} and {k.shape[-1]}"
        )
    za, k, n = _broadcast(z=za, counts=k, shots=n)
    p_obs, sigma = binomial_signal(k, n)
    total = np.sum(n, axis=-1).astype(np.int64)
    raw, codes, redchi, dof = _paraboloid_core(za, p_obs, 1 / sigma**2, True, rules)
    for _ in range(max(0, int(iterations))):
        c = raw["coefficients"]
        if not np.any(np.isfinite(c)):
            break
        x, y = za.real, za.imag
        pred = c[..., 0, None] + c[..., 1, None] * x + c[..., 2, None] * y
        pred = pred + c[..., 3, None] * (x * x + y * y)
        pt = np.clip(pred, 0.5 / n, 1 - 0.5 / n)
        new_sigma = np.sqrt(pt * (1 - pt) / n)
        usable = np.all(np.isfinite(new_sigma), axis=-1, keepdims=True)
        sigma = np.where(usable, new_sigma, sigma)
        raw, codes, redchi, dof = _paraboloid_core(za, p_obs, 1 / sigma**2, True, rules)
    return _make_batch(raw, codes, redchi, dof, p_obs, total, "paraboloid_binomial_irls", rules)


# ---------------------------------------------------------------------------
# Ring (first harmonic) fit
# ---------------------------------------------------------------------------


def fit_ring(
    phi: ArrayLike,
    s: ArrayLike,
    sigma: ArrayLike | None = None,
    *,
    rules: VerdictRules = DEFAULT_RULES,
) -> RingBatch:
    """Direction of the null from points on a ring ``z = c + rho exp(i phi)``.

    Fits ``S = a0 + a1 cos(phi) + a2 sin(phi)`` by weighted linear least
    squares (vectorised over leading batch dims). The signal is lowest towards
    the null, so ``phi* = atan2(-a2, -a1)`` is the angle of ``z* - c``; the
    amplitude is ``sqrt(a1**2 + a2**2)`` (equal to ``2 kappa rho |z* - c|`` for
    a paraboloid). Stderrs by the delta method.

    Whatever the landscape, the signal on the ring is an even function of
    ``phi - phi*``. Under the paraboloid it is a pure first harmonic; a
    saturating landscape adds higher harmonics, which on a uniformly spaced
    ring of ``n`` points are orthogonal to the first except harmonics
    ``n - 1, n + 1, ...`` that alias onto it -- small (a noiseless strongly
    saturated 5-point ring is off by ~1e-4 rad, an 8-point ring by ~1e-10).
    The reduced chi-square is therefore reported but not used to reject.

    Parameters
    ----------
    phi : array_like of float, shape (..., n)
        Ring angles (rad).
    s : array_like of float, shape (..., n)
        Error signal (probability or rad).
    sigma : array_like of float, optional
        Standard errors of ``s``; without it the covariance is scaled by the
        residual variance.
    rules : VerdictRules
        ``min_points`` and ``min_curvature_snr`` (used as amplitude/stderr).

    Returns
    -------
    RingBatch

    Notes
    -----
    Verdicts: ``too_few_points`` (< 5 points), ``fit_failed`` (angles that do
    not determine a sinusoid), ``no_signal`` (amplitude/stderr below
    ``rules.min_curvature_snr``).
    """
    ph = _as_real(phi, "phi")
    sa = _as_real(s, "s")
    if ph.ndim == 0 or sa.ndim == 0:
        raise FitInputError("phi and s must have a points axis")
    if ph.shape[-1] != sa.shape[-1]:
        raise FitInputError(
            f"phi and s must have the same number of points, got {ph.shape[-1]} and {sa.shape[-1]}"
        )
    if sigma is not None:
        sg = _as_real(sigma, "sigma")
        if np.any(sg <= 0):
            raise FitInputError("sigma must be positive at every point")
        ph, sa, sg = _broadcast(phi=ph, s=sa, sigma=sg)
        w = 1 / sg**2
    else:
        ph, sa = _broadcast(phi=ph, s=sa)
        w = np.ones(sa.shape)
    shape, n = sa.shape[:-1], sa.shape[-1]
    dof = n - 3
    nan = np.full(shape, np.nan)
    keys = ("direction", "direction_stderr", "amplitude", "amplitude_stderr", "offset")
    if n < max(rules.min_points, 4):
        raw = {k: nan for k in keys + ("offset_stderr", "snr")}
        codes = np.full(shape, _CODE[RejectionReason.TOO_FEW_POINTS], dtype=np.int64)
        return RingBatch(shape, n, codes == 0, codes, nan, dof, raw)
    basis = np.stack([np.ones_like(ph), np.cos(ph), np.sin(ph)], axis=-1)
    coef, minv, chi2, singular = _batched_wls(basis, sa, w)
    if sigma is not None:
        cov = minv
        redchi = chi2 / dof
    else:
        cov = minv * (chi2 / dof)[..., None, None]
        redchi = nan
    a0, a1, a2 = coef[..., 0], coef[..., 1], coef[..., 2]
    with np.errstate(divide="ignore", invalid="ignore"):
        amp = np.hypot(a1, a2)
        c11, c12, c22 = cov[..., 1, 1], cov[..., 1, 2], cov[..., 2, 2]
        var_phi = (a2 * a2 * c11 - 2 * a1 * a2 * c12 + a1 * a1 * c22) / amp**4
        var_amp = (a1 * a1 * c11 + 2 * a1 * a2 * c12 + a2 * a2 * c22) / amp**2
        snr = amp / np.sqrt(var_amp)
    raw = {
        "direction": np.arctan2(-a2, -a1),
        "direction_stderr": np.sqrt(var_phi),
        "amplitude": amp,
        "amplitude_stderr": np.sqrt(var_amp),
        "offset": a0,
        "offset_stderr": np.sqrt(cov[..., 0, 0]),
        "snr": snr,
    }
    codes = np.select(
        [singular | ~np.isfinite(snr), ~(snr >= rules.min_curvature_snr)],
        [_CODE[RejectionReason.FIT_FAILED], _CODE[RejectionReason.NO_SIGNAL]],
        default=_CODE[RejectionReason.NONE],
    ).astype(np.int64)
    for v in raw.values():
        v.setflags(write=False)
    accepted = codes == _CODE[RejectionReason.NONE]
    return RingBatch(shape, n, accepted, codes, np.asarray(redchi, float), dof, raw)


# ---------------------------------------------------------------------------
# Nonlinear null models (shared with xtalkcal.design)
# ---------------------------------------------------------------------------


def null_signal(
    z: ArrayLike,
    z_star: complex,
    floor: float,
    curvature: float,
    *,
    amplitude: float | None = None,
    amplification: ArrayLike = 1,
) -> NDArray[np.float64]:
    """Mean error signal of the null model at amplitudes ``z``.

    ``amplitude=None`` gives the paraboloid ``S0 + K**2 kappa |z - z*|**2``;
    otherwise the saturating ``S0 + A sin(K sqrt(kappa/A) |z - z*|)**2``.

    Parameters
    ----------
    z : array_like of complex
        Cancellation-tone amplitudes (fraction of full scale).
    z_star : complex
        Null (fraction of full scale).
    floor : float
        ``S0`` (signal units).
    curvature : float
        ``kappa`` at amplification 1 (signal per full-scale fraction squared).
    amplitude : float, optional
        Fringe amplitude ``A`` (probability).
    amplification : int or array_like of int
        Error amplification ``K`` per point.
    """
    zz = np.asarray(z, dtype=complex)
    kk = np.broadcast_to(np.asarray(amplification, dtype=float), zz.shape)
    model: NullModel = "paraboloid" if amplitude is None else "saturating"
    p, _ = _null_signal_jacobian(
        zz.ravel(),
        kk.ravel(),
        z_star.real,
        z_star.imag,
        floor,
        curvature,
        math.nan if amplitude is None else amplitude,
        model,
    )
    return p.reshape(zz.shape)


def _null_signal_jacobian(
    z: NDArray[np.complex128],
    k: NDArray[np.float64],
    xs: float,
    ys: float,
    floor: float,
    kappa: float,
    amp: float,
    model: NullModel,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Mean signal and its Jacobian w.r.t. (x*, y*, S0, kappa[, A]).

    The Jacobian uses the sinc form so it stays exact at the null:
    ``dS/dx* = -2 K**2 kappa sinc(2u) (x - x*)``, ``dS/dkappa = K**2 r**2 sinc(2u)``,
    ``dS/dA = sin(u)**2 - u**2 sinc(2u)`` with ``u = K sqrt(kappa/A) r`` and
    ``sinc(t) = sin(t)/t``.
    """
    dx = z.real - xs
    dy = z.imag - ys
    r2 = dx * dx + dy * dy
    k2 = k * k
    if model == "paraboloid":
        p = floor + k2 * kappa * r2
        jac = np.stack([-2 * k2 * kappa * dx, -2 * k2 * kappa * dy, np.ones_like(r2), k2 * r2], -1)
        return p, jac
    q = math.sqrt(max(kappa, 0.0) / amp)
    u = k * q * np.sqrt(r2)
    sin_u = np.sin(u)
    sinc2u = np.sinc(2 * u / np.pi)  # numpy's sinc is sin(pi t)/(pi t)
    p = floor + amp * sin_u * sin_u
    jac = np.stack(
        [
            -2 * k2 * kappa * sinc2u * dx,
            -2 * k2 * kappa * sinc2u * dy,
            np.ones_like(r2),
            k2 * r2 * sinc2u,
            sin_u * sin_u - u * u * sinc2u,
        ],
        -1,
    )
    return p, jac


def _fisher_covariance(info: NDArray[np.float64], n_interest: int = 2) -> NDArray[np.float64]:
    """Covariance from a Fisher matrix, nuisance parameters marginalised.

    The interest block is the inverse of the Schur complement
    ``I_xx - I_xn pinv(I_nn) I_nx``; the pseudo-inverse lets a design that
    cannot separate some nuisance parameters (one ring centred on the null
    cannot tell S0 from kappa) still bound the null, as long as the null
    itself is identified. The full matrix returned has the interest block
    replaced accordingly; nuisance entries come from the pseudo-inverse.
    Returns all-inf when the interest block is not identified.
    """
    d = np.sqrt(np.clip(np.diag(info), 0, None))
    if not np.all(d[:n_interest] > 0):
        return np.full(info.shape, np.inf)
    d = np.where(d > 0, d, 1.0)
    im = info / np.outer(d, d)
    ixx = im[:n_interest, :n_interest]
    ixn = im[:n_interest, n_interest:]
    inn = im[n_interest:, n_interest:]
    inn_pinv = np.linalg.pinv(inn, rcond=1e-12, hermitian=True)
    schur = ixx - ixn @ inn_pinv @ ixn.T
    ev = np.linalg.eigvalsh(schur)
    if not ev[0] > 1e-12 * max(ev[-1], 1e-300):
        return np.full(info.shape, np.inf)
    cov = np.linalg.pinv(im, rcond=1e-12, hermitian=True)
    cov[:n_interest, :n_interest] = np.linalg.inv(schur)
    out: NDArray[np.float64] = cov / np.outer(d, d)
    return out


# ---------------------------------------------------------------------------
# Nonlinear fits with lmfit
# ---------------------------------------------------------------------------


@dataclass
class _Start:
    x: float
    y: float
    floor: float
    kappa: float  # normalised coordinates, amplification 1
    amp: float | None


def _start_from_initial(
    initial: NullEstimate | Mapping[str, Any],
    centre: complex,
    scale: float,
) -> _Start:
    if isinstance(initial, NullEstimate):
        v = initial.unchecked()
        zs, fl, ka, am = v.z_star, v.floor, v.curvature, v.amplitude
    elif isinstance(initial, Mapping):
        try:
            zs = complex(initial["z_star"])
            fl = float(initial["floor"])
            ka = float(initial["curvature"])
        except (KeyError, TypeError, ValueError) as err:
            raise FitInputError(
                "initial must be a NullEstimate or a mapping with keys "
                f"'z_star', 'floor', 'curvature' (optional 'amplitude'); got {dict(initial)!r}"
            ) from err
        am = initial.get("amplitude")
    else:
        raise FitInputError(
            f"initial must be a NullEstimate or a mapping, got {type(initial).__name__}"
        )
    zn = (zs - centre) / scale
    vals = [zn.real, zn.imag, fl, ka]
    if not all(math.isfinite(v) for v in vals):
        raise FitInputError("initial values must be finite")
    return _Start(zn.real, zn.imag, fl, ka * scale * scale, None if am is None else float(am))


def _default_start(
    zn: NDArray[np.complex128],
    s: NDArray[np.float64],
    sigma: NDArray[np.float64],
    k: NDArray[np.float64],
) -> _Start:
    """Starting values from per-amplification paraboloid fits, with fallbacks."""
    best: tuple[float, _Start] | None = None
    for kv in np.unique(k):
        sel = k == kv
        if np.count_nonzero(sel) < 5:
            continue
        raw, _, _, _ = _paraboloid_core(
            zn[sel][None, :], s[sel][None, :], 1 / sigma[sel][None, :] ** 2, True, DEFAULT_RULES
        )
        snr = float(raw["snr"][0])
        zs = complex(raw["z_star"][0])
        kap = float(raw["curvature"][0]) / (kv * kv)
        if not (math.isfinite(snr) and snr > 0 and abs(zs) < 4):
            continue
        cand = _Start(zs.real, zs.imag, float(raw["floor"][0]), kap, None)
        if best is None or snr > best[0]:
            best = (snr, cand)
    if best is not None:
        return best[1]
    # Fallback: the lowest point is near the null; curvature from the spread.
    i = int(np.argmin(s))
    z0 = zn[i]
    r2 = np.abs(zn - z0) ** 2
    kmax = float(np.max(k))
    spread = float(np.max(s) - np.min(s))
    kap = max(spread, 1e-3) / max(float(np.max(r2)), 1e-12) / (kmax * kmax)
    return _Start(z0.real, z0.imag, float(np.min(s)), kap, None)


@dataclass
class _LmfitOutcome:
    values: dict[str, float]
    success: bool
    objective: float  # -2 log-likelihood (up to a constant) or chi-square
    nfev: int


def _make_params(
    st: _Start, model: NullModel, bounded_floor: bool, hold_ceiling: bool = False
) -> lmfit.Parameters:
    lim = 5.0  # normalised units: 5 sweep radii from the centroid
    pars = lmfit.Parameters()
    pars.add("x", value=float(np.clip(st.x, -lim * 0.99, lim * 0.99)), min=-lim, max=lim)
    pars.add("y", value=float(np.clip(st.y, -lim * 0.99, lim * 0.99)), min=-lim, max=lim)
    if bounded_floor:
        pars.add("floor", value=float(np.clip(st.floor, 1e-6, 0.95)), min=0.0, max=1.0)
    else:
        pars.add("floor", value=float(st.floor))
    pars.add("kappa", value=float(max(st.kappa, 1e-6)), min=1e-12)
    if model == "saturating":
        amp = st.amp if st.amp is not None else 0.98 * (1 - st.floor)
        frac = amp / max(1 - pars["floor"].value, 1e-6)
        if hold_ceiling:
            pars.add("frac", value=1.0, vary=False)
        else:
            pars.add("frac", value=float(np.clip(frac, 1e-3, 1 - 1e-6)), min=1e-4, max=1.0)
    return pars


def _model_mean(zn: Any, k: Any, v: Mapping[str, float], model: NullModel) -> Any:
    amp = (1 - v["floor"]) * v["frac"] if model == "saturating" else math.nan
    p, _ = _null_signal_jacobian(zn, k, v["x"], v["y"], v["floor"], v["kappa"], amp, model)
    return p


def _lmfit_least_squares(residual: Any, pars: lmfit.Parameters) -> lmfit.minimizer.MinimizerResult:
    """lmfit's trust-region least squares (native bounds).

    lmfit always derives its own covariance after ``least_squares``; we do not
    use it (the covariance here is the Fisher one, with bounded parameters
    held), and its floating-point warnings on an ill-conditioned Jacobian --
    e.g. a parameter resting on a bound -- are silenced for that reason only.
    """
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return lmfit.minimize(residual, pars, method="least_squares")


def _binomial_irls(
    zn: NDArray[np.complex128],
    kc: NDArray[np.float64],
    n: NDArray[np.float64],
    ka: NDArray[np.float64],
    st: _Start,
    model: NullModel,
    max_iter: int = 8,
    hold_ceiling: bool = False,
) -> _LmfitOutcome:
    """Binomial maximum likelihood by iterated reweighting around lmfit.

    Each pass minimises ``sum w_i (k_i/n_i - p_i(theta))**2`` with weights
    ``w_i = n_i / (p~_i (1 - p~_i))`` frozen at the previous pass's model.
    At the fixed point the normal equations coincide with the binomial score
    equations, so the result is the maximum-likelihood estimate.
    """
    p_obs = kc / n
    pars = _make_params(st, model, bounded_floor=True, hold_ceiling=hold_ceiling)
    lo, hi = 0.5 / n, 1 - 0.5 / n
    p_prev = np.clip(_model_mean(zn, ka, pars.valuesdict(), model), lo, hi)
    sqrt_w = np.sqrt(n / (p_prev * (1 - p_prev)))

    def residual(params: lmfit.Parameters) -> NDArray[np.float64]:
        r: NDArray[np.float64] = (p_obs - _model_mean(zn, ka, params.valuesdict(), model)) * sqrt_w
        return r

    success = True
    nfev = 0
    for _ in range(max_iter):
        out = _lmfit_least_squares(residual, pars)
        nfev += int(out.nfev)
        success = bool(out.success)
        pars = out.params
        p_new = np.clip(_model_mean(zn, ka, pars.valuesdict(), model), lo, hi)
        # Converged when the weights no longer move on the scale of the noise.
        change = np.max(np.abs(p_new - p_prev) / np.sqrt(p_prev * (1 - p_prev) / n))
        p_prev = p_new
        sqrt_w[:] = np.sqrt(n / (p_new * (1 - p_new)))
        if change < 1e-3:
            break
    p_fit = np.clip(_model_mean(zn, ka, pars.valuesdict(), model), 1e-12, 1 - 1e-12)
    nll2 = -2.0 * float(np.sum(kc * np.log(p_fit) + (n - kc) * np.log1p(-p_fit)))
    return _LmfitOutcome(dict(pars.valuesdict()), success, nll2, nfev)


def _null_verdict(
    *,
    zn: NDArray[np.complex128],
    zs_n: complex,
    snr: float,
    chi2: float,
    dof: int,
    checks_mismatch: bool,
    u_min: float | None,
    floor: float | None,
    rules: VerdictRules,
) -> tuple[RejectionReason, str]:
    if floor is not None and floor >= rules.saturation_floor:
        return (
            RejectionReason.SATURATED,
            f"the fitted floor sits at {floor:.3f} >= {rules.saturation_floor:g}: the "
            "signal is pinned near its ceiling and no null is in view",
        )
    if not snr >= rules.min_curvature_snr:
        return (
            RejectionReason.NO_SIGNAL,
            f"curvature is not significantly positive (kappa/stderr = {snr:.2f}, "
            f"need >= {rules.min_curvature_snr:g})",
        )
    if u_min is not None and u_min > rules.saturation_phase:
        return (
            RejectionReason.SATURATED,
            f"the data never come near the floor: even the sweep point nearest the null "
            f"is {u_min:.2f} rad up the fringe (limit {rules.saturation_phase:.2f}), so the "
            "curvature is not identified",
        )
    if not bool(_region_ok(zn, np.asarray(zs_n), rules.region_margin)):
        return (
            RejectionReason.OUTSIDE_REGION,
            f"the fitted null lies outside the swept region ({abs(zs_n):.2f} sweep radii "
            "from the centroid)",
        )
    if checks_mismatch and dof > 0:
        pv = float(stats.chi2.sf(chi2, dof))
        if pv < rules.mismatch_pvalue:
            return (
                RejectionReason.MODEL_MISMATCH,
                f"the model does not describe the data (chi-square {chi2:.1f} on {dof} dof, "
                f"tail probability {pv:.2g})",
            )
    return RejectionReason.NONE, "accepted"


def _rejected(
    method: str,
    reason: RejectionReason,
    message: str,
    n_points: int,
    total_shots: int | None,
    dof: int,
    amplifications: tuple[int, ...],
) -> NullEstimate:
    return NullEstimate(
        method=method,
        verdict=Verdict.REJECTED,
        reason=reason,
        message=message,
        n_points=n_points,
        total_shots=total_shots,
        reduced_chi2=math.nan,
        dof=dof,
        amplifications=amplifications,
    )


def _amplification_array(amplification: ArrayLike, n: int) -> NDArray[np.float64]:
    ka = _as_real(amplification, "amplification")
    try:
        ka = np.broadcast_to(ka, (n,)).astype(float)
    except ValueError:
        raise FitInputError(
            f"amplification must be a scalar or one value per point ({n}), got shape {ka.shape}"
        ) from None
    if np.any(ka < 1) or np.any(ka != np.round(ka)):
        raise FitInputError("amplification must be a positive integer at every point")
    return ka


def fit_null(
    z: ArrayLike,
    counts: ArrayLike,
    shots: ArrayLike,
    *,
    model: NullModel = "saturating",
    initial: NullEstimate | Mapping[str, Any] | None = None,
    amplification: ArrayLike = 1,
    min_amplitude: float = 0.2,
    rules: VerdictRules = DEFAULT_RULES,
) -> NullEstimate:
    """Fit the nonlinear null model to binomial counts with lmfit.

    Models (``K`` the amplification of each point, ``r = |z - z*|``):

    ``"saturating"``
        ``S = S0 + A sin(K sqrt(kappa/A) r)**2`` -- the paraboloid near the
        null, saturating at ``S0 + A`` as a driven rotation does. Parameters
        ``x*, y*, S0 in [0, 1], kappa > 0`` and ``A = (1 - S0) f`` with
        ``f in (0, 1]`` (so the ceiling never exceeds 1).
    ``"paraboloid"``
        ``S = S0 + K**2 kappa r**2``.

    Data taken at several amplifications share ``z*``, ``S0`` and ``A``
    while the curvature scales as ``K**2`` (the aggressor's error amplitude
    adds coherently over ``K`` repetitions); the fit is joint over all points,
    so every shot informs every shared parameter and groups too weak to fit on
    their own still contribute.

    The fringe amplitude ``A`` is left free only when the data demand it:
    the saturating fit is also run with the ceiling held at 1 (``A = 1 - S0``,
    which is the paraboloid until the fringe top) and the free-``A`` result
    is kept only when it lowers ``-2 log L`` by more than 9 (a 3-sigma
    likelihood-ratio test for the one extra parameter). Data that stay in
    the quadratic region cannot tell ``A`` from ``kappa``; holding the ceiling
    keeps the curvature identified there.

    Weighting: binomial variance of the *model*, iterated -- each lmfit
    least-squares pass uses weights ``shots / (p (1 - p))`` from the previous
    pass's model until they stop moving; the fixed point is the binomial
    maximum-likelihood estimate. The covariance is the inverse expected
    Fisher information at the estimate (analytic Jacobian), with any
    parameter sitting on a bound held there (``S0 = 0``, or ``f = 1`` i.e.
    ``A = 1 - S0``; the latter is typical when the data stay in the quadratic
    region and leave ``A`` unidentified). The fit runs in centred, scaled
    coordinates; inputs are never modified.

    Parameters
    ----------
    z : array_like of complex, shape (n,)
        Cancellation-tone amplitudes (fraction of full scale).
    counts, shots : array_like of int, shape (n,)
        Signalling counts and shots per point (shots may be a scalar).
    model : {"saturating", "paraboloid"}
    initial : NullEstimate or mapping, optional
        Starting values (``z_star``, ``floor``, ``curvature`` at K = 1,
        optional ``amplitude``). Default: the linear paraboloid fit of the
        best-determined amplification group; for the saturating model two
        starts (ceiling near 1, and ceiling at the data maximum) are tried.
    amplification : int or array_like of int
        Error amplification ``K`` per point (default 1).
    min_amplitude : float
        Smallest fringe amplitude ``A`` a free-``A`` fit may report
        (probability). Driven rotations and leakage fringes reach nearly full
        contrast (a detuned drive flattens the quadratic rise rather than
        lowering the ceiling), so a free fit that lands on a small ``A`` is
        discarded in favour of the held ceiling.
    rules : VerdictRules

    Returns
    -------
    NullEstimate
        ``method`` is ``"lmfit_<model>_binomial"``; ``curvature`` at K = 1.

    Raises
    ------
    FitInputError
        Bad shapes, non-finite values, counts outside ``[0, shots]``, bad
        amplification or unknown model.

    Notes
    -----
    Verdict rules, first match wins: ``too_few_points`` (fewer than
    ``max(rules.min_points, n_parameters + 1)`` points); ``fit_failed``
    (optimizer failure, non-finite result, or a Fisher matrix that does not
    identify the null); ``saturated`` (fitted floor >= ``rules.saturation_floor``);
    ``no_signal`` (``kappa/stderr < 3``); ``saturated`` (saturating model:
    the nearest point is more than ``rules.saturation_phase`` up the fringe --
    the data never come near the floor); ``outside_region`` (as in
    :func:`fit_paraboloid`); ``model_mismatch`` (Pearson chi-square tail
    probability < ``rules.mismatch_pvalue``).
    """
    if model not in ("saturating", "paraboloid"):
        raise FitInputError(f"model must be 'saturating' or 'paraboloid', got {model!r}")
    if not 0 <= min_amplitude < 1:
        raise FitInputError(f"min_amplitude must be in [0, 1), got {min_amplitude!r}")
    za = _as_complex(z, "z")
    if za.ndim != 1:
        raise FitInputError(f"fit_null takes one sweep: z must be 1-D, got shape {za.shape}")
    kc, n = _counts_shots(counts, shots)
    try:
        kc = np.broadcast_to(kc, za.shape).astype(float)
        n = np.broadcast_to(n, za.shape).astype(float)
    except ValueError:
        raise FitInputError(
            f"counts and shots must match z's {za.size} points, got {kc.shape} and {n.shape}"
        ) from None
    ka = _amplification_array(amplification, za.size)
    amps = tuple(int(v) for v in np.unique(ka))
    method = f"lmfit_{model}_binomial"
    n_par = 5 if model == "saturating" else 4
    npts = za.size
    total = int(np.sum(n))
    dof = npts - n_par
    if npts < max(rules.min_points, n_par + 1):
        return _rejected(
            method,
            RejectionReason.TOO_FEW_POINTS,
            f"{npts} sweep points; the {model} model needs at least "
            f"{max(rules.min_points, n_par + 1)}",
            npts,
            total,
            dof,
            amps,
        )
    centre_a, scale_a, zn_a, degenerate = _normalise(za)
    centre, scale, zn = complex(centre_a), float(scale_a), zn_a
    if bool(degenerate):
        return _rejected(
            method, RejectionReason.FIT_FAILED, "all sweep points coincide", npts, total, dof, amps
        )
    p_obs, sig = binomial_signal(kc, n)
    if initial is not None:
        starts = [_start_from_initial(initial, centre, scale)]
    else:
        st = _default_start(zn, p_obs, sig, ka)
        starts = [st]
        if model == "saturating":
            top = float(np.max(p_obs)) - max(st.floor, 0.0)
            alt_amp = float(np.clip(top, 0.02, 0.999 * (1 - max(st.floor, 0.0))))
            starts.append(_Start(st.x, st.y, st.floor, st.kappa, alt_amp))

    def finite(o: _LmfitOutcome) -> bool:
        return all(math.isfinite(v) for v in o.values.values())

    free = [o for o in (_binomial_irls(zn, kc, n, ka, s, model) for s in starts) if finite(o)]
    candidates = free
    if model == "saturating":
        # A is free only when the data demand it. With the data in the
        # quadratic region, a small A trades against kappa on noise alone; the
        # fit with the ceiling held at 1 (A = 1 - S0) is then kept unless the
        # free fit beats it clearly (likelihood ratio, -2 log L lower by > 9).
        held = _binomial_irls(zn, kc, n, ka, starts[0], model, hold_ceiling=True)
        candidates = [held] if finite(held) else []
        # A fringe that tops out far below full contrast is not what a driven
        # rotation or leakage does; such a branch is a flat, noisy landscape
        # masquerading as a saturated one.
        free = [o for o in free if (1 - o.values["floor"]) * o.values["frac"] >= min_amplitude]
        if free:
            best_free = min(free, key=lambda o: o.objective)
            if not candidates or best_free.objective < held.objective - _BRANCH_PREFERENCE:
                candidates = [best_free]
    if not candidates:
        return _rejected(
            method,
            RejectionReason.FIT_FAILED,
            "the optimizer returned non-finite values",
            npts,
            total,
            dof,
            amps,
        )
    best = min(candidates, key=lambda o: o.objective)
    return _finish_binomial(best, zn, kc, n, ka, centre, scale, model, rules, method, amps)


def _finish_binomial(
    best: _LmfitOutcome,
    zn: NDArray[np.complex128],
    kc: NDArray[np.float64],
    n: NDArray[np.float64],
    ka: NDArray[np.float64],
    centre: complex,
    scale: float,
    model: NullModel,
    rules: VerdictRules,
    method: str,
    amps: tuple[int, ...],
) -> NullEstimate:
    v = best.values
    npts = zn.size
    total = int(np.sum(n))
    n_par = 5 if model == "saturating" else 4
    dof = npts - n_par
    floor = v["floor"]
    amp = (1 - floor) * v["frac"] if model == "saturating" else math.nan
    p, jac = _null_signal_jacobian(zn, ka, v["x"], v["y"], floor, v["kappa"], amp, model)
    pt = np.clip(p, 0.5 / n, 1 - 0.5 / n)
    w = n / (pt * (1 - pt))
    chi2 = float(np.sum((kc - n * p) ** 2 / (n * pt * (1 - pt))))

    # Free parameters for the covariance; those on a bound are held there.
    cols = [jac[:, 0], jac[:, 1]]
    names = ["x", "y"]
    floor_at_bound = floor <= 1e-9
    frac_at_bound = model == "saturating" and v["frac"] >= 1 - 1e-7
    if not floor_at_bound:
        # With A = 1 - S0 held, moving S0 also moves A by -1.
        cols.append(jac[:, 2] - (jac[:, 4] if frac_at_bound else 0.0))
        names.append("floor")
    cols.append(jac[:, 3])
    names.append("kappa")
    if model == "saturating" and not frac_at_bound:
        cols.append(jac[:, 4])
        names.append("amp")
    jf = np.stack(cols, axis=-1)
    info = jf.T @ (jf * w[:, None])
    cov = _fisher_covariance(info)
    if not np.all(np.isfinite(cov[:2, :2])):
        return _rejected(
            method,
            RejectionReason.FIT_FAILED,
            "the data do not identify the null (singular Fisher information)",
            npts,
            total,
            dof,
            amps,
        )
    se = {nm: math.sqrt(max(cov[i, i], 0.0)) for i, nm in enumerate(names)}
    floor_se = se.get("floor", math.nan)
    if model == "saturating":
        amp_se = se["amp"] if "amp" in se else math.nan
    kap_se = se["kappa"]
    snr = v["kappa"] / kap_se if kap_se > 0 else math.inf
    zs_n = complex(v["x"], v["y"])
    u_min = None
    if model == "saturating":
        q = math.sqrt(v["kappa"] / amp)
        u_min = float(np.min(ka * q * np.abs(zn - zs_n)))
    reason, message = (
        (RejectionReason.FIT_FAILED, "the optimizer did not converge")
        if not best.success
        else _null_verdict(
            zn=zn,
            zs_n=zs_n,
            snr=snr,
            chi2=chi2,
            dof=dof,
            checks_mismatch=True,
            u_min=u_min,
            floor=floor,
            rules=rules,
        )
    )
    values = NullFitValues(
        z_star=centre + scale * zs_n,
        covariance=cov[:2, :2] * scale * scale,
        floor=floor,
        floor_stderr=floor_se,
        curvature=v["kappa"] / scale**2,
        curvature_stderr=kap_se / scale**2,
        amplitude=amp if model == "saturating" else None,
        amplitude_stderr=amp_se if model == "saturating" else None,
    )
    return NullEstimate(
        method=method,
        verdict=Verdict.ACCEPTED if reason is RejectionReason.NONE else Verdict.REJECTED,
        reason=reason,
        message=message,
        n_points=npts,
        total_shots=total,
        reduced_chi2=chi2 / dof if dof > 0 else math.nan,
        dof=dof,
        amplifications=amps,
        _values=values,
    )


def fit_null_gaussian(
    z: ArrayLike,
    s: ArrayLike,
    sigma: ArrayLike,
    *,
    initial: NullEstimate | Mapping[str, Any] | None = None,
    rules: VerdictRules = DEFAULT_RULES,
) -> NullEstimate:
    """Fit the paraboloid ``S = S0 + kappa |z - z*|**2`` to Gaussian data with lmfit.

    For signals with a known standard error rather than counts -- the Stark
    phase of a quadrature Ramsey (rad). The signal must be oriented so the
    null is a *minimum* (the Stark probe multiplies by the sign of the
    detuning). Parameters ``x*, y*, S0`` (unbounded) and ``kappa > 0`` are fit
    directly, weighted by ``1/sigma**2``, with an absolute covariance (inverse
    Fisher information). Within the region where the paraboloid holds this is
    the same estimator as :func:`fit_paraboloid` with sigma, reparametrised,
    so the two agree; this variant gives the nonlinear machinery (starting
    values, bounds, a common result type) for the Gaussian case.

    Parameters
    ----------
    z : array_like of complex, shape (n,)
        Cancellation-tone amplitudes (fraction of full scale).
    s, sigma : array_like of float, shape (n,)
        Signal and its standard error (same units, e.g. rad).
    initial : NullEstimate or mapping, optional
        Starting values; default from :func:`fit_paraboloid`.
    rules : VerdictRules

    Notes
    -----
    Verdicts as :func:`fit_paraboloid` with sigma (no ``saturated``).
    """
    za = _as_complex(z, "z")
    if za.ndim != 1:
        raise FitInputError(f"fit_null_gaussian takes one sweep: z must be 1-D, got {za.shape}")
    sa = _as_real(s, "s")
    sg = _as_real(sigma, "sigma")
    try:
        sa = np.broadcast_to(sa, za.shape).astype(float)
        sg = np.broadcast_to(sg, za.shape).astype(float)
    except ValueError:
        raise FitInputError(
            f"s and sigma must match z's {za.size} points, got {sa.shape} and {sg.shape}"
        ) from None
    if np.any(sg <= 0):
        raise FitInputError("sigma must be positive at every point")
    method = "lmfit_paraboloid_gaussian"
    npts = za.size
    dof = npts - 4
    if npts < max(rules.min_points, 5):
        return _rejected(
            method,
            RejectionReason.TOO_FEW_POINTS,
            f"{npts} sweep points; the paraboloid needs at least {max(rules.min_points, 5)}",
            npts,
            None,
            dof,
            (1,),
        )
    centre_a, scale_a, zn, degenerate = _normalise(za)
    centre, scale = complex(centre_a), float(scale_a)
    if bool(degenerate):
        return _rejected(
            method, RejectionReason.FIT_FAILED, "all sweep points coincide", npts, None, dof, (1,)
        )
    ones = np.ones(npts)
    if initial is not None:
        st = _start_from_initial(initial, centre, scale)
    else:
        st = _default_start(zn, sa, sg, ones)
    pars = _make_params(st, "paraboloid", bounded_floor=False)
    inv_sig = 1 / sg

    def residual(params: lmfit.Parameters) -> NDArray[np.float64]:
        r: NDArray[np.float64] = (
            sa - _model_mean(zn, ones, params.valuesdict(), "paraboloid")
        ) * inv_sig
        return r

    out = _lmfit_least_squares(residual, pars)
    v = dict(out.params.valuesdict())
    if not all(math.isfinite(x) for x in v.values()):
        return _rejected(
            method,
            RejectionReason.FIT_FAILED,
            "the optimizer returned non-finite values",
            npts,
            None,
            dof,
            (1,),
        )
    p, jac = _null_signal_jacobian(
        zn, ones, v["x"], v["y"], v["floor"], v["kappa"], math.nan, "paraboloid"
    )
    chi2 = float(np.sum(((sa - p) * inv_sig) ** 2))
    info = jac.T @ (jac * (inv_sig**2)[:, None])
    cov = _fisher_covariance(info)
    if not np.all(np.isfinite(cov[:2, :2])):
        return _rejected(
            method,
            RejectionReason.FIT_FAILED,
            "the data do not identify the null",
            npts,
            None,
            dof,
            (1,),
        )
    kap_se = math.sqrt(max(cov[3, 3], 0.0))
    snr = v["kappa"] / kap_se if kap_se > 0 else math.inf
    zs_n = complex(v["x"], v["y"])
    if not out.success:
        reason, message = RejectionReason.FIT_FAILED, "the optimizer did not converge"
    else:
        reason, message = _null_verdict(
            zn=zn,
            zs_n=zs_n,
            snr=snr,
            chi2=chi2,
            dof=dof,
            checks_mismatch=True,
            u_min=None,
            floor=None,
            rules=rules,
        )
    values = NullFitValues(
        z_star=centre + scale * zs_n,
        covariance=cov[:2, :2] * scale * scale,
        floor=v["floor"],
        floor_stderr=math.sqrt(max(cov[2, 2], 0.0)),
        curvature=v["kappa"] / scale**2,
        curvature_stderr=kap_se / scale**2,
    )
    return NullEstimate(
        method=method,
        verdict=Verdict.ACCEPTED if reason is RejectionReason.NONE else Verdict.REJECTED,
        reason=reason,
        message=message,
        n_points=npts,
        total_shots=None,
        reduced_chi2=chi2 / dof if dof > 0 else math.nan,
        dof=dof,
        _values=values,
    )


# ----------------------------------------------------------------------------- column fits


@dataclass(frozen=True)
class ColumnNullFit:
    """Nulls of all victims of one aggressor from one column-parallel sweep.

    Attributes
    ----------
    estimates : tuple of NullEstimate
        Per victim: the null of the aggressor's leak alone (the other victims' tones
        modelled, not absorbed).
    couplings : ndarray (V, V + C) complex
        ``couplings[i, k]``: field at victim i from victim k's line relative to victim
        i's own line, at the sweep's frequency (the crosstalk element X_{i,k} at the
        aggressor's frequency); columns V.. are the signal-less ``tones``. NaN where not
        determined (diagonal, tones that did not vary, rejected fits).
    couplings_stderr : ndarray (V, V + C)
        sqrt of the trace of each coupling's 2×2 covariance.
    """

    estimates: tuple[NullEstimate, ...]
    couplings: NDArray[np.complex128]
    couplings_stderr: NDArray[np.float64]


def fit_paraboloid_column(
    z: ArrayLike,
    s: ArrayLike,
    sigma: ArrayLike,
    *,
    groups: ArrayLike | None = None,
    tones: ArrayLike | None = None,
    rules: VerdictRules = DEFAULT_RULES,
) -> ColumnNullFit:
    """Fit every victim's null of a column sweep, with the other victims' tones in the model.

    In a column-parallel sweep victim i's field is ``w_i ∝ z_i − a_i + Σ_k c_ik·z_k``:
    the other victims' cancellation tones leak onto it. Its signal near the null is
    ``S0 + κ|w_i|²``; expanding, and dropping the small ``|Σ c z|²`` term, gives a model
    linear in its coefficients::

        S = b0 + b1·x_i + b2·y_i + κ·|z_i|² + Σ_k [g_k·conj(z_i)·z_k + h_k·z_k]  (real parts)

    with ``a_i = −(b1 + i·b2)/(2κ)`` (the null of the aggressor's leak alone) and
    ``c_ik = conj-coefficient(g_k)/(2κ)`` (the coupling of line k at this frequency).
    Victims whose tone does not vary over the sweep are left out of the others' models
    (their constant leak shifts the null, as it will in use).

    Parameters
    ----------
    z, s, sigma : arrays (V, n)
        Cancellation-tone amplitudes, signals and their standard errors per victim.
    groups : int array (n,) or (V, n), optional
        Points with one label share an offset of their own (``b0`` per group, per
        victim): e.g. the batches of a Stark sweep, whose signals are all referred to one
        reference measurement per batch, so that the reference's error is common to the
        batch and must not be averaged as if it were independent per point. Default: one
        offset for all points.
    tones : complex array (C, n), optional
        Further cancellation tones that vary over the sweep on other lines but carry no
        signal of their own (e.g. the tones of victims nulled in another pass, which
        cannot be read out in this one): modelled in every victim's fit like the other
        victims' tones, so their couplings come out and their leak does not shift the
        nulls.
    rules : VerdictRules
        ``min_points`` (at least parameters + 1), ``min_curvature_snr`` and
        ``region_margin`` apply; ``mismatch_pvalue`` does not (the caller scales by the
        reduced chi-square).

    Returns
    -------
    ColumnNullFit
    """
    Z = np.atleast_2d(np.asarray(z, dtype=complex))
    S = np.atleast_2d(np.asarray(s, dtype=float))
    E = np.atleast_2d(np.asarray(sigma, dtype=float))
    if Z.shape != S.shape or Z.shape != E.shape:
        raise FitInputError(f"z, s and sigma must have one shape (V, n), got {Z.shape}, "
                            f"{S.shape}, {E.shape}")
    if not (np.all(np.isfinite(Z)) and np.all(np.isfinite(S)) and np.all(E > 0)):
        raise FitInputError("z and s must be finite and sigma positive")
    V, n = Z.shape
    if tones is not None:
        T = np.atleast_2d(np.asarray(tones, dtype=complex))
        if T.shape[1:] != (n,) or not np.all(np.isfinite(T)):
            raise FitInputError(f"tones must be finite, of shape (C, {n}), got {T.shape}")
        Z = np.vstack([Z, T])  # rows V.. are tones without a signal
    if groups is None:
        G = np.zeros((V, n), dtype=np.int64)
    else:
        G = np.asarray(groups)
        if G.ndim == 1:
            G = np.broadcast_to(G, (V, G.shape[0]))
        if G.shape != (V, n) or not np.issubdtype(G.dtype, np.integer):
            raise FitInputError(f"groups must be integer labels of shape ({n},) or ({V}, {n}),"
                                f" got {G.dtype} {G.shape}")
    W = Z.shape[0]
    coup = np.full((V, W), np.nan + 0j)
    coup_err = np.full((V, W), np.nan)
    out: list[NullEstimate] = []
    for i in range(V):
        # Points weighted down by more than 1e3 in sigma are left out of victim i's fit
        # (a caller's way of dropping them for one victim only).
        act = E[i] <= 1e3 * E[i].min()
        Zi = Z[:, act]
        varies = np.ptp(Zi.real, axis=1) + np.ptp(Zi.imag, axis=1) > 0
        gi = G[i, act]
        est, c_row, c_err = _column_victim(Zi, S[i, act], E[i, act], gi, i, varies, rules)
        # The dropped term κ|Σ c_k z_k|² is second order; subtract it with the first
        # estimates and refit once (it matters when shots are plentiful).
        if est.accepted:
            lead = np.nan_to_num(c_row) @ Zi
            est2, c2, e2 = _column_victim(Zi, S[i, act] - est.curvature * np.abs(lead) ** 2,
                                          E[i, act], gi, i, varies, rules)
            if est2.accepted:
                est, c_row, c_err = est2, c2, e2
        out.append(est)
        coup[i] = c_row
        coup_err[i] = c_err
    return ColumnNullFit(tuple(out), coup, coup_err)


def _column_victim(
    Z: NDArray[np.complex128],
    si: NDArray[np.float64],
    ei: NDArray[np.float64],
    gi: NDArray[np.int64],
    i: int,
    varies: NDArray[np.bool_],
    rules: VerdictRules,
) -> tuple[NullEstimate, NDArray[np.complex128], NDArray[np.float64]]:
    """One victim's column fit: (estimate, coupling row, coupling-stderr row)."""
    V, n = Z.shape
    zi = Z[i]
    coup = np.full(V, np.nan + 0j)
    coup_err = np.full(V, np.nan)
    others = [k for k in range(V) if k != i and varies[k]]
    # Coefficients: b1, b2, κ, then one offset per group, then 4 per other victim.
    labels = np.unique(gi)
    cols = [zi.real, zi.imag, np.abs(zi) ** 2] + [(gi == g).astype(float) for g in labels]
    first = 3 + len(labels)
    for k in others:
        prod = np.conj(zi) * Z[k]
        cols += [prod.real, prod.imag, Z[k].real, Z[k].imag]
    A = np.stack(cols, axis=1)
    p = A.shape[1]
    if n < max(rules.min_points, p + 1):
        return (_column_rejected(RejectionReason.TOO_FEW_POINTS,
                                 f"{n} points for {p} coefficients", n, n - p), coup, coup_err)
    w = 1.0 / ei
    Aw = A * w[:, None]
    normal = Aw.T @ Aw
    if not np.all(np.isfinite(normal)) or np.linalg.cond(normal) > 1e14:
        return (_column_rejected(RejectionReason.FIT_FAILED, "degenerate design", n, n - p),
                coup, coup_err)
    cov_b = np.linalg.inv(normal)
    b = cov_b @ (Aw.T @ (si * w))
    resid = (si - A @ b) * w
    dof = n - p
    chi2 = float(resid @ resid)
    kappa, sk = float(b[2]), float(math.sqrt(cov_b[2, 2]))
    if kappa <= 0 or kappa / sk < rules.min_curvature_snr:
        return (_column_rejected(RejectionReason.NO_SIGNAL,
                                 f"curvature {kappa:.3g} ± {sk:.2g} is not significantly "
                                 "positive", n, dof), coup, coup_err)
    a = complex(-b[0], -b[1]) / (2 * kappa)
    # Delta method for a = −(b1 + i b2)/(2κ).
    J = np.array([[-1 / (2 * kappa), 0.0, b[0] / (2 * kappa**2)],
                  [0.0, -1 / (2 * kappa), b[1] / (2 * kappa**2)]])
    sub = cov_b[:3, :3]
    cov_a = J @ sub @ J.T
    # The floor of the most recent group (the largest label): the offset now.
    off = first - 1
    centre = zi.mean()
    reach = float(np.abs(zi - centre).max())
    if abs(a - centre) > (1 + rules.region_margin) * reach:
        reason, msg = RejectionReason.OUTSIDE_REGION, "the null lies outside the swept points"
    else:
        reason, msg = RejectionReason.NONE, "accepted"
    values = NullFitValues(z_star=a, covariance=0.5 * (cov_a + cov_a.T),
                           floor=float(b[off] - kappa * abs(a) ** 2),
                           floor_stderr=float(math.sqrt(cov_b[off, off])), curvature=kappa,
                           curvature_stderr=sk)
    verdict = Verdict.ACCEPTED if reason is RejectionReason.NONE else Verdict.REJECTED
    est = NullEstimate(method="paraboloid-column", verdict=verdict, reason=reason, message=msg,
                       n_points=n, total_shots=None,
                       reduced_chi2=chi2 / dof if dof > 0 else math.nan, dof=dof,
                       _values=values)
    if verdict is Verdict.ACCEPTED:
        for j, k in enumerate(others):
            g = complex(b[first + 4 * j], b[first + 1 + 4 * j])
            # 2κ·Re(conj(z_i)·c·z_k) = 2κ[c_r·Re(conj z_i z_k) − c_i·Im(conj z_i z_k)]
            coup[k] = complex(g.real, -g.imag) / (2 * kappa)
            idx = [first + 4 * j, first + 1 + 4 * j]
            coup_err[k] = float(math.sqrt(np.trace(cov_b[np.ix_(idx, idx)])) / (2 * kappa))
    return est, coup, coup_err


def _column_rejected(reason: RejectionReason, message: str, n: int, dof: int) -> NullEstimate:
    return NullEstimate(method="paraboloid-column", verdict=Verdict.REJECTED, reason=reason,
                        message=message, n_points=n, total_shots=None, reduced_chi2=math.nan,
                        dof=dof)


def linearise_fringe(
    s: ArrayLike, sigma: ArrayLike, floor: ArrayLike, ceiling: float = 1.0
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Undo the saturation of a driven-rotation signal, so that a paraboloid fits it exactly.

    A rotation or leakage probe reads ``S = S0 + A sin²(u)`` with ``u ∝ K|w|`` (the
    ``"saturating"`` model of :func:`fit_null`, ``A = ceiling − S0``). Returned is
    ``S0 + A·arcsin(√((S − S0)/A))² = S0 + A·u²``, quadratic in the field at any
    height below the fringe top, with its standard error propagated
    (``dq/dS = arcsin(x)/(x√(1 − x²))``, ``x = √((S − S0)/A)``, → 1 near the floor).

    Why: fitted as they are, points high up the fringe of a ring that is off-centre
    pull the paraboloid's null towards the ring's centre (on the simulator: 15–18 % of
    the offset at a rise of 0.25–0.35, i.e. 3σ at a raised K). Points below the
    floor (noise) are mapped by the odd extension, points past the top are clipped.

    Parameters
    ----------
    s, sigma : array_like
        Signals (probabilities) and their standard errors.
    floor : array_like
        ``S0``, e.g. from a first paraboloid fit; broadcast against ``s``.
    ceiling : float
        ``S0 + A``; 1 holds the ceiling as :func:`fit_null` does by default.

    Returns
    -------
    q, q_sigma : ndarray
    """
    s_ = np.asarray(s, dtype=float)
    s0 = np.broadcast_to(np.asarray(floor, dtype=float), s_.shape)
    amp = np.maximum(ceiling - s0, 1e-9)
    x2 = np.clip((s_ - s0) / amp, -0.99, 0.99)
    x = np.sqrt(np.abs(x2))
    u = np.arcsin(x)
    q = s0 + np.sign(x2) * amp * u * u
    with np.errstate(invalid="ignore", divide="ignore"):
        slope = np.where(x > 1e-6, u / (x * np.sqrt(1 - x * x)), 1.0)
    return q, np.asarray(sigma, dtype=float) * slope
