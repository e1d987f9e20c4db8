"""Protocol planning by the Cramér–Rao bound of the model each fitting command fits.

Before a scan, the precision a protocol can give is set by the Fisher
information of the fitted model: with Gaussian noise of standard deviation
``sigma`` on every sample and ``J`` the derivatives of the samples with respect
to all free parameters,

.. math:: F = J J^{\\mathsf T} / \\sigma^2, \\qquad
          \\mathrm{sd}(\\hat T) \\ge \\sqrt{[F^{-1}]_{TT}}

(the Cramér–Rao lower bound; Kay, *Fundamentals of Statistical Signal
Processing: Estimation Theory*, 1993). An efficient estimator -- least squares
at high SNR -- reaches it, so ``sqrt([F^-1]_TT) / T`` is the coefficient of
variation (CV) the protocol will give. The models are exactly those the
fitting commands fit, with every parameter free:

* ``ir`` (``qmap t1-ir``): truth ``S = M0 (1 - 2 exp(-TI/T1) + exp(-TR/T1))``
  (perfect inversion, TR = time between inversions), fitted as
  ``a + b exp(-TI/T1)`` with ``a``, ``b``, ``T1`` free. Without ``tr`` full
  recovery is assumed (``exp(-TR/T1) = 0``). At high SNR the magnitude fit
  with polarity restoration has the same bound as the signed fit.
* ``vfa`` (``qmap t1-vfa``): spoiled gradient echo
  ``S = M0 sin a (1 - E1) / (1 - E1 cos a)``, ``E1 = exp(-TR/T1)``, with
  ``M0`` and ``T1`` free (Deoni, Rutt & Peters, Magn Reson Med 2003;49:515).
* ``t2`` / ``t2star`` (``qmap t2`` / ``qmap t2star``): ``S = M0 exp(-TE/T)``
  with ``M0`` and ``T`` free.

The noise sd is ``M0 / snr`` on every sample (``M0 = 1``).

The design minimises the largest CV over the range of relaxation times the
protocol must serve (evaluated on a log-spaced grid of :data:`RANGE_POINTS`
values): a minimax problem, multi-modal in the sample positions, where
repeated samples can be optimal. It is solved globally and deterministically:
a fixed scrambled-Sobol set of starts (seed 0) plus the evenly and
log-spaced protocols is scored, and the best :data:`N_LOCAL` starts are
refined by sequential quadratic programming on the epigraph form
(minimise ``t`` subject to ``log CV(T_r) <= t`` for every grid value
``T_r``). ``t2`` designs a uniform echo train: the echo spacing ``ESP`` is
chosen (a dense one-dimensional search, then golden-section refinement)
with the echo count ``min(samples, floor(HI / ESP))``, because more echoes
never lose precision.

Two-angle VFA check (Deoni et al. 2003; Schabel & Morrell, Phys Med Biol
2009;54:N1): the optimal pair gives signals at ``1/sqrt(2)`` of the signal
at the Ernst angle -- for TR 15 ms and T1 1 s about 4.11 and 23.62 degrees.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .errors import InputError
from .models import build_model

__all__ = ["METHODS", "PlanResult", "cv_table", "default_limits", "plan", "predicted_cv"]

#: methods that can be planned (the fitting command each one matches)
METHODS = ("ir", "vfa", "t2", "t2star")
#: relaxation times at which the worst CV over the range is evaluated
RANGE_POINTS = 25
#: quasi-random starts scored before the local refinement
N_STARTS = 256
#: best starts refined locally
N_LOCAL = 6
#: log10 of the CV given to protocols whose Fisher information is singular
_LOG_CV_CAP = 6.0


@dataclass(frozen=True)
class _Method:
    key: str  # BIDS key of the designed samples
    unit: str  # "s" or "deg"
    parameter: str  # T1, T2, T2star
    command: str  # the fitting command
    n_params: int
    min_samples: int
    default_samples: int


_METHODS = {
    "ir": _Method("InversionTime", "s", "T1", "t1-ir", 3, 3, 5),
    "vfa": _Method("FlipAngle", "deg", "T1", "t1-vfa", 2, 2, 2),
    "t2": _Method("EchoTime", "s", "T2", "t2", 2, 2, 32),
    "t2star": _Method("EchoTime", "s", "T2star", "t2star", 2, 2, 8),
}


@dataclass
class PlanResult:
    """A designed (or evaluated) protocol and its predicted precision.

    Attributes
    ----------
    method : str
        ``ir``, ``vfa``, ``t2`` or ``t2star``.
    protocol : dict
        BIDS key -> list of values (seconds / degrees): the samples
        (``InversionTime``, ``FlipAngle`` or ``EchoTime``) and, where it
        matters, ``RepetitionTime``.
    objective : float
        The largest CV of the relaxation time over the range (the quantity
        minimised).
    predicted : list of dict
        Rows ``{"value_s", "cv", "cv_evenly_spread"}`` over the range.
    reference : dict
        The evenly spread protocol with the same number of samples, and its
        worst CV.
    settings : dict
        Range, limits, SNR, samples, TR and whether the protocol was designed
        or evaluated.
    simulation : list of dict or None
        With ``simulate``: the spread of qmap's own fits on simulated data of
        the protocol beside the predicted CV.
    """

    method: str
    protocol: dict
    objective: float
    predicted: list
    reference: dict
    settings: dict
    simulation: list | None = None
    notes: list = field(default_factory=list)

    @property
    def samples(self) -> np.ndarray:
        return np.asarray(self.protocol[_METHODS[self.method].key], float)

    @property
    def gain(self) -> float:
        """Worst CV of the evenly spread protocol divided by the design's."""
        return float(self.reference["objective"] / self.objective)

    def as_dict(self) -> dict:
        """The content of ``plan.json``."""
        spec = _METHODS[self.method]
        out = {
            "method": self.method,
            "protocol": self.protocol,
            "objective": self.objective,
            "objective_description": f"largest coefficient of variation sd({spec.parameter})/{spec.parameter} over "
                                     f"the range (Cramer-Rao bound, noise sd = M0/snr)",
            "predicted": self.predicted,
            "evenly_spread": self.reference,
            "gain_over_evenly_spread": self.gain,
            "settings": self.settings,
        }
        if self.simulation is not None:
            out["simulation"] = self.simulation
        return out

    def table(self) -> str:
        """The protocol and the predicted CVs as printable text."""
        spec = _METHODS[self.method]
        unit = "deg" if spec.unit == "deg" else "ms"
        f = 1.0 if spec.unit == "deg" else 1e3
        vals = ", ".join(f"{v * f:.4g}" for v in self.samples)
        head = "evaluated" if self.settings["evaluated"] else "designed"
        lines = [f"{head} protocol for qmap {spec.command} ({len(self.samples)} samples, SNR {self.settings['snr']:g}):",
                 f"  {spec.key}: {vals} {unit}"]
        if "RepetitionTime" in self.protocol:
            lines.append(f"  RepetitionTime: {self.protocol['RepetitionTime'][0] * 1e3:.4g} ms")
        lines.append(f"  worst CV of {spec.parameter} over the range: {100 * self.objective:.3g} %  "
                     f"(evenly spread {len(self.reference['samples'])} samples: "
                     f"{100 * self.reference['objective']:.3g} %, gain x{self.gain:.2f})")
        sim = {round(r["value_s"], 12): r for r in (self.simulation or [])}
        header = f"  {spec.parameter + ' (ms)':>12}  {'CV design':>10}  {'CV evenly':>10}"
        if sim:
            header += f"  {'CV simulated':>12}"
        lines.append(header)
        for r in self.predicted:
            line = f"  {r['value_s'] * 1e3:12.4g}  {100 * r['cv']:9.3g}%  {100 * r['cv_evenly_spread']:9.3g}%"
            s = sim.get(round(r["value_s"], 12))
            if s is not None:
                line += f"  {100 * s['cv_simulated']:11.3g}%"
            lines.append(line)
        lines.extend(f"  note: {n}" for n in self.notes)
        return "\n".join(lines)


# ----------------------------------------------------------------------------- the bound
def _truth_and_model(method: str, x: np.ndarray, values: np.ndarray, tr: float | None):
    """The fitted model at samples ``x`` and the true parameters (R, P) for relaxation times ``values``.

    The model is the one the method's fitting command fits by default (the model registry's choice):
    inversion recovery (as phase-sensitive real data, the best case), spoiled gradient echo, the
    mono-exponential decay (T2 or T2*).
    """
    values = np.asarray(values, float)
    one = np.ones_like(values)
    if method == "vfa" and tr is None:
        raise ValueError("the VFA model needs the repetition time tr (s)")
    model, _ = build_model(_METHODS[method].command, None, x, signal="real", tr=None if tr is None else float(tr))
    if method == "ir":
        recovery = np.zeros_like(values) if tr is None else np.exp(-tr / values)
        return model, np.stack([1.0 + recovery, -2.0 * one, values], axis=1)
    return model, np.stack([one, values], axis=1)


def predicted_cv(method: str, samples, values, *, snr: float, tr: float | None = None) -> np.ndarray:
    """Cramér–Rao coefficient of variation of the relaxation time.

    Parameters
    ----------
    method : {"ir", "vfa", "t2", "t2star"}
    samples : (m,) array_like
        Inversion times (s), flip angles (deg) or echo times (s).
    values : (R,) array_like
        Relaxation times T1 / T2 / T2* (s) at which to evaluate.
    snr : float
        ``M0 / sigma``.
    tr : float, optional
        Repetition time (s): time between inversions for ``ir`` (default: full
        recovery), the spoiled-GRE TR for ``vfa`` (required).

    Returns
    -------
    (R,) ndarray
        ``sqrt([F^-1]_TT) / T``; ``inf`` where the protocol cannot determine
        all parameters (singular Fisher information).

    Examples
    --------
    >>> # by hand: J^T J = [[0.5215, 17.79], [17.79, 751.1]] (M0 = 1), sd(T2*) = 0.01 sqrt(0.5215 / 75.2) s
    >>> round(float(predicted_cv("t2star", [0.01, 0.02, 0.04], [0.02], snr=100)[0]), 4)
    0.0416
    """
    x = np.asarray(samples, float).ravel()
    values = np.atleast_1d(np.asarray(values, float))
    model, params = _truth_and_model(method, x, values, tr)
    _, jac = model.signal_jacobian(params)  # (R, P, m)
    fisher = np.einsum("rpm,rqm->rpq", jac, jac) * snr**2  # sigma = M0 / snr with M0 = 1
    d = np.sqrt(np.einsum("rpp->rp", fisher))
    with np.errstate(divide="ignore", invalid="ignore"):
        corr = fisher / (d[:, :, None] * d[:, None, :])  # unit diagonal: conditioning independent of units
    good = np.all(np.isfinite(corr), axis=(1, 2)) & (np.abs(np.linalg.det(np.where(np.isfinite(corr), corr, 0.0)))
                                                     > 1e-13)
    cv = np.full(values.shape, np.inf)
    if good.any():
        inv = np.linalg.inv(corr[good])
        k = params.shape[1] - 1  # the relaxation time is the last parameter of every model
        var = inv[:, k, k] / d[good, k] ** 2
        cv[good] = np.sqrt(np.maximum(var, 0.0)) / values[good]
    return cv


def _range_grid(lo: float, hi: float) -> np.ndarray:
    return np.array([lo]) if hi <= lo * (1 + 1e-12) else np.geomspace(lo, hi, RANGE_POINTS)


def _report_values(lo: float, hi: float) -> np.ndarray:
    """The relaxation times of the printed table: 9 over a range, 5 around a single value."""
    if hi <= lo * (1 + 1e-12):
        return lo * np.array([0.5, 1 / math.sqrt(2), 1.0, math.sqrt(2), 2.0])
    return np.geomspace(lo, hi, 9)


def cv_table(result_or_method, samples=None, values=None, *, snr=None, tr=None) -> list[dict]:
    """Rows ``{"value_s", "cv"}`` for a protocol (helper for reports and tests)."""
    if isinstance(result_or_method, PlanResult):
        r = result_or_method
        return [{"value_s": row["value_s"], "cv": row["cv"]} for row in r.predicted]
    cv = predicted_cv(result_or_method, samples, values, snr=snr, tr=tr)
    return [{"value_s": float(v), "cv": float(c)} for v, c in zip(np.atleast_1d(values), cv, strict=True)]


# ----------------------------------------------------------------------------- checks and defaults
def default_limits(method: str, value_range: tuple[float, float], tr: float | None) -> tuple[float, float]:
    """Sample limits used when none are given (seconds, or degrees for ``vfa``).

    ``ir``: 10 ms to the smaller of 5 x the longest T1 and TR; ``vfa``: 1-90
    degrees; ``t2``: 5 ms (shortest echo spacing) to 4 x the longest T2;
    ``t2star``: 2 ms to 4 x the longest T2*.
    """
    hi = value_range[1]
    if method == "ir":
        top = 5.0 * hi if tr is None else min(5.0 * hi, tr)
        return 0.01, top
    if method == "vfa":
        return 1.0, 90.0
    if method == "t2":
        return 0.005, 4.0 * hi
    return 0.002, 4.0 * hi


def _check(method, value_range, samples, limits, snr, tr, evaluate):
    if method not in METHODS:
        raise InputError(f"plan: unknown method {method!r}; choose one of {', '.join(METHODS)}")
    spec = _METHODS[method]
    lo, hi = value_range
    if not (np.isfinite(lo) and np.isfinite(hi) and lo > 0 and hi >= lo):
        raise InputError(f"value_range={lo:g},{hi:g}: give one positive {spec.parameter} or LO,HI with LO <= HI "
                         f"(seconds, or with a unit: 300ms,2s)")
    if not (np.isfinite(snr) and snr > 0):
        raise InputError(f"snr={snr:g}: give the signal-to-noise ratio M0/sigma, a positive number such as 50")
    if samples < spec.min_samples:
        raise InputError(f"samples={samples}: the {method} model has {spec.n_params} free parameters, so it "
                         f"needs at least {spec.min_samples} samples; give samples={spec.min_samples} or more")
    if samples > 256:
        raise InputError(f"samples={samples}: at most 256 samples can be planned")
    if method == "vfa" and tr is None:
        raise InputError("the vfa plan needs the repetition time: give tr=TR in seconds, e.g. tr=0.015")
    if tr is not None and not (np.isfinite(tr) and tr > 0):
        raise InputError(f"tr={tr:g}: must be a positive time")
    llo, lhi = limits
    if not (np.isfinite(llo) and np.isfinite(lhi) and 0 < llo < lhi):
        raise InputError(f"limits={llo:g},{lhi:g}: give LO,HI with 0 < LO < HI")
    if method == "vfa":
        if lhi > 180:
            raise InputError(f"limits={llo:g},{lhi:g}: flip angles are degrees between 0 and 180")
    else:
        if hi < llo:
            raise InputError(f"value_range up to {hi:g}s lies below the sample limits {llo:g}-{lhi:g}s: every "
                             f"{spec.parameter} in the range is shorter than the earliest sample; lower limits=")
        if lo > lhi:
            raise InputError(f"value_range from {lo:g}s lies above the sample limits {llo:g}-{lhi:g}s: every "
                             f"{spec.parameter} in the range is longer than the latest sample; raise limits=")
    if method == "ir" and tr is not None and lhi > tr * (1 + 1e-9):
        raise InputError(f"tr={tr:g}s is shorter than the largest inversion time allowed ({lhi:g}s): TR is the "
                         f"time between inversions and must exceed every TI; lower limits= or check tr=")
    if method == "t2" and lhi < 2 * llo:
        raise InputError(f"limits={llo:g},{lhi:g}: a t2 echo train needs room for at least 2 echoes "
                         f"(HI >= 2 x LO, LO being the shortest echo spacing)")
    if evaluate is not None:
        ev = np.asarray(evaluate, float)
        if ev.size < spec.min_samples:
            raise InputError(f"evaluate=: the {method} model has {spec.n_params} free parameters; give at least "
                             f"{spec.min_samples} values")
        if not np.all(np.isfinite(ev)) or np.any(ev <= 0):
            raise InputError("evaluate=: every value must be positive")
        if method == "vfa" and np.any(ev > 180):
            raise InputError("evaluate=: flip angles are degrees between 0 and 180")
        if method == "ir" and tr is not None and ev.max() > tr:
            raise InputError(f"tr={tr:g}s is shorter than the largest inversion time {ev.max():g}s; TR is the time "
                             f"between inversions and must exceed every TI")


# ----------------------------------------------------------------------------- optimisation
class _Objective:
    """log10 of the worst CV over the range grid, as a function of the unit-cube design variables."""

    def __init__(self, method, limits, grid, snr, tr):
        self.method, self.grid, self.snr, self.tr = method, grid, snr, tr
        self.lo, self.hi = limits
        self.log = _METHODS[method].unit == "s"

    def samples(self, u) -> np.ndarray:
        u = np.clip(np.asarray(u, float), 0.0, 1.0)
        if self.log:
            return np.sort(self.lo * (self.hi / self.lo) ** u)
        return np.sort(self.lo + (self.hi - self.lo) * u)

    def log_cv(self, u) -> np.ndarray:
        cv = predicted_cv(self.method, self.samples(u), self.grid, snr=self.snr, tr=self.tr)
        with np.errstate(divide="ignore"):
            return np.minimum(np.log10(cv), _LOG_CV_CAP)

    def __call__(self, u) -> float:
        return float(np.max(self.log_cv(u)))


def _sobol(n_points: int, dim: int) -> np.ndarray:
    from scipy.stats import qmc  # imported here: scipy.stats is slow to import

    return qmc.Sobol(d=dim, scramble=True, seed=0).random(n_points)


def _design_free(obj: _Objective, n: int) -> np.ndarray:
    """Global minimax design of ``n`` free samples (see the module docstring)."""
    from scipy.optimize import minimize

    even = np.linspace(0.0, 1.0, n)
    lin = (np.linspace(obj.lo, obj.hi, n) - obj.lo) / (obj.hi - obj.lo)
    starts = np.vstack([even, np.log(np.linspace(obj.lo, obj.hi, n) / obj.lo) / np.log(obj.hi / obj.lo)
                        if obj.log else lin, np.sort(_sobol(N_STARTS, n), axis=1)])
    scores = np.array([obj(u) for u in starts])
    order = np.argsort(scores, kind="stable")
    chosen: list[np.ndarray] = []
    for i in order:  # the best distinct starts
        if all(np.max(np.abs(starts[i] - c)) > 0.02 for c in chosen):
            chosen.append(starts[i])
        if len(chosen) == N_LOCAL:
            break
    best_u, best = starts[order[0]], float(scores[order[0]])
    for u0 in chosen:
        z0 = np.append(u0, obj(u0))
        res = minimize(
            lambda z: z[-1], z0, method="SLSQP",
            jac=lambda z: np.append(np.zeros(n), 1.0),
            constraints=[{"type": "ineq", "fun": lambda z: z[-1] - obj.log_cv(z[:-1])}],
            bounds=[(0.0, 1.0)] * n + [(None, None)],
            options={"maxiter": 200, "ftol": 1e-10},
        )
        for cand in (res.x[:-1], u0):
            score = obj(cand)
            if score < best - 1e-12:
                best_u, best = np.clip(cand, 0, 1), score
    return _merge_repeats(obj.samples(best_u), obj.lo, obj.hi, obj.log)


def _merge_repeats(x: np.ndarray, lo: float, hi: float, log: bool) -> np.ndarray:
    """Samples closer than 1e-4 of the limits' span (log span for times) become one repeated value."""
    u = np.log(x / lo) / np.log(hi / lo) if log else (x - lo) / (hi - lo)
    out = np.sort(x).copy()
    order = np.argsort(u)
    u = u[order]
    start = 0
    for k in range(1, len(u) + 1):
        if k == len(u) or u[k] - u[k - 1] > 1e-4:
            out[start:k] = np.exp(np.mean(np.log(out[start:k]))) if log else np.mean(out[start:k])
            start = k
    return out


def _train(esp: float, n_max: int, hi: float) -> np.ndarray:
    n = int(min(n_max, math.floor(hi / esp * (1 + 1e-9))))
    return esp * np.arange(1, n + 1)


def _design_train(method, limits, grid, snr, n_max) -> np.ndarray:
    """Uniform echo train: the echo spacing by a dense log search, then golden-section refinement."""
    lo, hi = limits
    top = hi / 2.0  # at least two echoes

    def score(esp: float) -> float:
        cv = predicted_cv(method, _train(esp, n_max, hi), grid, snr=snr)
        return float(np.max(cv))

    cands = np.geomspace(lo, top, 400)
    vals = np.array([score(e) for e in cands])
    i = int(np.argmin(vals))
    a, b = cands[max(i - 1, 0)], cands[min(i + 1, len(cands) - 1)]
    g = (math.sqrt(5.0) - 1.0) / 2.0
    best_esp, best = cands[i], vals[i]
    c, d = b - g * (b - a), a + g * (b - a)
    fc, fd = score(c), score(d)
    for _ in range(60):
        if fc < fd:
            b, d, fd = d, c, fc
            c = b - g * (b - a)
            fc = score(c)
        else:
            a, c, fc = c, d, fd
            d = a + g * (b - a)
            fd = score(d)
    for e, f in ((c, fc), (d, fd)):
        if f < best:
            best_esp, best = e, f
    return _train(best_esp, n_max, hi)


def _evenly_spread(method: str, n: int, limits) -> np.ndarray:
    lo, hi = limits
    if method == "t2":
        return _train(hi / n, n, hi) if hi / n >= lo else _train(lo, n, hi)
    return np.linspace(lo, hi, n)


# ----------------------------------------------------------------------------- front end
def plan(
    method: str,
    value_range,
    *,
    samples: int | None = None,
    snr: float = 50.0,
    tr: float | None = None,
    limits=None,
    evaluate=None,
    simulate: int = 0,
    seed: int = 0,
) -> PlanResult:
    """Design (or evaluate) a relaxometry protocol by the Cramér–Rao bound.

    Parameters
    ----------
    method : {"ir", "vfa", "t2", "t2star"}
        The fitting command the protocol is for.
    value_range : float or (float, float)
        The T1 (T2, T2*) range the protocol must serve, seconds.
    samples : int, optional
        Number of samples (defaults: ir 5, vfa 2, t2 32 = the largest echo
        count, t2star 8).
    snr : float
        ``M0 / sigma``: Gaussian noise of sd ``M0/snr`` on every sample.
    tr : float, optional
        Repetition time, seconds (``ir``: between inversions, default full
        recovery; ``vfa``: required; ignored for ``t2`` / ``t2star``).
    limits : (float, float), optional
        Where samples may lie: seconds (``t2``: LO is the shortest echo
        spacing, HI the latest echo) or degrees (``vfa``); defaults in
        :func:`default_limits`.
    evaluate : (m,) array_like, optional
        Evaluate this protocol instead of designing one.
    simulate : int
        When > 0, fit this many simulated voxels per table row with qmap's own
        solver and report their spread (robust sd / T) beside the bound.
    seed : int
        Seed of the simulation noise.

    Returns
    -------
    PlanResult

    Examples
    --------
    >>> r = plan("vfa", 1.0, samples=2, tr=0.015, snr=100)
    >>> [round(a, 1) for a in r.protocol["FlipAngle"]]
    [4.1, 23.6]
    """
    if method not in METHODS:
        raise InputError(f"plan: unknown method {method!r}; choose one of {', '.join(METHODS)}")
    spec = _METHODS[method]
    vr = np.atleast_1d(np.asarray(value_range, float))
    if vr.size not in (1, 2):
        raise InputError("value_range=: give one value or LO,HI")
    lo, hi = float(vr[0]), float(vr[-1])
    notes: list[str] = []
    if tr is not None and method in ("t2", "t2star"):
        notes.append(f"--tr is not used by the {method} model (ignored)")
        tr = None
    n = spec.default_samples if samples is None else int(samples)
    if evaluate is not None:
        n = int(np.size(evaluate))
    if limits is not None:
        lim = (float(limits[0]), float(limits[-1]))
    elif evaluate is not None and np.size(evaluate) > 1 and np.ptp(evaluate) > 0:
        lim = (float(np.min(evaluate)), float(np.max(evaluate)))  # compare with the same span, evenly spread
    else:
        lim = default_limits(method, (lo, hi), tr)
    _check(method, (lo, hi), n, lim, snr, tr, evaluate)
    grid = _range_grid(lo, hi)
    if evaluate is not None:
        design = np.sort(np.asarray(evaluate, float))
    elif method == "t2":
        design = _design_train(method, lim, grid, snr, n)
    else:
        design = _design_free(_Objective(method, lim, grid, snr, tr), n)
    # clean numbers: 1 microsecond / 1e-4 degree, kept inside the limits
    design = np.clip(np.round(design, 4 if spec.unit == "deg" else 6), lim[0], lim[1]) if evaluate is None else design
    even = _evenly_spread(method, n, lim)
    worst = float(np.max(predicted_cv(method, design, grid, snr=snr, tr=tr)))
    worst_even = float(np.max(predicted_cv(method, even, grid, snr=snr, tr=tr)))
    rows_at = _report_values(lo, hi)
    cv_d = predicted_cv(method, design, rows_at, snr=snr, tr=tr)
    cv_e = predicted_cv(method, even, rows_at, snr=snr, tr=tr)
    predicted = [{"value_s": float(v), "cv": float(a), "cv_evenly_spread": float(b), "in_range": bool(lo <= v <= hi)}
                 for v, a, b in zip(rows_at, cv_d, cv_e, strict=True)]
    protocol: dict = {spec.key: [float(v) for v in design]}
    if tr is not None:
        protocol["RepetitionTime"] = [float(tr)]
    if method == "t2":
        protocol["EchoSpacing"] = [float(design[0])]
    if not np.isfinite(worst):
        notes.append("this protocol cannot determine every parameter of the model (singular Fisher information)")
    result = PlanResult(
        method=method, protocol=protocol, objective=worst, predicted=predicted,
        reference={"samples": [float(v) for v in even], "objective": worst_even},
        settings={"range_s": [lo, hi], "limits": [lim[0], lim[1]], "limits_unit": spec.unit, "snr": float(snr),
                  "samples": n, "tr_s": tr, "evaluated": evaluate is not None, "command": f"qmap {spec.command}"},
        notes=notes,
    )
    if simulate > 0:
        result.simulation = simulate_spread(method, design, rows_at, snr=snr, tr=tr, n=simulate, seed=seed)
    return result


def simulate_spread(method: str, samples, values, *, snr: float, tr: float | None = None, n: int = 400,
                    seed: int = 0) -> list[dict]:
    """Spread of qmap's own fits on simulated data of a protocol.

    Gaussian noise of sd ``1/snr`` is added to the noise-free signals of each
    relaxation time in ``values`` (``n`` voxels each); the series is fitted
    with the solver the fitting command uses (``ir``: signed, phase-corrected
    data; ``t2``/``t2star``: no noise-floor model, matching the Gaussian noise
    of the bound). Returns rows ``{"value_s", "cv_simulated", "median_bias"}``
    with the spread as the robust sd (1.4826 x median absolute deviation)
    divided by the true value.
    """
    from .fitting.noise_floor import NoiseFloor
    from .maps import fit_volume

    x = np.asarray(samples, float)
    values = np.atleast_1d(np.asarray(values, float))
    rng = np.random.default_rng(seed)
    model, params = _truth_and_model(method, x, values, tr)
    clean = model.predict(params)  # (R, m)
    data = clean[:, None, :] + rng.normal(0.0, 1.0 / snr, (len(values), n, x.size))
    maps = fit_volume(model, data.reshape(len(values), n, 1, x.size), noise=NoiseFloor("none"))
    est = np.asarray(maps.estimates[_METHODS[method].parameter]).reshape(len(values), n)
    ok = (np.asarray(maps.status).reshape(len(values), n) == 0)
    rows = []
    for v, e, good in zip(values, est, ok, strict=True):
        e = e[good & np.isfinite(e)]
        med = float(np.median(e)) if e.size else float("nan")
        mad = float(np.median(np.abs(e - med))) if e.size else float("nan")
        rows.append({"value_s": float(v), "cv_simulated": 1.4826 * mad / float(v), "median_bias": med / float(v) - 1,
                     "n_fitted": int(e.size)})
    return rows
