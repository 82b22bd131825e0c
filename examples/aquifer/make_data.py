"""Synthetic pumping-test observations of the aquifer demo (INVENTED data).

The data are made up for the demonstration: drawdowns at an observation well
``OBS_RADIUS_M = 60 m`` from a test well pumped at ``TEST_PUMPING_RATE_M3S = 0.01 m³/s``,
computed with the Theis (1935) solution from the STATED true values

* transmissivity ``T = 5e-3 m²/s``  (``log10_T = log10(5e-3) ≈ -2.30103``),
* storativity    ``S = 2e-4``        (``log10_S = log10(2e-4) ≈ -3.69897``),

at 20 times log-spaced from 60 s to 1 day (rounded to whole seconds, as a logger would record
them), plus independent Gaussian noise with standard deviation ``SIGMA_M = 0.01 m`` drawn with
``numpy.random.default_rng(SEED)``.  Drawdown is positive down, in m; times in s.

Run ``python -m winnow.examples.aquifer.make_data`` to (re)write
``examples/aquifer/data/observations.csv``; the file in the repository is exactly what this
script writes (a test checks it byte for byte).

Caution: invented data for a demonstration; real pumping-test analysis and any water-supply
decision need review under the local regulations and by a licensed professional.
"""

from __future__ import annotations

import argparse
import io
import sys
from pathlib import Path

import numpy as np

from winnow.examples.aquifer.theis import OBS_RADIUS_M, TEST_PUMPING_RATE_M3S, forward

__all__ = [
    "DATA_FILE",
    "N_TIMES",
    "SEED",
    "SIGMA_M",
    "S_TRUE",
    "TRUE_THETA",
    "T_TRUE",
    "load_observations",
    "render_csv",
    "synthetic_observations",
]

#: True transmissivity [m²/s] and storativity [-] of the invented aquifer.
T_TRUE: float = 5e-3
S_TRUE: float = 2e-4
#: The same as ``theta = (log10_T, log10_S)``.
TRUE_THETA: tuple[float, float] = (float(np.log10(T_TRUE)), float(np.log10(S_TRUE)))
#: Standard deviation of the measurement noise [m] (transducer plus unmodelled fluctuations).
SIGMA_M: float = 0.01
#: Number of observation times, first and last time [s].
N_TIMES: int = 20
T_FIRST_S: float = 60.0
T_LAST_S: float = 86400.0
#: Seed of the noise.
SEED: int = 1935
#: The committed observations file.
DATA_FILE: Path = Path(__file__).resolve().parent / "data" / "observations.csv"

_COLUMNS = ("t_s", "drawdown_m", "sigma_m")


def synthetic_observations(
    *, rng: int | np.random.Generator | None = SEED
) -> dict[str, np.ndarray]:
    """Noisy Theis drawdowns at the observation well from the true parameters.

    Parameters
    ----------
    rng : int or numpy.random.Generator, keyword-only
        Seed or generator of the noise (default :data:`SEED`, which made the committed file).

    Returns
    -------
    dict of str to ndarray, each shape (N_TIMES,)
        ``t_s`` [s], ``drawdown_m`` [m, positive down; rounded to 0.1 mm], ``sigma_m`` [m].
    """
    gen = np.random.default_rng(rng)
    t = np.round(np.geomspace(T_FIRST_S, T_LAST_S, N_TIMES))
    clean = forward(
        np.array(TRUE_THETA), {"t_s": t, "r_m": OBS_RADIUS_M, "q_m3s": TEST_PUMPING_RATE_M3S}
    )
    noisy = clean + SIGMA_M * gen.standard_normal(N_TIMES)
    return {
        "t_s": t,
        "drawdown_m": np.round(noisy, 4),
        "sigma_m": np.full(N_TIMES, SIGMA_M),
    }


def render_csv(observations: dict[str, np.ndarray]) -> str:
    """The CSV text: header ``t_s,drawdown_m,sigma_m`` and one row per time (``\\n`` ends)."""
    buf = io.StringIO()
    buf.write(",".join(_COLUMNS) + "\n")
    for t, d, s in zip(*(observations[c] for c in _COLUMNS), strict=True):
        buf.write(f"{t:.0f},{d:.4f},{s:.4f}\n")
    return buf.getvalue()


def load_observations(path: str | Path = DATA_FILE) -> dict[str, np.ndarray | float]:
    """Read an observations CSV into the mapping that :func:`theis.forward` accepts.

    Parameters
    ----------
    path : path-like
        CSV with the header ``t_s,drawdown_m,sigma_m`` (default: the committed data).

    Returns
    -------
    dict
        ``t_s``, ``drawdown_m``, ``sigma_m`` as float arrays of shape (n_obs,), plus the
        pumping-test constants ``r_m`` (:data:`OBS_RADIUS_M`) and ``q_m3s``
        (:data:`TEST_PUMPING_RATE_M3S`) as floats.

    Raises
    ------
    ValueError
        If the header is not the expected one or a value is not a finite number.
    """
    p = Path(path)
    lines = p.read_text(encoding="utf-8").splitlines()
    if not lines or tuple(h.strip() for h in lines[0].split(",")) != _COLUMNS:
        raise ValueError(f"{p}: expected the header {','.join(_COLUMNS)!r}, got {lines[:1]!r}")
    rows = []
    for lineno, line in enumerate(lines[1:], start=2):
        if not line.strip():
            continue
        parts = line.split(",")
        try:
            vals = [float(v) for v in parts]
        except ValueError:
            raise ValueError(f"{p}:{lineno}: expected 3 numbers, got {line!r}") from None
        if len(vals) != 3 or not all(np.isfinite(vals)):
            raise ValueError(f"{p}:{lineno}: expected 3 finite numbers, got {line!r}")
        rows.append(vals)
    arr = np.array(rows, dtype=np.float64).reshape(-1, 3)
    return {
        "t_s": arr[:, 0],
        "drawdown_m": arr[:, 1],
        "sigma_m": arr[:, 2],
        "r_m": OBS_RADIUS_M,
        "q_m3s": TEST_PUMPING_RATE_M3S,
    }


def main(argv: list[str] | None = None) -> int:
    """Write the observations CSV (default: the committed file)."""
    parser = argparse.ArgumentParser(description="Write the invented pumping-test observations.")
    parser.add_argument("--out", type=Path, default=DATA_FILE, help="CSV file to write")
    args = parser.parse_args(argv)
    text = render_csv(synthetic_observations())
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(text, encoding="utf-8", newline="\n")
    print(f"wrote {args.out} ({N_TIMES} rows)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
