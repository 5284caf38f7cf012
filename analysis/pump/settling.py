"""The settling transient after each pump switch, measured from the on/off record itself.

After the pump is switched on or off the indicated current does not jump to its new level: the
ammeter's filter, dielectric relaxation in the cabling and the pump's own start-up leave a
transient that decays over seconds. Readings inside it are dropped before the on and off segments
are averaged (Giblin et al., Nat. Commun. 3, 930 (2012), drop the readings just after each switch),
but a tail left in the kept readings does not cancel in the on − off difference unless the
transients after switch-on and switch-off are equal and opposite — a lagging ammeter, an overshoot
at both switches or a start-up transient of the pump all bias the result.

So the transient is measured rather than assumed. Every segment after a switch is aligned on its
switch and the segments are stacked (one matrix per switch direction and segment length). The
reading k of segment s is modelled as

    y_sk = L_s + A_dir(s) exp(−t_k/τ) + β t_k + noise,                                        (1)

t_k the time since the switch, L_s a free level per segment (profiled out by subtracting each
segment's mean over the fitted window, which makes the fit exact in the L_s — Frisch–Waugh), A_on
and A_off the amplitudes after switch-on and switch-off, τ shared, and β a common within-segment
slope that absorbs the offset drift. For a given τ the model is linear; τ is found by a grid and a
bounded refinement of the residual sum of squares. The stacked sums make each evaluation cost one
pass over the positions of a segment, not over the record.

Residual bias of a discard (derived). With readings before d dropped, segment s contributes
the mean of A exp(−t_k/τ) over its kept readings, ḡ_s(d) A, to its mean. The cycle difference
ΔI_j = Ī_on,j − [(1 − w_j) Ī_off,j + w_j Ī_off,j+1] therefore carries

    b_j(d) = A_on ḡ_on,j(d) − A_off [(1 − w_j) ḡ_off,j(d) + w_j ḡ_off,j+1(d)],                (2)

and the mean difference the average of b_j over cycles. For equal segments of n readings at
spacing Δt with the first m dropped, ḡ(d) = e^{−mΔt/τ} (1 − e^{−(n−m)Δt/τ}) / [(n − m)(1 − e^{−Δt/τ})]
(a geometric series), so b = (A_on − A_off) ḡ(d): a transient that is the same after both switches
cancels and one of opposite sign doubles.

Uncertainty. The reading noise is coloured and the offset wanders, so the least-squares covariance
of (1) would be wrong. The fit is repeated with each of G contiguous blocks of segments left out,
and the delete-a-group jackknife variance u² = (G − 1)/G Σ_g (θ_(g) − θ̄)² (Efron & Tibshirani,
An Introduction to the Bootstrap (1993), ch. 11, eq. 11.5 for G = n) of every fitted quantity,
including the residual bias b(d), uses the record's own noise, whatever its colour.

Peeling. The fitted shape only approximates a real transient (two time constants, a filter
response, an overshoot). When a fit is resolved, the next fit starts where that one's transient
has fallen to the noise of one stacked position and looks for a slower component the faster one
hid (the method of residuals for sums of exponentials; common practice, no source); peeling stops
at the first fit that is not resolved. What decides the residual bias is the tail near and beyond
the discard, and a late window follows the slowest component there.

Correction and choice of the discard (the correction variant of "fit the asymptotic levels with
the shared transient"). At a discard d — never less than the operator's stated settling time, nor
than the start of the last fit's window — each resolved fit predicts b̂(d) with a jackknife
uncertainty; the resolved fit allowing the largest |b̂| + t_{0.975,G−1} u sets the correction.
An unresolved fit corrects nothing (τ is not fixed): its allowance is the larger of the largest
fixed-τ jackknife u(b̂_τ(d)) over its τ range and the excess of its own best fit's prediction
b̂_w(d) over the correction b̂(d) in the correction's direction — a tail the late window sees but
the correction leaves uncorrected, which belongs in the uncertainty (Phillips, Eberhardt & Parry,
J. Res. NIST 102, 577 (1997); from memory). Only an excess counts: a sum of decaying exponentials
of one sign is log-convex and its slowest component rules the tail, so a single exponential
fitted to it extrapolates a tail that decays too fast (a correction within t times the late
fit's own resolution has no direction, and any larger |b̂_w| counts). When the allowance exceeds
the correction's own uncertainty it becomes the uncertainty of the budget row, the estimate
staying the resolved fits' b̂ (the late window saw no significant transient, which is evidence
about the size of the tail, not that it is zero; taking it as zero under-corrected a tail the
earlier fits had measured). d is the candidate that minimises the combined u(d)² + u(b̂(d))².

Refusals: a resolved fit whose τ reaches the top of its range (a quarter of the segment, at most
half the window): the transient may be slower still and the segments cannot outlast it; or an
unresolved fit whose allowance exceeds the rest of the uncertainty at the best discard. A
resolved transient whose correction dominates is certified with a warning.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import special

#: At least this fraction of every segment must remain after the discard.
MIN_KEPT_FRACTION = 0.2
#: Largest time constant searched, as a fraction of the median segment duration: a slower
#: relaxation cannot be told from a change of the pump current within a segment.
MAX_TAU_FRACTION = 0.25
#: Contiguous blocks of segments left out in turn by the jackknife.
JACKKNIFE_BLOCKS = 20
#: Discards evaluated on the first pass of the scan (a long segment has more positions).
MAX_SCANNED = 24
#: |A|/u(A) above which an amplitude counts as resolved.
RESOLVED_Z = 3.0


class SettlingError(ValueError):
    """The settling transient cannot be handled: unresolved and longer than the segments allow.

    ``analysis`` holds the measured transient when the refusal came after the fit."""

    def __init__(self, message: str, analysis: SettlingAnalysis | None = None) -> None:
        super().__init__(message)
        self.analysis = analysis


# --------------------------------------------------------------------------------------------
# Stacking


@dataclass(frozen=True, eq=False)
class _Stack:
    """Segments of one switch direction and length, aligned on the switch."""

    direction: int  # 1: after switch-on, 0: after switch-off
    segments: np.ndarray  # segment numbers (rows)
    since: np.ndarray  # mean time since the switch at each position, s
    values: np.ndarray  # (rows, positions), A
    block: np.ndarray  # jackknife block of each row


@dataclass(frozen=True, eq=False)
class StackedRecord:
    """The record's segments after a switch, stacked by direction and length."""

    stacks: tuple[_Stack, ...]
    reading_interval_s: float
    segment_duration_s: float  # median
    blocks: int


def stack_segments(time_s: np.ndarray, current_a: np.ndarray, starts: np.ndarray,
                   stops: np.ndarray, states: np.ndarray, blocks: int = JACKKNIFE_BLOCKS
                   ) -> StackedRecord:
    """Stack every segment that begins at a switch (the first segment of the record does not:
    whether the pump had just been switched before the record started is unknown)."""
    t = np.asarray(time_s, dtype=float)
    y = np.asarray(current_a, dtype=float)
    lengths = stops - starts
    dt = float(np.median(np.diff(t)))
    ends = np.append(t[starts[1:]], t[-1] + dt)
    duration = float(np.median((ends - t[starts])[1:])) if starts.size > 1 else float(ends[0] - t[0])
    switched = np.arange(1, starts.size)
    if switched.size < 2:
        raise SettlingError("the record needs at least two switches to measure the settling transient")
    span = t[starts[-1]] - t[starts[1]]
    g = max(2, min(blocks, switched.size // 2))
    block_of = np.minimum(((t[starts] - t[starts[1]]) / (span if span > 0 else 1.0) * g).astype(int),
                          g - 1)
    stacks = []
    for direction in (1, 0):
        mine = switched[states[switched] == direction]
        for length in np.unique(lengths[mine]):
            rows = mine[lengths[mine] == length]
            idx = starts[rows, None] + np.arange(length)[None, :]
            since = t[idx] - t[starts[rows], None]
            stacks.append(_Stack(direction, rows, since.mean(axis=0), y[idx], block_of[rows]))
    return StackedRecord(tuple(stacks), dt, duration, g)


# --------------------------------------------------------------------------------------------
# Fit of the shared transient


@dataclass(frozen=True)
class TransientFit:
    """Amplitudes after switch-on and switch-off, the shared time constant and the slope.

    The amplitudes are the transient's values at the start w of the fitted window: eq. (1) is
    written A_dir,w exp(−(t − w)/τ), which is the same model and keeps a late window's fit from
    extrapolating (and overflowing) back to the switch."""

    amplitude_on_a: float
    amplitude_off_a: float
    tau_s: float
    slope_a_per_s: float
    window_start_s: float  # readings at least this long after the switch were fitted

    def shape(self, since_s: np.ndarray, direction: int) -> np.ndarray:
        """A_dir,w exp(−(t − w)/τ): the fitted transient at times t after a switch (eq. 1)."""
        a = self.amplitude_on_a if direction == 1 else self.amplitude_off_a
        return a * np.exp(-(np.asarray(since_s, dtype=float) - self.window_start_s) / self.tau_s)


@dataclass(frozen=True)
class _Sums:
    """Column sums and row counts of one stack over the fitted window, per jackknife block."""

    direction: int
    since: np.ndarray
    total: np.ndarray  # column sums over all rows
    rows: int
    by_block: np.ndarray  # (blocks, positions)
    rows_by_block: np.ndarray


def _window_sums(rec: StackedRecord, start_s: float) -> list[_Sums]:
    out = []
    for s in rec.stacks:
        cols = s.since >= start_s
        if cols.sum() < 3:
            continue
        v = s.values[:, cols]
        by_block = np.zeros((rec.blocks, v.shape[1]))
        np.add.at(by_block, s.block, v)
        out.append(_Sums(s.direction, s.since[cols], v.sum(axis=0), v.shape[0], by_block,
                         np.bincount(s.block, minlength=rec.blocks)))
    return out


def _solve(sums: list[_Sums], taus: np.ndarray, leave_out: int | None, start: float
           ) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares (A_on, A_off, β) of eq. (1) at each fixed τ, and the explained sums of
    squares (the residual sum of squares is their complement, so the best τ maximises them)."""
    taus = np.atleast_1d(np.asarray(taus, dtype=float))
    xtx = np.zeros((taus.size, 3, 3))
    xty = np.zeros((taus.size, 3))
    for s in sums:
        c = s.total if leave_out is None else s.total - s.by_block[leave_out]
        n = s.rows if leave_out is None else s.rows - s.rows_by_block[leave_out]
        if n == 0:
            continue
        e = np.exp(-(s.since[None, :] - start) / taus[:, None])
        e -= e.mean(axis=1, keepdims=True)
        z = s.since - s.since.mean()
        a = 0 if s.direction == 1 else 1
        ez = e @ z
        xtx[:, a, a] += n * np.einsum("ij,ij->i", e, e)
        xtx[:, a, 2] += n * ez
        xtx[:, 2, a] += n * ez
        xtx[:, 2, 2] += n * (z @ z)
        xty[:, a] += e @ c
        xty[:, 2] += z @ c
    # A direction with no segment in the window leaves its row empty: pin its amplitude to 0.
    for k in (0, 1):
        empty = xtx[:, k, k] == 0
        xtx[empty, k, k] = 1.0
    theta = np.linalg.solve(xtx, xty[..., None])[..., 0]
    return theta, np.einsum("ij,ij->i", theta, xty)


def _fit(sums: list[_Sums], tau_grid: np.ndarray, leave_out: int | None, start_s: float
         ) -> TransientFit:
    """τ by the grid, then two finer grids between the best point's neighbours (log-spaced) and
    the vertex of a parabola through the best three; each stage is one vectorised solve."""
    grid = tau_grid
    for _ in range(3):
        _, explained = _solve(sums, grid, leave_out, start_s)
        i = int(np.argmax(explained))
        lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
        best = float(grid[i])
        if hi <= lo:
            break
        grid = np.geomspace(lo, hi, 17)
    _, explained = _solve(sums, grid, leave_out, start_s)
    i = int(np.argmax(explained))
    tau = float(grid[i])
    if 0 < i < grid.size - 1:
        x = np.log(grid[i - 1 : i + 2])
        y = explained[i - 1 : i + 2]
        den = (x[0] - x[1]) * (x[0] - x[2]) * (x[1] - x[2])
        a = (x[2] * (y[1] - y[0]) + x[1] * (y[0] - y[2]) + x[0] * (y[2] - y[1])) / den
        b = (x[2] ** 2 * (y[0] - y[1]) + x[1] ** 2 * (y[2] - y[0]) + x[0] ** 2 * (y[1] - y[2])) / den
        if a < 0:
            tau = float(np.clip(math.exp(-b / (2 * a)), grid[i - 1], grid[i + 1]))
    elif grid.size == 1:
        tau = best
    theta = _solve(sums, np.array([tau]), leave_out, start_s)[0][0]
    return TransientFit(float(theta[0]), float(theta[1]), tau, float(theta[2]), start_s)


def _tau_grid(rec: StackedRecord, start_s: float = 0.0) -> np.ndarray:
    """Time constants searched for a window starting ``start_s`` after the switch: up to
    MAX_TAU_FRACTION of the segment, and no more than half the window (a slower exponential
    cannot be told from a level and a slope there; an earlier, longer window is where it shows)."""
    lo = 0.3 * rec.reading_interval_s
    hi = max(min(MAX_TAU_FRACTION * rec.segment_duration_s,
                 0.5 * (rec.segment_duration_s - start_s)), 2 * lo)
    return np.geomspace(lo, hi, 48)


# --------------------------------------------------------------------------------------------
# Residual bias of a discard


def residual_bias(rec: StackedRecord, fit: TransientFit, d: float,
                  segment_weight: np.ndarray) -> float:
    """Mean over cycles of eq. (2): the bias the fitted transient leaves in the mean cycle
    difference when readings within d of each switch are dropped.

    ``segment_weight[s]`` is segment s's total weight in the mean difference (+1/J for each on
    segment, −(1 − w_j)/J and −w_j/J for the off segments of cycle j, J cycles)."""
    return float(residual_biases(rec, [fit], d, _stack_weights(rec, segment_weight))[0])


def _stack_weights(rec: StackedRecord, segment_weight: np.ndarray) -> np.ndarray:
    return np.array([float(np.sum(segment_weight[s.segments])) for s in rec.stacks])


def residual_biases(rec: StackedRecord, fits: list[TransientFit], d: float,
                    stack_weight: np.ndarray) -> np.ndarray:
    """:func:`residual_bias` for many fits at once (the jackknife replicates), with the
    per-stack weights already summed."""
    tau = np.array([f.tau_s for f in fits])
    w0 = np.array([f.window_start_s for f in fits])
    a_on = np.array([f.amplitude_on_a for f in fits])
    a_off = np.array([f.amplitude_off_a for f in fits])
    total = np.zeros(len(fits))
    for s, w in zip(rec.stacks, stack_weight, strict=True):
        kept = s.since[s.since >= d]
        if w == 0 or kept.size == 0:
            continue
        g = np.exp(-(kept[None, :] - w0[:, None]) / tau[:, None]).mean(axis=1)
        total += w * (a_on if s.direction == 1 else a_off) * g
    return total


# --------------------------------------------------------------------------------------------
# The measured transient and the discard it calls for


@dataclass(frozen=True, eq=False)
class TransientComponent:
    """One fit of eq. (1) over the readings from ``fit.window_start_s`` on, with its jackknife."""

    fit: TransientFit
    replicates: tuple[TransientFit, ...]
    amplitude_on_u_a: float
    amplitude_off_u_a: float
    tau_u_s: float
    resolved: bool
    at_limit: bool  # τ̂ at the top of the searched range: the transient may be slower still
    # τ̂ at the bottom of the searched range: the transient is over within one reading interval,
    # so its shape (τ, and the amplitude, which is only the first reading's step) is not
    # resolved; the fit still marks where the readings are clear of it, and its tail beyond
    # that is below the noise of one stacked position.
    at_floor: bool = False
    # For an unresolved fit: fits at fixed τ across the searched range, each with its jackknife.
    alternatives: tuple[tuple[TransientFit, tuple[TransientFit, ...]], ...] = ()
    tau_floor_s: float = 0.0  # the smallest τ searched

    @property
    def hypotheses(self) -> tuple[tuple[TransientFit, tuple[TransientFit, ...]], ...]:
        return ((self.fit, self.replicates),) + self.alternatives

    def as_dict(self) -> dict:
        f = self.fit
        return {
            "fit_window_start_s": f.window_start_s,
            "amplitude_after_switch_on_A": f.amplitude_on_a,
            "amplitude_after_switch_on_u_A": self.amplitude_on_u_a,
            "amplitude_after_switch_off_A": f.amplitude_off_a,
            "amplitude_after_switch_off_u_A": self.amplitude_off_u_a,
            "time_constant_s": f.tau_s, "time_constant_u_s": self.tau_u_s,
            "resolved": self.resolved and not self.at_floor,
            "time_constant_at_search_limit": self.at_limit,
            "time_constant_below_reading_resolution": self.at_floor,
            "time_constant_search_floor_s": self.tau_floor_s,
        }


@dataclass(frozen=True, eq=False)
class SettlingAnalysis:
    """The measured transient, its jackknife uncertainties and the discard chosen from it."""

    components: tuple[TransientComponent, ...]  # first: the whole segment; then peeled windows
    discard_s: float  # readings earlier than this after each switch are dropped
    minimum_discard_s: float  # the operator's stated settling time (the floor)
    residual_bias_a: float  # b̂(d) of the component that sets the bound, not corrected for
    residual_bias_u_a: float  # its jackknife standard uncertainty
    bias_bound_a: float  # |b̂| + t u: how large the residual bias could be (reported)
    other_u_a: float  # standard uncertainty of the rest of the result at the chosen discard
    profile_since_s: dict[int, np.ndarray]  # stacked mean profile for the plot, by direction
    profile_values_a: dict[int, np.ndarray]  # mean of (reading − segment level)
    profile_noise_a: float  # standard error of one stacked position
    blocks: int
    limiting: bool = False  # the transient's uncertainty exceeds the rest at the chosen discard

    @property
    def fit(self) -> TransientFit:
        return self.components[0].fit

    @property
    def resolved(self) -> bool:
        return self.components[0].resolved

    def describe(self) -> str:
        shaped = [c for c in self.components if c.resolved and not c.at_floor]
        first = (f"first resolved fit: τ = {shaped[0].fit.tau_s:.3g} s" if shaped else
                 "no transient resolved beyond the first reading")
        return (f"readings within {self.discard_s:g} s after each pump switch dropped, the discard "
                f"chosen from the settling transient measured in the record ({first}; "
                f"{len(self.components)} fit(s) in all)")

    def as_dict(self) -> dict:
        return {
            "model": "A exp(−t/τ) after each switch, shared τ, per-segment levels, common slope",
            "components": [c.as_dict() for c in self.components],
            "discard_s": self.discard_s, "minimum_discard_s": self.minimum_discard_s,
            "residual_bias_A": self.residual_bias_a, "residual_bias_u_A": self.residual_bias_u_a,
            "residual_bias_bound_A": self.bias_bound_a, "other_standard_uncertainty_A": self.other_u_a,
            "jackknife_blocks": self.blocks, "transient_limits_uncertainty": self.limiting,
        }


def _jackknife_u(values: np.ndarray) -> float:
    g = values.size
    return float(math.sqrt((g - 1) / g * np.sum((values - values.mean()) ** 2)))


def _profile(rec: StackedRecord) -> tuple[dict, dict, float]:
    """Stacked mean of (reading − segment mean) per direction, and the standard error of one
    stacked position (median over positions of the spread across segments / √segments)."""
    since: dict[int, np.ndarray] = {}
    vals: dict[int, np.ndarray] = {}
    noise = []
    for direction in (1, 0):
        mine = [s for s in rec.stacks if s.direction == direction]
        if not mine:
            continue
        s = max(mine, key=lambda s: s.values.shape[0])  # the commonest length
        dev = s.values - s.values.mean(axis=1, keepdims=True)
        since[direction] = s.since
        vals[direction] = dev.mean(axis=0)
        if dev.shape[0] > 1:
            noise.append(float(np.median(dev.std(axis=0, ddof=1))) / math.sqrt(dev.shape[0]))
    return since, vals, (float(np.median(noise)) if noise else 0.0)


def _component(rec: StackedRecord, start: float) -> TransientComponent | None:
    grid = _tau_grid(rec, start)
    sums = _window_sums(rec, start)
    if not sums:
        return None
    fit = _fit(sums, grid, None, start)
    reps = tuple(_fit(sums, grid, b, start) for b in range(rec.blocks))
    ua = _jackknife_u(np.array([r.amplitude_on_a for r in reps]))
    uo = _jackknife_u(np.array([r.amplitude_off_a for r in reps]))
    ut = _jackknife_u(np.array([r.tau_s for r in reps]))
    # Resolution is judged on the transient at the window start, A_w, with τ held at τ̂: the fit
    # is then linear and its jackknife that of a smooth statistic (with τ free, replicates that
    # jump between optima of a weak transient inflate it).
    held = [_fixed(sums, np.array([fit.tau_s]), b, start)[0] for b in range(rec.blocks)]
    z = 0.0
    for direction in (1, 0):
        u = _jackknife_u(np.array([float(r.shape(start, direction)) for r in held]))
        v = abs(float(fit.shape(start, direction)))
        z = max(z, v / u if u > 0 else (math.inf if v > 0 else 0.0))
    resolved = bool(z >= RESOLVED_Z)
    alternatives = ()
    if not resolved:
        # τ is not fixed by the data: every τ in the range stays a hypothesis. At fixed τ the fit
        # is linear, so its jackknife is that of a smooth statistic.
        taus = grid[::3]
        full = _fixed(sums, taus, None, start)
        reps_by_block = [_fixed(sums, taus, b, start) for b in range(rec.blocks)]
        alternatives = tuple((full[k], tuple(r[k] for r in reps_by_block))
                             for k in range(taus.size))
    return TransientComponent(fit, reps, ua, uo, ut, resolved,
                              bool(fit.tau_s >= 0.95 * grid[-1]),
                              at_floor=bool(fit.tau_s <= 1.05 * grid[0]),
                              alternatives=alternatives, tau_floor_s=float(grid[0]))


def _fixed(sums: list[_Sums], taus: np.ndarray, leave_out: int | None, start: float
           ) -> list[TransientFit]:
    """Fits of eq. (1) at each of the fixed time constants ``taus``."""
    theta = _solve(sums, taus, leave_out, start)[0]
    return [TransientFit(float(th[0]), float(th[1]), float(tau), float(th[2]), start)
            for th, tau in zip(theta, taus, strict=True)]


def choose_discard(
    rec: StackedRecord, minimum_s: float,
    weights_and_u: Callable[[float], tuple[np.ndarray, float]],
    max_components: int = 4,
) -> SettlingAnalysis:
    """Measure the transient, choose the discard and the correction for what it leaves.

    Peeling: the first fit covers the whole segment; while a fit is resolved, the next one starts
    where that fit's transient has fallen to the noise of one stacked position, and so looks for a
    slower component the faster one hid (the method of residuals for sums of exponentials; common
    practice, no source); peeling stops at the first fit that is not resolved. The discard is
    never shorter than the start of the last fit's window, so that every kept reading lies
    inside every window used. At each discard d the fit that allows the largest residual bias
    |b̂(d)| + t u(b̂(d)) (eq. 2, jackknife u) among the resolved ones sets the correction: a fast
    component fitted over the
    whole segment cannot hide a slower one a later window saw, and a later window whose fit
    wandered to a short τ cannot hide the slow tail an earlier fit measured. Among the discards
    allowed, the one chosen minimises the standard uncertainty of the corrected result,
    u(d)² + u(b̂(d))², u(d) the Type A (and chain) uncertainty with readings before d dropped.
    The mean difference is corrected by b̂(d).

    A fit that is not resolved leaves τ open and corrects nothing: each τ of the searched range
    (at fixed τ the fit is linear) is a hypothesis; the larger of the largest jackknife u(b̂_τ)
    over them and the excess of the fit's own prediction b̂_w(d) over the correction b̂(d), in
    the correction's direction (the part left uncorrected), is its allowance, which replaces the
    correction's uncertainty when it is larger.

    Refused (SettlingError) when a resolved fit's τ reaches the top of the searched range (the
    transient may be slower still), or when, at the chosen discard, the transient's uncertainty exceeds the
    rest of the uncertainty and the fit that sets it is not resolved: the segments are then too
    short to outlast a transient the record cannot resolve. When the fit is resolved the result
    stands, with ``limiting`` set so that the certificate says the transient limits it.

    ``weights_and_u(d)`` returns the per-segment weights of the mean cycle difference and the
    standard uncertainty (A, indicated) the result would have with discard d."""
    positions, first, latest = _discard_range(rec, minimum_s)
    since, vals, noise = _profile(rec)
    components = _peel(rec, positions, float(first[0]), latest, noise, max_components)
    # Every fit counts; an unresolved one through its fixed-τ hypotheses (its jackknife with τ
    # free, over a τ the data do not fix, is not a smooth statistic).
    tq = float(special.stdtrit(rec.blocks - 1, 0.975))
    low = max(minimum_s, float(first[0]), components[-1].fit.window_start_s)
    candidates = positions[(positions >= low) & (positions <= latest)]
    if candidates.size == 0:
        candidates = np.array([low])
    best = _scan_discards(
        candidates,
        lambda d: _try_discard(rec, components, d, tq, weights_and_u))
    d, b, ub, u = best.discard_s, best.bias_a, best.bias_u_a, best.rest_u_a
    result = SettlingAnalysis(tuple(components), d, minimum_s, b, ub, abs(b) + tq * ub,
                              u, since, vals, noise, rec.blocks, ub > u)
    _refuse_unbounded(rec, components, best, result)
    return result


def _discard_range(rec: StackedRecord, minimum_s: float
                   ) -> tuple[np.ndarray, np.ndarray, float]:
    """The stacked positions, those after the switch reading, and the latest discard allowed.

    Refused when the segments hold one reading or the stated settling time leaves less than
    ``MIN_KEPT_FRACTION`` of each segment."""
    positions = np.unique(np.concatenate([s.since for s in rec.stacks]))
    first = positions[positions > 0.5 * rec.reading_interval_s]
    if first.size == 0:
        raise SettlingError("segments of a single reading cannot be analysed")
    latest = (1.0 - MIN_KEPT_FRACTION) * rec.segment_duration_s
    if minimum_s > latest:
        raise SettlingError(
            f"the stated settling time {minimum_s:g} s leaves less than {MIN_KEPT_FRACTION:.0%} of "
            f"each {rec.segment_duration_s:g} s segment")
    return positions, first, latest


def _peel(rec: StackedRecord, positions: np.ndarray, start: float, latest: float, noise: float,
          max_components: int) -> list[TransientComponent]:
    """Fit transient components from ever later windows (the method of residuals for sums of
    exponentials; common practice, no source).

    Each resolved fit hands on to a window that starts where its transient, eq. (1), has fallen
    to ``noise``: t = start + τ ln(peak/noise). Stops at the first unresolved fit, at
    ``max_components``, or when the next window would start after ``latest``."""
    components: list[TransientComponent] = []
    while len(components) < max_components:
        c = _component(rec, start)
        if c is None:
            break
        components.append(c)
        if not c.resolved:
            break
        f = c.fit
        peak = max(abs(f.amplitude_on_a), abs(f.amplitude_off_a))
        if noise <= 0 or peak <= noise:
            break
        nxt = positions[positions >= start + f.tau_s * math.log(peak / noise)]
        if nxt.size == 0 or nxt[0] <= start or nxt[0] > latest:
            break
        start = float(nxt[0])
    if not components:
        raise SettlingError("no segment is long enough to fit the settling transient")
    return components


@dataclass(frozen=True)
class _DiscardTrial:
    """The outcome at one candidate discard: the correction b̂(d) and its uncertainty, the rest
    of the result's uncertainty u(d), the component that sets the correction's uncertainty
    (None when no fit contributes) and the combined √(u(d)² + u(b̂(d))²) that is minimised."""
    discard_s: float
    bias_a: float
    bias_u_a: float
    rest_u_a: float
    setter: TransientComponent | None
    total_u_a: float


def _try_discard(rec: StackedRecord, components: list[TransientComponent], d: float, tq: float,
                 weights_and_u: Callable[[float], tuple[np.ndarray, float]]) -> _DiscardTrial:
    """Correction and uncertainties at discard ``d``: residual bias by eq. (2) with a jackknife u.

    The resolved fit that allows the largest |b̂| + t u(b̂) sets the correction; an unresolved
    fit widens its uncertainty to its allowance but does not move its estimate."""
    weights, u = weights_and_u(d)
    sw = _stack_weights(rec, weights)
    worst = None
    for c in components:
        if not c.resolved:
            continue
        bs = residual_biases(rec, [c.fit, *c.replicates], d, sw)
        b, ub = float(bs[0]), _jackknife_u(bs[1:])
        if worst is None or abs(b) + tq * ub > abs(worst[0]) + tq * worst[1]:
            worst = (b, ub, c)
    b, ub, c = worst if worst is not None else (0.0, 0.0, None)
    for a in components:
        if a.resolved:
            continue
        # Not resolved: τ is open, so every τ of the range is a hypothesis; the largest
        # jackknife u over them is the allowance. The correction stays the resolved fits' b̂;
        # where the late window's own best fit predicts more tail than that (b̂_w beyond b̂ in
        # the same direction), the excess is a bias left uncorrected and the allowance must
        # cover it (an uncorrected bias belongs in the uncertainty: Phillips, Eberhardt &
        # Parry, J. Res. NIST 102, 577 (1997); from memory). Only an excess counts: a sum of
        # decaying exponentials of one sign is log-convex and its slowest component rules the
        # tail, so one exponential fitted to it extrapolates a tail that decays too fast
        # (derived); a late window that sees less shows the noise the spread already covers.
        # The squared excess holds the noise of b̂_w, so it is compared with the spread, not
        # added to it.
        spread = max(_jackknife_u(residual_biases(rec, list(reps), d, sw))
                     for _, reps in a.alternatives)
        own = float(residual_biases(rec, [a.fit], d, sw)[0])
        # (A correction within the late window's own resolution has no direction there.)
        same_side = own * b > 0 or abs(b) <= tq * max(ub, spread)
        excess = max(0.0, abs(own) - abs(b)) if same_side else 0.0
        allowance = max(spread, excess)
        if allowance > ub:
            ub, c = allowance, a
    return _DiscardTrial(d, b, ub, u, c, math.hypot(u, ub))


def _scan_discards(candidates: np.ndarray, evaluate: Callable[[float], _DiscardTrial]
                   ) -> _DiscardTrial:
    """The candidate with the smallest combined uncertainty.

    Every candidate when there are few; else every k-th, then all between the best one's
    neighbours (the total uncertainty varies slowly with d)."""
    step = max(1, int(math.ceil(candidates.size / MAX_SCANNED)))
    tried = {int(k): evaluate(float(candidates[k])) for k in range(0, candidates.size, step)}
    k_best = min(tried, key=lambda k: tried[k].total_u_a)
    for k in range(max(0, k_best - step + 1), min(candidates.size, k_best + step)):
        if k not in tried:
            tried[k] = evaluate(float(candidates[k]))
    return min(tried.values(), key=lambda x: x.total_u_a)


def _refuse_unbounded(rec: StackedRecord, components: list[TransientComponent],
                      best: _DiscardTrial, result: SettlingAnalysis) -> None:
    """Raise SettlingError (carrying ``result``) when the transient cannot be bounded: a resolved
    fit's τ at the top of its range, or an unresolved fit whose allowance exceeds the rest of
    the uncertainty at the chosen discard."""
    slow = [c for c in components if c.resolved and c.at_limit]
    if slow:
        fit = slow[0].fit
        raise SettlingError(
            f"the settling transient after each switch is too slow for these segments: fitted "
            f"from {fit.window_start_s:g} s after the switch, its time constant reaches the "
            f"largest the analysis accepts ({fit.tau_s:.3g} s for the "
            f"{rec.segment_duration_s:g} s segments), so it may be slower still and its tail in "
            "the kept readings cannot be bounded; record longer segments", result)
    d, ub, u = best.discard_s, best.bias_u_a, best.rest_u_a
    if ub > u and not best.setter.resolved:
        c = best.setter
        fit = c.fit
        what = ("the transient is resolved" if c.resolved else
                "the transient cannot be resolved from the noise")
        raise SettlingError(
            f"the settling transient after each switch (fitted from {fit.window_start_s:g} s, "
            f"values there: A_on = {fit.amplitude_on_a * 1e15:.3g} ± {c.amplitude_on_u_a * 1e15:.2g} fA, "
            f"A_off = {fit.amplitude_off_a * 1e15:.3g} ± {c.amplitude_off_u_a * 1e15:.2g} fA, "
            f"τ = {fit.tau_s:.3g} ± {c.tau_u_s:.2g} s) is too uncertain: {what}, and even with the "
            f"best discard ({d:g} s of each {rec.segment_duration_s:g} s segment) the uncertainty "
            f"of its residual bias ({ub * 1e15:.3g} fA) exceeds that of the rest of the result "
            f"({u * 1e15:.3g} fA); record longer segments or more cycles", result)
