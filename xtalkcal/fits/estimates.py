"""Estimate objects returned by the fits: one null (:class:`NullEstimate`), one ring
(:class:`RingEstimate`) and their batched forms, all immutable, with NaN where a value is not
defined.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, fields
from typing import TYPE_CHECKING, Any, Generic, TypeVar, overload

import numpy as np
from numpy.typing import NDArray

from xtalkcal.common import json_float, readonly
from xtalkcal.exceptions import FitInputError
from xtalkcal.fits.verdicts import (
    _REASONS,
    _SCHEMA_VERSION,
    DEFAULT_RULES,
    RejectedEstimateError,
    RejectionReason,
    Verdict,
    VerdictRules,
    _verdict_for,
)


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
        object.__setattr__(self, "covariance", readonly(self.covariance))

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


@dataclass(frozen=True, eq=False, repr=False)
class _Guarded(Generic[_V]):
    """The fields every estimate starts with, and the shared rule: the numbers of a rejected
    estimate are not handed out. Each estimate adds its own ``_values`` (a field with a default).
    """

    method: str
    verdict: Verdict
    reason: RejectionReason
    message: str
    n_points: int
    total_shots: int | None
    reduced_chi2: float
    dof: int
    if TYPE_CHECKING:
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

    def _record_head(self, kind: str) -> dict[str, Any]:
        """The first keys of :meth:`to_dict`, common to every estimate, valid or not."""
        return {
            "format": kind,
            "version": _SCHEMA_VERSION,
            "method": self.method,
            "verdict": self.verdict.value,
            "reason": self.reason.value,
            "message": self.message,
            "n_points": int(self.n_points),
            "total_shots": None if self.total_shots is None else int(self.total_shots),
            "reduced_chi2": json_float(self.reduced_chi2),
            "dof": int(self.dof),
        }


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
        d = self._record_head("xtalkcal-null-estimate")
        d["amplifications"] = [int(k) for k in self.amplifications]
        if self.accepted:
            v = self._values
            d.update(
                z_star=[float(v.z_star.real), float(v.z_star.imag)],
                covariance=[[float(c) for c in row] for row in v.covariance],
                floor=json_float(v.floor),
                floor_stderr=json_float(v.floor_stderr),
                curvature=json_float(v.curvature),
                curvature_stderr=json_float(v.curvature_stderr),
                amplitude=json_float(v.amplitude),
                amplitude_stderr=json_float(v.amplitude_stderr),
            )
        return d

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> NullEstimate:
        """Rebuild an estimate from :meth:`to_dict` output."""
        # Records written before the one format naming carry "schema": "xtalkcal.null_estimate".
        kind = d.get("format", {"xtalkcal.null_estimate": "xtalkcal-null-estimate"}.get(
            str(d.get("schema")), d.get("schema")))
        if kind != "xtalkcal-null-estimate":
            raise FitInputError(
                f"not a null-estimate record: format={kind!r}, "
                "expected 'xtalkcal-null-estimate'"
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
_RING_KEYS = tuple(f.name for f in fields(RingValues))


@dataclass(frozen=True, eq=False, repr=False)
class RingEstimate(_Guarded[RingValues]):
    """Direction of the null seen from a ring's centre, with a verdict.

    Same rule as :class:`NullEstimate`: values raise when rejected.
    """

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
        d = self._record_head("xtalkcal-ring-estimate")
        if self.accepted:
            v = self._values
            d.update({k: json_float(getattr(v, k)) for k in _RING_KEYS})
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


_E = TypeVar("_E", "NullEstimate", "RingEstimate")


class _Batch:
    """Shared by the batch results: reasons, and one member's estimate."""

    n_points: int
    reason_codes: NDArray[np.int64]
    reduced_chi2: NDArray[np.float64]
    dof: int

    def reasons(self) -> NDArray[np.object_]:
        """Array of :class:`RejectionReason` with the batch shape."""
        return np.asarray(_REASONS, dtype=object)[self.reason_codes]

    def _member(self, index: int | tuple[int, ...]) -> tuple[tuple[Any, ...], RejectionReason]:
        """Index tuple and rejection reason of one member of the batch."""
        idx = np.index_exp[index] if not isinstance(index, tuple) else index
        return idx, _REASONS[int(self.reason_codes[idx])]

    def _member_estimate(
        self,
        cls: type[_E],
        idx: tuple[Any, ...],
        reason: RejectionReason,
        message: str,
        method: str,
        total_shots: int | None,
        values: Any,
    ) -> _E:
        """The estimate of member ``idx`` with its verdict, message and values."""
        return cls(
            method=method,
            verdict=_verdict_for(reason),
            reason=reason,
            message=message,
            n_points=self.n_points,
            total_shots=total_shots,
            reduced_chi2=float(self.reduced_chi2[idx]),
            dof=self.dof,
            _values=values,
        )


@dataclass(frozen=True, eq=False)
class ParaboloidBatch(_Batch):
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
        idx, reason = self._member(index)
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
        return self._member_estimate(NullEstimate, idx, reason, msg, self.method, shots, values)


@dataclass(frozen=True, eq=False)
class RingBatch(_Batch):
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

    def unchecked(self, name: str) -> NDArray[Any]:
        """Raw fitted array regardless of verdicts -- diagnostics only."""
        return self._raw[name]

    def estimate(self, index: int | tuple[int, ...] = ()) -> RingEstimate:
        """The :class:`RingEstimate` of one ring of the batch."""
        idx, reason = self._member(index)
        r = self._raw
        vals = RingValues(*(float(r[k][idx]) for k in _RING_KEYS))
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
        method = "ring_harmonic_wls"
        return self._member_estimate(RingEstimate, idx, reason, msg, method, None, vals)


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
