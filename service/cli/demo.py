"""Generate the invented delivery-fleet demo: fuel used per route.

The data is made up for the embedded stack's first run. Each route's fuel follows a known formula
(``expected_fuel``) plus Gaussian noise, so a user can see that a model recovers something real.
It is a demo and never a reference for any check of sealfold's numbers.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

DEMO_NAME = "delivery-fleet-routes"
DEMO_TEAM = "demo"
DEMO_TARGET = "fuel_litres"
DEMO_ID_COLUMN = "route_id"
DEMO_SEED = 20_240_611
DEMO_ROWS = 3_000
NOISE_SD_LITRES = 1.5

# Invented depots: fixed litres per route for idling and yard traffic, and how hilly their region is.
DEPOT_IDLE_LITRES: dict[str, float] = {
    "Harbourside": 1.8,
    "Millbrook": 0.6,
    "Northgate": 1.1,
    "Quarry Lane": 2.4,
    "Windmere": 0.0,
}
_DEPOT_CLIMB_M_PER_KM: dict[str, float] = {
    "Harbourside": 2.0,
    "Millbrook": 9.0,
    "Northgate": 5.0,
    "Quarry Lane": 14.0,
    "Windmere": 7.0,
}

LITRES_PER_KM = 0.21
LITRES_PER_KM_PER_TONNE = 0.04
LITRES_PER_STOP = 0.30
LITRES_PER_100M_CLIMB = 1.1


def expected_fuel(frame: pd.DataFrame) -> pd.Series:
    """Return the noise-free fuel of each route: the formula the demo data is drawn from.

    litres = depot idle + distance_km * (0.21 + 0.04 * payload tonnes) + 0.30 * stops
             + 1.1 * elevation_gain_m / 100
    The payload term multiplies distance, so a purely additive linear model is close but not exact.
    """
    per_km = LITRES_PER_KM + LITRES_PER_KM_PER_TONNE * frame["payload_kg"] / 1000.0
    return (
        frame["depot"].map(DEPOT_IDLE_LITRES).astype(float)
        + frame["distance_km"] * per_km
        + LITRES_PER_STOP * frame["stops"]
        + LITRES_PER_100M_CLIMB * frame["elevation_gain_m"] / 100.0
    )


def make_routes(n_rows: int = DEMO_ROWS, seed: int = DEMO_SEED) -> pd.DataFrame:
    """Draw ``n_rows`` invented routes; the same seed always gives the same table."""
    if n_rows < 1:
        raise ValueError(f"n_rows must be at least 1, got {n_rows}")
    rng = np.random.default_rng(seed)
    depots = np.array(sorted(DEPOT_IDLE_LITRES))
    depot = rng.choice(depots, size=n_rows)
    distance_km = np.round(np.clip(rng.lognormal(mean=3.6, sigma=0.6, size=n_rows), 3.0, 400.0), 1)
    stops = 1 + rng.poisson(lam=distance_km / 12.0)
    payload_kg = np.round(rng.uniform(150.0, 3_500.0, size=n_rows)).astype(np.int64)
    climb = np.array([_DEPOT_CLIMB_M_PER_KM[d] for d in depot])
    elevation_gain_m = np.round(distance_km * climb * rng.gamma(shape=4.0, scale=0.25, size=n_rows))
    frame = pd.DataFrame(
        {
            DEMO_ID_COLUMN: [f"R{i:06d}" for i in range(1, n_rows + 1)],
            "depot": depot,
            "distance_km": distance_km,
            "stops": stops.astype(np.int64),
            "payload_kg": payload_kg,
            "elevation_gain_m": elevation_gain_m.astype(np.int64),
        }
    )
    noise = rng.normal(0.0, NOISE_SD_LITRES, size=n_rows)
    # Rounded to centilitres, as a fuel card would report it; never below a tenth of a litre.
    frame[DEMO_TARGET] = np.round(np.maximum(expected_fuel(frame).to_numpy() + noise, 0.1), 2)
    return frame


def write_demo_csv(data_dir: Path, n_rows: int = DEMO_ROWS, seed: int = DEMO_SEED) -> Path:
    """Write the demo table as CSV under ``data_dir/demo`` and return its path."""
    target = data_dir / "demo" / "delivery_routes.csv"
    target.parent.mkdir(parents=True, exist_ok=True)
    make_routes(n_rows, seed).to_csv(target, index=False)
    return target


def demo_declaration() -> dict[str, str]:
    """Return the form fields that register the demo through ``POST /v1/datasets``."""
    return {"name": DEMO_NAME, "task": "regression", "target": DEMO_TARGET, "id_column": DEMO_ID_COLUMN}


def demo_submission(dataset_id: str) -> dict[str, object]:
    """Return a Ridge configuration for the demo, in the shape ``POST /v1/submissions`` takes."""
    numeric = ["distance_km", "stops", "payload_kg", "elevation_gain_m"]
    return {
        "dataset": dataset_id,
        "model": {
            "estimator": "Ridge",
            "params": {"alpha": 1.0},
            "features": [*numeric, "depot"],
            "preprocess": [
                {"transformer": "OneHotEncoder", "columns": ["depot"], "params": {"handle_unknown": "ignore"}},
                {"transformer": "StandardScaler", "columns": numeric},
            ],
        },
        "validation": {"folds": 5, "repeats": 1},
        "metrics": ["rmse", "mae", "r2"],
        "label": "ridge with depot dummies",
    }
