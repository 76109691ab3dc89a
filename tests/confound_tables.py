"""A confounds table shaped like a preprocessing pipeline's, built for the tests.

118 columns: the six motion parameters with ``_derivative1``, ``_power2`` and
``_derivative1_power2`` variants (24), ``global_signal``, ``csf`` and ``white_matter`` with the
same variants (12), ``framewise_displacement``, ``dvars``, ``std_dvars``, ``rmsd`` (4), 50
anatomical, 6 temporal and 12 combined CompCor components, cosine drift columns equal to our
own discrete cosine basis, ``motion_outlier00..`` one-hot columns and
``non_steady_state_outlier00..`` columns. Values are written with six significant digits
(``%.6g``), differences and their squares have ``n/a`` in the first row, and
``c_comp_cor_00`` is ``a_comp_cor_00`` again up to that rounding (a near-duplicate column).

Everything is invented for the tests; the layout follows what pipelines write (common
practice): derivatives are backward differences and ``_power2`` columns squares.
"""

from __future__ import annotations

import numpy as np

from voxelscope.core.design import dct_drift

MOTION6 = ("trans_x", "trans_y", "trans_z", "rot_x", "rot_y", "rot_z")


def _variants(name: str, x: np.ndarray) -> dict[str, np.ndarray]:
    d = np.concatenate([[np.nan], np.diff(x)])
    return {
        name: x,
        f"{name}_derivative1": d,
        f"{name}_power2": x * x,
        f"{name}_derivative1_power2": d * d,
    }


def pipeline_columns(
    n: int = 200,
    tr: float = 2.0,
    seed: int = 0,
    highpass_s: float = 128.0,
    n_non_steady: int = 2,
    outlier_volumes: tuple[int, ...] = (57, 120, 121),
) -> dict[str, np.ndarray]:
    """Column name -> values (NaN for ``n/a``), in the table's column order."""
    rng = np.random.default_rng(seed)
    cols: dict[str, np.ndarray] = {}
    for sig in ("global_signal", "csf", "white_matter"):
        cols.update(_variants(sig, 100 + np.cumsum(rng.standard_normal(n))))
    motion = {}
    for m in MOTION6:
        scale = 0.05 if m.startswith("trans") else 0.001
        motion[m] = np.cumsum(scale * rng.standard_normal(n))
    for m in MOTION6:
        cols.update(_variants(m, motion[m]))
    d = {m: np.abs(np.diff(motion[m], prepend=motion[m][0])) for m in MOTION6}
    fd = sum(d[m] for m in MOTION6[:3]) + 50.0 * sum(d[m] for m in MOTION6[3:])
    fd[0] = np.nan
    cols["framewise_displacement"] = fd
    dv = np.abs(rng.standard_normal(n)) * 10 + 20
    dv[0] = np.nan
    cols["dvars"] = dv
    cols["std_dvars"] = dv / 20.0
    cols["rmsd"] = np.concatenate([[np.nan], np.abs(rng.standard_normal(n - 1)) * 0.05])
    a = np.linalg.qr(rng.standard_normal((n, 50)))[0]
    for k in range(50):
        cols[f"a_comp_cor_{k:02d}"] = a[:, k]
    t = np.linalg.qr(rng.standard_normal((n, 6)))[0]
    for k in range(6):
        cols[f"t_comp_cor_{k:02d}"] = t[:, k]
    c = np.linalg.qr(rng.standard_normal((n, 12)))[0]
    c[:, 0] = a[:, 0] * (1 + 1e-9)  # the same component again, up to rounding
    for k in range(12):
        cols[f"c_comp_cor_{k:02d}"] = c[:, k]
    drift = dct_drift(n, tr, highpass_s)
    for k in range(drift.shape[1]):
        cols[f"cosine{k:02d}"] = drift[:, k]
    for k, v in enumerate(outlier_volumes):
        col = np.zeros(n)
        col[v] = 1.0
        cols[f"motion_outlier{k:02d}"] = col
    for k in range(n_non_steady):
        col = np.zeros(n)
        col[k] = 1.0
        cols[f"non_steady_state_outlier{k:02d}"] = col
    return cols


def table_text(cols: dict[str, np.ndarray]) -> str:
    """Tab-separated text with six significant digits and ``n/a`` for NaN."""
    names = list(cols)
    n = len(next(iter(cols.values())))
    lines = ["\t".join(names)]
    for i in range(n):
        cells = []
        for name in names:
            v = cols[name][i]
            cells.append("n/a" if np.isnan(v) else f"{v:.6g}")
        lines.append("\t".join(cells))
    return "\n".join(lines) + "\n"


def write_pipeline_table(path, **kw) -> dict[str, np.ndarray]:
    """Write the table to ``path``; returns the exact columns (before rounding)."""
    cols = pipeline_columns(**kw)
    path.write_text(table_text(cols), encoding="utf-8")
    return cols
