"""Measurement planning: what sweep to take for a given CBT and target temperature.

From the device (N, M, R_T, C, C_0, island volume) and the temperature, predict the dip
(charging energy ΔE = ((N − 1)/N) e²/C, Pekola et al. 1994; reduced by stray capacitance roughly as
the infinite-array e²/C_eff = (e²/C)[1 − √(C₀/(C₀ + 4C))], docs/physics.md 1.4, derived), its width
(Farhangfar et al. 1997), the largest lock-in excitation whose *unmodelled* broadening stays below a
chosen width error (exact semicircle average, docs/physics.md 1.4), the self-heating at the half-depth
bias (Wellstood et al. 1994 heat balance), and the best achievable standard uncertainty of T from
the Fisher information of the sweep (Cramér–Rao bound; Kay, *Fundamentals of Statistical Signal
Processing: Estimation Theory*, Prentice Hall 1993, ch. 3).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy import optimize

from analysis.cbt.models import (
    HeatingModel,
    SweepSetup,
    depth_series,
    forward_conductance,
    half_width_voltage,
    higher_order_shape,
    numerical_fwhm,
)
from analysis.constants import BOLTZMANN, ELEMENTARY_CHARGE

#: Σ for copper, W K⁻⁵ m⁻³ (Wellstood, Urbina & Clarke 1994; value from memory, docs/physics.md 1.4).
SIGMA_COPPER = 2e9


@dataclass(frozen=True)
class Device:
    junctions_in_series: int
    parallel_rows: int
    junction_resistance_ohm: float
    junction_capacitance_F: float
    ground_capacitance_F: float = 0.0
    island_volume_m3: float | None = None
    electron_phonon_constant: float = SIGMA_COPPER

    @property
    def charging_energy_K(self) -> float:
        """ΔE/k_B with the infinite-array stray-capacitance reduction (docs/physics.md 1.4, derived)."""
        N, C, C0 = self.junctions_in_series, self.junction_capacitance_F, self.ground_capacitance_F
        reduction = 1.0 - math.sqrt(C0 / (C0 + 4 * C)) if C0 > 0 else 1.0
        return (N - 1) / N * ELEMENTARY_CHARGE**2 / (C * BOLTZMANN) * reduction

    @property
    def asymptotic_conductance_S(self) -> float:
        return self.parallel_rows / (self.junctions_in_series * self.junction_resistance_ohm)


@dataclass(frozen=True)
class SweepPlan:
    temperature_K: float
    u: float
    depth: float
    half_width_voltage_V: float
    bias_range_V: float  # sweep from −range to +range
    points: int
    max_excitation_rms_V: float
    excitation_width_error: float
    heating_at_half_width: float | None
    predicted_relative_uncertainty: float
    notes: tuple[str, ...]

    def as_dict(self) -> dict:
        return asdict(self)


def excitation_width_ratio(alpha: float) -> float:
    """FWHM of the lock-in-averaged first-order dip over the bare FWHM at α = e a_pk/(N k_B T)."""
    x = np.linspace(0.0, 14.0 + 2 * alpha, 28001)
    setup = SweepSetup(1, excitation_rms_V=alpha / math.sqrt(2) * BOLTZMANN / ELEMENTARY_CHARGE)
    bare = forward_conductance(higher_order_shape, x * BOLTZMANN / ELEMENTARY_CHARGE, SweepSetup(1), 1.0, 1e-4, 1.0, 0.0)
    avg = forward_conductance(higher_order_shape, x * BOLTZMANN / ELEMENTARY_CHARGE, setup, 1.0, 1e-4, 1.0, 0.0)
    return numerical_fwhm(x, avg)[1] / numerical_fwhm(x, bare)[1]


def cramer_rao_temperature(
    bias: np.ndarray, setup: SweepSetup, temperature: float, u: float, asymptotic_conductance: float,
    noise_std: float,
) -> float:
    """Smallest unbiased σ(T) from the Fisher information of (T, u, G_T, V₀), white noise σ known."""
    theta = np.array([temperature, u, asymptotic_conductance, 0.0])
    vt = setup.junctions_in_series * BOLTZMANN * temperature / ELEMENTARY_CHARGE
    steps = np.array([1e-5 * temperature, 1e-5 * max(u, 1e-3), 1e-7 * asymptotic_conductance, 1e-5 * vt])

    def model(p: np.ndarray) -> np.ndarray:
        return forward_conductance(higher_order_shape, bias, setup, p[0], p[1] * p[0], p[2], p[3])

    jac = np.empty((bias.size, 4))
    for k in range(4):
        dp = np.zeros(4)
        dp[k] = steps[k]
        jac[:, k] = (model(theta + dp) - model(theta - dp)) / (2 * steps[k])
    fisher = jac.T @ jac / noise_std**2
    return math.sqrt(float(np.linalg.inv(fisher)[0, 0]))


def plan_sweep(
    device: Device,
    temperature: float,
    relative_noise: float = 2e-4,
    width_error: float = 1e-3,
    range_half_widths: float = 5.0,
    points: int = 401,
) -> SweepPlan:
    """Recommend a sweep for ``device`` at ``temperature`` and predict its uncertainty."""
    if temperature <= 0:
        raise ValueError("temperature must be positive")
    N = device.junctions_in_series
    ec = device.charging_energy_K
    u = ec / temperature
    notes = []
    if u > 1.0:
        notes.append(f"u = {u:.2f} > 1: the weak-blockade models are outside their validated range; "
                     "use the full tunnelling model or a smaller charging energy")
    if device.junction_resistance_ohm < 4 * 25812.807:
        notes.append("R_T is not much larger than h/e²: cotunnelling corrections may matter")
    vh = half_width_voltage(temperature, N, higher_order_shape, ec)
    alpha = optimize.brentq(lambda a: excitation_width_ratio(a) - 1.0 - width_error, 1e-3, 4.0)
    a_rms = alpha * N * BOLTZMANN * temperature / ELEMENTARY_CHARGE / math.sqrt(2)
    heating = None
    if device.island_volume_m3:
        hm = HeatingModel(device.electron_phonon_constant * device.island_volume_m3, device.junction_resistance_ohm)
        heating = float(hm.electron_temperature(vh / 2, temperature, N)) / temperature - 1.0
        if heating > 0.1:
            notes.append(f"self-heating {100 * heating:.0f} % at the half-depth bias: fit with the heating "
                         "model and give the island volume and coupling in run.toml")
    bias = np.linspace(-range_half_widths * vh, range_half_widths * vh, points)
    setup = SweepSetup(N, a_rms)
    gt = device.asymptotic_conductance_S
    crb = cramer_rao_temperature(bias, setup, temperature, min(u, 4.0), gt, relative_noise * gt)
    return SweepPlan(
        temperature_K=temperature,
        u=u,
        depth=float(depth_series(min(u, 4.0))),
        half_width_voltage_V=vh,
        bias_range_V=range_half_widths * vh,
        points=points,
        max_excitation_rms_V=a_rms,
        excitation_width_error=width_error,
        heating_at_half_width=heating,
        predicted_relative_uncertainty=crb / temperature,
        notes=tuple(notes),
    )
