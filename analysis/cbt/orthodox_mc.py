"""Orthodox Monte Carlo emulator of a 1D CBT array (kinetic Monte Carlo, Gillespie algorithm).

The exact master equation (analysis.cbt.tunnelling) is limited to short chains because its state
space grows as (2K + 1)^(N − 1). A stochastic simulation has no such limit: it follows one charge
configuration at a time, drawing the next tunnelling event with probability proportional to its
orthodox rate and the waiting time from an exponential distribution (Gillespie, J. Phys. Chem.
81, 2340 (1977)), so its cost grows only linearly with N. It is used to validate the long-array
model (analysis.cbt.full_model) and for planning, never inside a fit.

Many independent replicas run side by side as numpy arrays. The current is estimated by the time
average of the *expected* net current in the visited configurations (the conditional expectation
of the counted transfers, which has the same mean and a smaller variance), averaged over all
junctions; its standard error comes from the spread between replicas, which are independent.
Same reduced units as analysis.cbt.tunnelling: x = eV/(N k_B T), u = ΔE/(k_B T), J → x at high
bias, G/G_T = dJ/dx.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from analysis.cbt.tunnelling import (
    ArrayDescription,
    TunnellingModelError,
    charging_parameter,
    orthodox_rate_factor,
)


@dataclass(frozen=True)
class MonteCarloCurrent:
    """Estimated reduced current J at one bias, with its standard error and run statistics."""

    x: float
    u: float
    current: float
    standard_error: float
    n_replicas: int
    events_per_replica: int
    seed: int
    #: Each replica's own time-averaged current (independent replicas; their spread gives the
    #: standard error, and paired runs difference them replica by replica).
    replica_currents: np.ndarray = field(default=None, repr=False, compare=False)


def simulate_current(
    array: ArrayDescription,
    x: float,
    u: float,
    *,
    seed: int,
    n_replicas: int = 1000,
    events_per_replica: int = 2000,
    burn_in_events: int = 200,
) -> MonteCarloCurrent:
    """Stationary current of the array by orthodox kinetic Monte Carlo.

    Orthodox sequential tunnelling (rates of docs/physics.md §1.3; Melsen et al., PRB 55, 10638 (1997)
    for arrays) sampled by the Gillespie algorithm (J. Phys. Chem. 81, 2340 (1977)). Every
    replica starts from the configuration the charge window of the master equation would be
    centred on and discards ``burn_in_events`` events before averaging. Reproducible: the same
    ``seed`` gives the same result bit for bit.
    """
    _check_run(x, u, n_replicas, events_per_replica, burn_in_events)
    rng = np.random.default_rng(seed)
    n = array.n_junctions
    c = charging_parameter(u, n)
    e_junction = c * array.junction_charging()
    inv_r = 1.0 / np.asarray(array.resistance_ratios)
    chain = _ReplicaChains.start(array, c, n * x, n_replicas)
    elapsed = np.zeros(n_replicas)
    weighted = np.zeros(n_replicas)
    for step in range(burn_in_events + events_per_replica):
        forward, backward = _junction_rates(chain.psi, e_junction, inv_r)
        rates = np.concatenate((forward, backward), axis=1)
        total = rates.sum(axis=1)
        # Gillespie: exponential dwell at the total rate, then the event in proportion to its rate.
        dwell = rng.exponential(size=n_replicas) / total
        if step >= burn_in_events:
            elapsed += dwell
            weighted += dwell * (forward - backward).mean(axis=1)
        pick = rng.random(n_replicas) * total
        event = np.minimum((np.cumsum(rates, axis=1) < pick[:, None]).sum(axis=1), 2 * n - 1)
        chain.tunnel(event)
    per_replica = weighted / elapsed
    return MonteCarloCurrent(
        x=float(x),
        u=float(u),
        current=float(per_replica.mean()),
        standard_error=float(per_replica.std(ddof=1) / math.sqrt(n_replicas)),
        n_replicas=n_replicas,
        events_per_replica=events_per_replica,
        seed=seed,
        replica_currents=per_replica,
    )


def _check_run(x: float, u: float, n_replicas: int, events_per_replica: int,
               burn_in_events: int) -> None:
    if not (math.isfinite(x) and math.isfinite(u)) or u <= 0:
        raise TunnellingModelError(f"need finite x and u > 0; got x = {x!r}, u = {u!r}")
    if n_replicas < 2 or events_per_replica < 1 or burn_in_events < 0:
        raise TunnellingModelError(
            "need n_replicas >= 2, events_per_replica >= 1 and burn_in_events >= 0"
        )


def _junction_rates(psi: np.ndarray, e_junction: np.ndarray, inv_r: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Forward and backward orthodox rates through junctions k = 1..N of every replica
    (docs/physics.md §1.3): forward moves an electron from node k to k − 1, with free-energy
    argument ψ_k − ψ_{k−1} + E_k, backward the reverse; each scaled by R̄/R_k."""
    drive = psi[:, 1:] - psi[:, :-1]  # ψ_k − ψ_{k−1}, junctions k = 1..N
    forward, _ = orthodox_rate_factor(drive + e_junction)
    backward, _ = orthodox_rate_factor(-drive + e_junction)
    forward *= inv_r
    backward *= inv_r
    return forward, backward


@dataclass
class _ReplicaChains:
    """The island charges and node potentials of every replica, updated event by event.

    ``psi`` holds the reduced node potentials e φ/k_B T with the leads (nodes 0 and N) at ±v/2
    and the islands from K̃ (docs/physics.md §1.3); ``kpad`` is K̃ padded with zero rows for the
    leads, so that an electron entering or leaving a lead changes no island potential."""

    charges: np.ndarray
    psi: np.ndarray
    kpad: np.ndarray
    c: float
    n_islands: int

    @classmethod
    def start(cls, array: ArrayDescription, c: float, v: float, n_replicas: int
              ) -> _ReplicaChains:
        """Every replica in the configuration the master equation's charge window is centred on."""
        n = array.n_junctions
        m = array.n_islands
        kinv = array.inverse_capacitance()
        offsets = np.asarray(array.offset_charges)
        profile = v * (0.5 - np.arange(1, n) / n)
        start = np.rint(-(array.c0_ratio * profile / c) + offsets).astype(np.int64)
        charges = np.tile(start, (n_replicas, 1))
        psi = np.empty((n_replicas, n + 1))
        psi[:, 0] = 0.5 * v
        psi[:, n] = -0.5 * v
        psi[:, 1:n] = c * (offsets - charges) @ kinv + v * array.lead_coupling()
        kpad = np.zeros((n + 1, m))
        kpad[1:n] = kinv
        return cls(charges, psi, kpad, c, m)

    def tunnel(self, event: np.ndarray) -> None:
        """Apply one event per replica: ``event`` < N is forward through junction event + 1
        (node k to k − 1), else backward through junction event − N + 1."""
        n = self.psi.shape[1] - 1
        m = self.n_islands
        junction = event % n + 1
        is_forward = event < n
        source = np.where(is_forward, junction, junction - 1)
        target = np.where(is_forward, junction - 1, junction)
        # An electron leaving node a raises its potential by c K̃[a]; arriving at b lowers it.
        self.psi[:, 1:n] += self.c * (self.kpad[source] - self.kpad[target])
        replicas = np.arange(self.psi.shape[0])
        src_island = (source >= 1) & (source <= m)
        tgt_island = (target >= 1) & (target <= m)
        self.charges[replicas[src_island], source[src_island] - 1] -= 1
        self.charges[replicas[tgt_island], target[tgt_island] - 1] += 1


def conductance_by_difference(
    array: ArrayDescription,
    x: float,
    u: float,
    *,
    seed: int,
    step: float = 0.5,
    common_random_numbers: bool = True,
    **kwargs: int,
) -> tuple[float, float]:
    """G/G_T ≈ [J(x + h) − J(x − h)]/(2h) from two Monte Carlo runs, with its standard error.

    A planning-grade estimate (docs/physics.md §1.3 defines G = dI/dV): the central difference has a
    bias of (h²/6) G'' on top of the statistical error returned. With ``common_random_numbers``
    (the default) both runs draw the same random numbers, replica by replica and event by event,
    so that paired replicas follow nearly the same event sequence while their rates differ only
    by the small bias step; their currents are then strongly correlated and the difference is
    estimated from the replica-wise differences, whose spread gives its standard error (the
    method of common random numbers, e.g. Glasserman, *Monte Carlo Methods in Financial
    Engineering*, Springer 2003, §7.1). Otherwise the two runs use independent seeds derived
    from ``seed``. Either way the result is reproducible.
    """
    if common_random_numbers:
        up = simulate_current(array, x + step, u, seed=seed, **kwargs)
        down = simulate_current(array, x - step, u, seed=seed, **kwargs)
        paired = up.replica_currents - down.replica_currents
        value = float(paired.mean()) / (2 * step)
        error = float(paired.std(ddof=1) / math.sqrt(paired.size)) / (2 * step)
        return value, error
    seeds = np.random.SeedSequence(seed).generate_state(2)
    up = simulate_current(array, x + step, u, seed=int(seeds[0]), **kwargs)
    down = simulate_current(array, x - step, u, seed=int(seeds[1]), **kwargs)
    value = (up.current - down.current) / (2 * step)
    error = math.hypot(up.standard_error, down.standard_error) / (2 * step)
    return value, error
