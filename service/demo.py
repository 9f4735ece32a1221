"""The demo scenario (invented): hourly energy use of the pump stations of a water utility.

Every value is generated here from a seed; nothing comes from a real utility. Energy follows the
hydraulic power law (power = ρ g Q H / η, a handbook relation of pump engineering) with an efficiency
that falls off away from each pump's best-efficiency flow, a per-station efficiency, a mild effect of
water temperature, and noise. ``month=1`` gives the "next month" data: the same stations after some
wear (efficiency a little lower), for a scheduled retrain.
"""

from __future__ import annotations

import numpy as np

STATIONS = ["north-ridge", "mill-lane", "quarry-hill", "riverside", "old-town", "harbour-gate"]
RHO_G = 1000.0 * 9.81  # water density (kg/m³) × gravity (m/s²)

DEMO_SPEC = {
    "target": "energy_kwh",
    "features": ["flow_lps", "head_m"],
    "categorical": ["station"],
    "units": {"energy_kwh": "kWh", "flow_lps": "L/s", "head_m": "m"},
    "bases": [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3, 4, 5, 6]},
              {"kind": "rbf", "widths": [0.5, 1.0, 2.0], "centers": 60}],
    "penalty": {"kind": "l2", "strengths": {"min": 1e-6, "max": 1e3, "count": 30}},
    "cv": {"scheme": "kfold", "folds": 5, "seed": 0},
    "selection": {"metric": "rmse", "rule": "best"},
}


def pump_stations(n: int = 3000, seed: int = 0, month: int = 0, extra_features: bool = False) -> dict[str, np.ndarray]:
    """Hourly readings: station, hour, flow (L/s), head (m), water temperature (°C) and energy (kWh)."""
    rng = np.random.default_rng([seed, month])
    k = len(STATIONS)
    st = rng.integers(0, k, n)
    hour = rng.integers(0, 24, n)
    demand = 0.55 + 0.45 * np.sin((hour - 6) / 24 * 2 * np.pi) ** 2
    bep = np.linspace(60.0, 95.0, k)[st]  # best-efficiency flow of each station's pumps, L/s
    flow = np.clip(bep * demand * rng.lognormal(0.0, 0.18, n) + rng.normal(0, 3, n), 3.0, 140.0)
    static_head = np.linspace(18.0, 42.0, k)[st]
    head = static_head + 0.0022 * flow**2 + rng.normal(0, 1.2, n)  # static lift plus friction ~ Q²
    temp = 9.0 + 6.0 * rng.random(n) + 0.1 * month
    wear = 1.0 - 0.03 * month
    eta_max = np.linspace(0.78, 0.70, k)[st] * wear
    eta = eta_max * (1.0 - 0.3 * ((flow - bep) / bep) ** 2) * (1.0 - 0.002 * (temp - 12.0))
    eta = np.clip(eta, 0.45, 0.9)
    power_kw = RHO_G * (flow / 1000.0) * head / eta / 1000.0
    energy = power_kw * 1.0 + rng.normal(0.0, 0.6, n)  # one hour of running
    out = {
        "station": np.array(STATIONS, dtype=object)[st].astype(str),
        "hour": hour.astype(float),
        "flow_lps": np.round(flow, 3),
        "head_m": np.round(head, 3),
        "energy_kwh": np.round(energy, 4),
    }
    if extra_features:
        out["water_temp_c"] = np.round(temp, 2)
    return out


def numeric_matrix(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """The scenario's four numeric inputs (flow, head, water temperature, hour) and energy, for benchmarks."""
    d = pump_stations(n, seed, extra_features=True)
    names = ["flow_lps", "head_m", "water_temp_c", "hour"]
    return np.column_stack([d[c] for c in names]), d["energy_kwh"], names
