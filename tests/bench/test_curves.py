"""The bench's learning-curve charts: one panel per method, the mean over seeds drawn from the seeds' values."""
import math

import numpy as np
from matplotlib.figure import Figure

from adaptkit.bench.curves import check_curves, curve_chart, mean_curve


def test_the_mean_curve_is_numpys_nanmean_over_the_seeds_at_each_step():
    seeds = [[(0, 0.5), (100, 0.7), (200, 0.8)], [(0, 0.4), (100, math.nan), (200, 0.9)], [(0, 0.6), (100, 0.5)]]
    got = dict(mean_curve(seeds))
    table = np.array([[0.5, 0.7, 0.8], [0.4, np.nan, 0.9], [0.6, 0.5, np.nan]])  # seeds × steps, gaps as nan
    want = np.nanmean(table, axis=0)  # numpy is the reference: a missing value does not count at its step
    assert sorted(got) == [0.0, 100.0, 200.0]
    np.testing.assert_allclose([got[0.0], got[100.0], got[200.0]], want)


def test_one_panel_per_method_with_each_seed_and_the_mean_and_the_baseline_line(tmp_path):
    curves = check_curves({(m, "toy", s): [(0, 0.5), (100, 0.6 + 0.1 * s)] for m in ("source_only", "dann", "mmd")
                           for s in range(3)})
    curves[("dann", "other", 0)] = [(0, 0.1)]  # another shift: not drawn here
    figs = []

    def save(fig, path):
        figs.append(fig)
        fig.savefig(path, format="png")
        return path

    curve_chart(curves, "toy", ["source_only", "dann"], tmp_path / "c.png", baseline="source_only",
                new_figure=lambda w, h: Figure(figsize=(w, h)), save=save)
    visible = [ax for ax in figs[0].axes if ax.get_visible()]
    assert [ax.get_title() for ax in visible] == ["source_only (3 seeds)", "dann (3 seeds)", "mmd (3 seeds)"]
    for ax in visible:
        lines = ax.get_lines()
        assert len(lines) == 3 + 1 + 1  # three seeds, their mean, the baseline's final mean
        np.testing.assert_allclose(lines[3].get_ydata(), [50.0, 70.0])  # mean of 60, 70, 80 at step 100
        np.testing.assert_allclose(lines[4].get_ydata(), [70.0, 70.0])  # source-only's final mean, in %
    assert (tmp_path / "c.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
