"""Distributions of key cell values by group, from the database's current analyses."""

from __future__ import annotations

from passivefit.model import schema as S

# The four panels; the L panel falls back to L_cyl when no recording has L_bs.
PANELS = (S.TAU0, S.R_IN, S.L_BS, S.C_TOTAL)


def plot_by_group(rows, by: str, path: str) -> int:
    """Box-and-points plots of τ0, R_in, L and C_total per value of the column `by`.

    Parameters
    ----------
    rows : sequence of (cell, recording, analysis) mappings
        The database's current analyses (`Database.current_analyses()` rows).
    by : str
        A cell, recording or analysis column to group by.
    path : str
        Figure file (.png, .pdf or .svg).

    Returns
    -------
    int
        The number of groups.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import numpy as np

    def group(row) -> str:
        cell, recording, analysis = row
        value = {**cell, **recording, **analysis}.get(by)
        return "(none)" if value is None else str(value)

    groups = sorted({group(r) for r in rows})
    panels = list(PANELS)
    if all(r[2][S.L_BS.key] is None for r in rows):
        panels[2] = S.L_CYL
    fig, axes = plt.subplots(2, 2, figsize=(9, 7), layout="constrained")
    rng = np.random.default_rng(0)  # jitter only; fixed so the figure is reproducible
    for ax, q in zip(axes.flat, panels, strict=True):
        data = [[r[2][q.key] for r in rows if group(r) == g and r[2][q.key] is not None]
                for g in groups]
        positions = np.arange(1, len(groups) + 1)
        filled = [(p, d) for p, d in zip(positions, data, strict=True) if d]
        if filled:
            ax.boxplot([d for _, d in filled], positions=[p for p, _ in filled], widths=0.5,
                       showfliers=False, medianprops={"color": "#b5472d"})
        for p, d in filled:
            ax.scatter(p + rng.uniform(-0.12, 0.12, len(d)), d, s=14, color="#2b6f8f",
                       alpha=0.8, zorder=3)
        ax.set_xticks(positions, [f"{g}\n(n={len(d)})" for g, d in zip(groups, data,
                                                                           strict=True)])
        ax.set_ylabel(q.heading)
        ax.grid(axis="y", alpha=0.3)
    fig.suptitle(f"Current analyses by {by} ({len(rows)} recordings)")
    fig.savefig(path)
    plt.close(fig)
    return len(groups)
